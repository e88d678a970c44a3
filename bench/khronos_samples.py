"""The Khronos glTF 2.0 sample models built and solved as a user would, timed (issue 14).

For each of SimpleSkin, SimpleMorph, RiggedSimple and RiggedFigure (tests/data/khronos, licences
in its LICENSE.md): `rigcast build` from the original file, `rigcast solve` of the file's own
animation to glTF, and the solve read back through glTF 2.0 evaluation against the original
take. Prints one line per model and writes JSON with the build's wall time, the mean and max
vertex error in % of the take's bounding-box diagonal (acceptance: mean <= 0.1 % at default
settings) and the machine's load average, since the build time depends on it.

    python bench/khronos_samples.py                  # default settings (tens of minutes each)
    python bench/khronos_samples.py --reduced        # the CI test's reduced schedule
    python bench/khronos_samples.py --only RiggedFigure --out figures.json
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from rigcast.readers.takes import read_take

DATA = Path(__file__).resolve().parent.parent / "tests" / "data" / "khronos"
# The bounds the tests use (tests/test_gltf_samples.py): the joints each animation moves.
BOUNDS = {
    "SimpleSkin": {"joints": {"node_2": {"z": [-100, 100]}}},
    "SimpleMorph": None,
    "RiggedSimple": {"joints": {"Bone.001": {"x": [-60, 60]}}},
    "RiggedFigure": {"joints": {
        "neck_joint_1": {"x": [-30, 30]}, "neck_joint_2": {"x": [-30, 30]},
        "arm_joint_L_1": {"x": [-60, 60], "y": [-30, 30], "z": [-30, 30]},
        "arm_joint_R_1": {"x": [-60, 60], "y": [-30, 30], "z": [-30, 30]}}},
}
REDUCED = ["--samples", "600", "--steps", "200", "--epochs", "100"]


def rigcast(*args: str) -> None:
    proc = subprocess.run([sys.executable, "-m", "rigcast", *args], capture_output=True,
                          text=True, check=False, stdin=subprocess.DEVNULL)
    if proc.returncode != 0:
        raise SystemExit(f"rigcast {args[0]} failed: {proc.stderr[-2000:]}")


def run_one(name: str, schedule: list[str], workdir: Path) -> dict[str, float | str]:
    sample = DATA / f"{name}.gltf"
    bundle, out = workdir / f"{name}.rcb", workdir / f"{name}.solved.gltf"
    bounds = ["--bounds", json.dumps(BOUNDS[name])] if BOUNDS[name] else []
    load_before = os.getloadavg()[0]
    start = time.perf_counter()
    rigcast("build", str(sample), "-o", str(bundle), *schedule, "--quiet", *bounds)
    build_s = time.perf_counter() - start
    rig = ["--rig", f"gltf:{sample}", *bounds] if bounds else []
    rigcast("solve", str(bundle), str(sample), "-o", str(out), *rig)
    original, solved = read_take(sample), read_take(out)
    flat = original.vertices.reshape(-1, 3)
    diag = float(np.linalg.norm(flat.max(0) - flat.min(0)))
    err = np.linalg.norm(solved.vertices - original.vertices, axis=-1)
    return {"model": name, "build_seconds": round(build_s, 1),
            "mean_err_pct_diag": float(100 * err.mean() / diag),
            "max_err_pct_diag": float(100 * err.max() / diag),
            "frames": original.frame_count, "load_before": load_before,
            "load_after": os.getloadavg()[0]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--reduced", action="store_true", help="the CI test's reduced schedule")
    parser.add_argument("--only", nargs="*", choices=sorted(BOUNDS), help="these models only")
    parser.add_argument("--out", default="bench_khronos_samples.json", help="JSON to write")
    args = parser.parse_args()
    schedule = REDUCED if args.reduced else []
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.only or list(BOUNDS):
            row = run_one(name, schedule, Path(tmp))
            rows.append(row)
            print(f"{name}: build {row['build_seconds']} s (load {row['load_before']:.1f}), "
                  f"mean vertex error {row['mean_err_pct_diag']:.4f} % of the diagonal, "
                  f"max {row['max_err_pct_diag']:.4f} %", flush=True)
    Path(args.out).write_text(json.dumps({"schedule": schedule or "defaults", "rows": rows},
                                         indent=1))


if __name__ == "__main__":
    main()

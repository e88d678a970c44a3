"""One Euro settings against the demo takes: the lag a filter adds against the jitter it removes.

    python bench/filter_grid.py --bundles DIR/bundles [--rigs face,arm] [--out OUT]

DIR is a ``bench/quality.py --out DIR`` run: its bundles are reused, and each rig's take is the
quality report's (same generator, seed and noise). For every (min_cutoff, beta) pair the bundle's
inverse solves the noisy take, the One Euro filter runs as on the live server (beta per unit of
each control's range, runtime/solve/pipeline.py make_filter), and the filtered controls are scored
through the REAL rig against the clean performance: mean vertex error (the cost of lag) and
jitter (RMS second difference per unit of range), both also as ratios to the unfiltered solve.
The server's defaults (runtime/serve/config.py) were chosen from this table. Writes
OUT/filter_grid.json and OUT/filter_grid.png (error ratio against jitter ratio, one curve per
min_cutoff) when --out is given.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

import numpy as np
from quality import (  # bench/quality.py, beside this file
    filter_controls,
    solve_inverse,
    take_weights,
    talk_control,
)
from rigcast.export.quality import metrics
from rigcast.export.quality.take_synth import synth_take
from rigcast.export.rigs.demo_rigs import DEMO_RIGS
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.serve.config import filter_defaults


def run_rig(name: str, bundles: Path, cutoffs: list[float], betas: list[float]) -> dict[str, Any]:
    rig = DEMO_RIGS[name]()
    s = rig.schema
    bundle = load_bundle(bundles / f"{name}.rigcast")
    take = synth_take(rig, frames=480, fps=60.0, seed=7, noise_sigma=0.0015, wobble_sigma=0.001,
                      off_manifold_frames=4, pick_weights=take_weights(s),
                      talk_control=talk_control(s))
    raw = solve_inverse(bundle, take.vertices).controls

    def score(controls: np.ndarray) -> tuple[float, float]:
        meshes = rig.evaluate(controls)
        err = float(np.linalg.norm(meshes - take.vertices_clean, axis=2).mean())
        return err, metrics.jitter(controls, s.lower, s.upper)

    raw_err, raw_jit = score(raw)
    noise = float(np.linalg.norm(take.vertices - take.vertices_clean, axis=2).mean())
    print(f"{name}: unfiltered err {raw_err:.5f} jitter {raw_jit:.5f}; truth jitter "
          f"{metrics.jitter(take.controls_true, s.lower, s.upper):.5f}; input noise {noise:.5f}")
    grid = []
    for mc in cutoffs:
        for beta in betas:
            err, jit = score(filter_controls(raw, take.times_s, s, (mc, beta, 1.0)))
            grid.append({"min_cutoff": mc, "beta": beta, "mean_err": err,
                         "err_ratio": err / raw_err, "jitter": jit, "jitter_ratio": jit / raw_jit})
            print(f"  min_cutoff {mc:4.1f} Hz  beta {beta:5.1f}   err {err:.5f} "
                  f"({err / raw_err:5.2f}x)   jitter {jit:.5f} ({jit / raw_jit:4.2f}x)")
    return {"raw_mean_err": raw_err, "raw_jitter": raw_jit, "input_noise_mean_err": noise,
            "grid": grid}


def plot(path: Path, rigs: dict[str, dict[str, Any]], default: tuple[float, float]) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(rigs), figsize=(5.5 * len(rigs), 4.2), squeeze=False)
    for ax, (name, r) in zip(axes[0], rigs.items(), strict=True):
        for mc in sorted({g["min_cutoff"] for g in r["grid"]}):
            pts = [g for g in r["grid"] if g["min_cutoff"] == mc]
            ax.plot([g["jitter_ratio"] for g in pts], [g["err_ratio"] for g in pts], "o-",
                    label=f"min_cutoff {mc:g} Hz")
            for g in pts:
                ax.annotate(f"{g['beta']:g}", (g["jitter_ratio"], g["err_ratio"]), fontsize=7,
                            xytext=(3, 3), textcoords="offset points")
        d = [g for g in r["grid"] if (g["min_cutoff"], g["beta"]) == default]
        if d:
            ax.plot(d[0]["jitter_ratio"], d[0]["err_ratio"], "k*", ms=14, label="server default")
        ax.set_yscale("log")
        ax.set_xlabel("jitter / unfiltered jitter")
        ax.set_ylabel("mean vertex error / unfiltered error (log)")
        ax.set_title(f"{name}: One Euro lag against smoothing (labels: beta)")
        ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--bundles", type=Path, required=True,
                    help="the bundles/ folder of a bench/quality.py run")
    ap.add_argument("--rigs", default="face,arm", help="comma-separated built-in rigs")
    ap.add_argument("--min-cutoff", default="0.5,1,2,5", help="comma-separated values, Hz")
    ap.add_argument("--beta", default="0.5,5,10,20,40",
                    help="comma-separated values, per unit of each control's range")
    ap.add_argument("--out", type=Path, help="folder for filter_grid.json and filter_grid.png")
    args = ap.parse_args(argv)
    names = [n for n in args.rigs.split(",") if n]
    missing = [n for n in names if not (args.bundles / f"{n}.rigcast").is_file()]
    if missing:
        ap.error(f"no bundle for {missing} in {args.bundles}; run bench/quality.py --out DIR first")
    cutoffs = [float(v) for v in args.min_cutoff.split(",")]
    betas = [float(v) for v in args.beta.split(",")]
    rigs = {n: run_rig(n, args.bundles, cutoffs, betas) for n in names}
    min_cutoff, beta, _ = filter_defaults()
    if args.out is not None:
        args.out.mkdir(parents=True, exist_ok=True)
        (args.out / "filter_grid.json").write_text(json.dumps(
            {"rigs": rigs, "server_default": {"min_cutoff": min_cutoff, "beta": beta}},
            indent=2))
        plot(args.out / "filter_grid.png", rigs, (min_cutoff, beta))
        print(f"wrote {args.out / 'filter_grid.json'} and filter_grid.png")
    return 0


if __name__ == "__main__":
    sys.exit(main())

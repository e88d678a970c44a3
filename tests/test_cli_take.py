"""``rigcast build --take``: per-take mode from the command line, as a user runs it."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from rigcast.export.rigs.demo_rigs import tamsin_lantern_arm
from rigcast.runtime.bundle import load_bundle


def rigcast(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "rigcast", *args], capture_output=True,
                          text=True, timeout=600, check=False, cwd=cwd, stdin=subprocess.DEVNULL)


@pytest.mark.timeout(900)
def test_build_take_runs_per_take_mode(tmp_path: Path) -> None:
    rig = tamsin_lantern_arm()
    rng = np.random.default_rng(4)
    lo, hi = rig.schema.lower, rig.schema.upper
    # Every control half-way out at once: far from the sparse poses a general build samples.
    controls = lo + (hi - lo) * rng.uniform(0.55, 0.95, (40, rig.control_count))
    frames = rig.evaluate(controls)
    np.save(tmp_path / "take.npy", frames)
    tiny = ["--samples", "300", "--steps", "150", "--epochs", "10", "--cache", "cache", "--quiet"]
    general = rigcast("build", "demo:arm", "-o", "general.rcb", *tiny, cwd=tmp_path)
    assert general.returncode == 0, general.stderr
    tuned = rigcast("build", "demo:arm", "-o", "take.rcb", *tiny, "--take", "take.npy",
                    "--take-steps", "150", cwd=tmp_path)
    assert tuned.returncode == 0, tuned.stderr

    # The CLI reached per-take mode: the bundle's inverse was fine-tuned on the take, for the
    # steps asked. (That the fine-tune lowers the error is tests/test_build.py's
    # test_take_mode_lowers_the_error_on_the_take, on a rig where tiny builds are meaningful.)
    inverse = load_bundle(tmp_path / "take.rcb").manifest["training"]["inverse"]
    assert inverse["mode"] == "take" and inverse["steps"] == 150
    assert load_bundle(tmp_path / "general.rcb").manifest["training"]["inverse"]["mode"] == (
        "general")

"""The bench scripts run as a user runs them and write the JSON fields the issues name.

These are smoke runs with tiny sizes: they check that each script works end to end and that its
figures are consistent with each other, not the speed targets themselves (those are met and
reported by the full bench runs, on a quiet machine).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
STAGES = ("decode", "align", "infer", "filter", "publish", "total")


def run_bench(script: str, *args: str, timeout: float = 240.0) -> subprocess.CompletedProcess[str]:
    proc = subprocess.run([sys.executable, str(ROOT / "bench" / script), *args], cwd=ROOT,
                          capture_output=True, text=True, timeout=timeout)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc


SERVER_FIELDS = ("p50_ms", "p95_ms", "p99_ms", "ratio_p50_vs_floor", "ratio_p99_vs_floor_p99",
                 "max_sustained_fps", "rss_growth_mb")


def check_server_row(row: dict, run: dict) -> None:
    """One server row of a latency run, against the run's floor."""
    for key in SERVER_FIELDS:
        assert isinstance(row[key], float) and math.isfinite(row[key]), key
    assert 0 < row["p50_ms"] <= row["p95_ms"] <= row["p99_ms"]
    assert math.isclose(row["ratio_p50_vs_floor"], row["p50_ms"] / run["floor_p50_ms"],
                        rel_tol=1e-6)
    assert math.isclose(row["ratio_p99_vs_floor_p99"], row["p99_ms"] / run["floor_p99_ms"],
                        rel_tol=1e-6)
    assert row["frames"] >= 0.9 * 2 * 120  # paced at 120 fps for 2 s
    assert row["max_sustained_fps"] > 50
    assert row["alive_after_blast"] is True
    assert row["rss_growth_mb"] < 5.0
    medians = row["stage_median_ms"]
    assert set(STAGES) <= set(medians)
    assert all(medians[s] > 0 for s in STAGES)
    parts = sum(medians[s] for s in STAGES if s != "total")
    # medians of the parts need not add up exactly to the median of the total; roughly they do
    assert 0.5 * medians["total"] <= parts <= 2.0 * medians["total"]


def test_latency_bench_writes_every_named_field(tmp_path: Path) -> None:
    # a short training (--train-steps 40) in a cache of the test's own: the trained row's path
    # runs end to end; its figures are not what a user gets
    args = ("--vertices", "1500", "--duration", "2", "--floor-duration", "1", "--flat-seconds",
            "1", "--no-pin", "--train-steps", "40", "--cache", str(tmp_path / "cache"))
    proc = run_bench("latency.py", *args, "--out", str(tmp_path), timeout=400.0)
    assert "floor (echo) p50" in proc.stdout
    assert "server (trained)" in proc.stdout and "server (untrained)" in proc.stdout
    runs = json.loads((tmp_path / "latency.json").read_text())["runs"]
    assert [r["vertices"] for r in runs] == [1500]
    run = runs[0]
    for key in ("floor_p50_ms", "floor_p95_ms", "floor_p99_ms", "floor_max_sustained_fps"):
        assert isinstance(run[key], float) and math.isfinite(run[key]), key
    assert 0 < run["floor_p50_ms"] <= run["floor_p95_ms"] <= run["floor_p99_ms"]
    assert run["floor_max_sustained_fps"] > 50
    assert run["fit_error"] != "off", "the paced run must keep the fit-error telemetry on"
    assert run["noise_frac"] == 0.0015
    # the headline row (trained) at the top level, the worst case (untrained) beside it
    assert run["inverse"] == "trained" and run["untrained"]["inverse"] == "untrained"
    check_server_row(run, run)
    check_server_row(run["untrained"], run)
    made = run["trained_inverse"]
    assert made["steps"] == 40 and made["cached"] is False and made["seconds"] > 0
    assert 0 < made["mean_err_pct_diag"] < 100
    # a rerun reads the trained network from the cache (the trained row alone)
    again = run_bench("latency.py", *args, "--inverse", "trained", "--out", str(tmp_path / "b"),
                      timeout=400.0)
    (rerun,) = json.loads((tmp_path / "b" / "latency.json").read_text())["runs"]
    assert "server (untrained)" not in again.stdout and "untrained" not in rerun
    assert rerun["trained_inverse"]["cached"] is True
    for key in ("steps", "seconds", "mean_err"):  # how the cached network was made
        assert rerun["trained_inverse"][key] == made[key], key


QUALITY_FIELDS = ("inverse_mean_err", "lsq_mean_err", "nlls_mean_err", "inverse_jitter",
                  "inverse_active", "truth_active", "forward_mean_err_pct_diag", "build_seconds",
                  "bbox_diagonal", "offmanifold_recall", "offmanifold_false_rate")
PER_METHOD = ("mean_err", "clean_mean_err", "clean_max_err", "false_active", "jitter_vs_truth")
ZOO_SEED = 9  # with --quick's caps: a 1,190-vertex face with a skinned jaw and a rigid region


def test_quality_bench_quick_run_scores_builtin_and_zoo_rigs(tmp_path: Path) -> None:
    proc = run_bench("quality.py", "--quick", "--rigs", "arm", "--zoo-seeds", str(ZOO_SEED),
                     "--out", str(tmp_path), timeout=600.0)
    assert f"zoo seeds: [{ZOO_SEED}]" in proc.stdout and "worst rig: " in proc.stdout
    assert "nlls take" in proc.stderr  # progress on stderr
    rigs = json.loads((tmp_path / "quality.json").read_text())["rigs"]
    assert list(rigs) == ["arm", f"zoo-{ZOO_SEED}"]
    arm, zoo = rigs["arm"], rigs[f"zoo-{ZOO_SEED}"]
    assert arm["zoo"] is False and zoo["zoo"] is True and zoo["seed"] == ZOO_SEED
    assert zoo["zoo_spec"]["kind"] == "jaw_face" and zoo["rigid_region"] is True
    for entry in (arm, zoo):
        for key in QUALITY_FIELDS:
            assert isinstance(entry[key], float) and math.isfinite(entry[key]), key
        for m in ("inverse", "lsq", "nlls"):
            for k in PER_METHOD:
                v = entry[f"{m}_{k}"]
                assert isinstance(v, float) and math.isfinite(v) and v >= 0, (m, k)
            assert entry[f"{m}_clean_max_err"] >= entry[f"{m}_clean_mean_err"]
        names = set(entry["recoverable_controls"]) | {u["control"] for u in entry["unrecoverable"]}
        assert len(names) == entry["controls"]
        assert all(u["reason"] for u in entry["unrecoverable"])
        assert 0 <= entry["offmanifold_recall"] <= 1 and 0 <= entry["offmanifold_false_rate"] <= 1
        checks = entry["acceptance"]
        nlls = checks["§3 inverse_mean_err <= 0.8 x nlls_mean_err"]
        assert nlls["limit"] == 0.8 * entry["nlls_mean_err"]
        assert nlls["pass"] is (entry["inverse_mean_err"] <= nlls["limit"])
        assert checks["§3 inverse_false_active <= 0.3"]["value"] == entry["inverse_false_active"]
        recall = checks["§3 offmanifold_recall >= 0.9"]
        assert recall["truth"] == entry["nlls_offmanifold_recall"]
        assert recall["truth_passes"] is (entry["nlls_offmanifold_recall"] >= 0.9)
    # head motion only where a rigid region makes it separable
    assert arm["offmanifold_head_recall"] is None and "no rigid region" in arm["head_motion_note"]
    assert 0 <= zoo["offmanifold_head_recall"] <= 1
    assert "§3 offmanifold_head_recall >= 0.9" in zoo["acceptance"]
    jitter = arm["acceptance"]["inverse_active <= 1.5 x truth_active"]
    assert jitter["truth"] == arm["truth_active"]
    report = (tmp_path / "quality.md").read_text()
    assert "Worst rig" in report and f"zoo-{ZOO_SEED}" in report
    pngs = sorted(p.name for p in tmp_path.glob("*.png"))
    assert pngs == ["errors.png", "take_arm.png", f"take_zoo-{ZOO_SEED}.png"], pngs
    assert all((tmp_path / p).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pngs)
    # The filter grid reuses those bundles: more beta, less lag (error) and less smoothing.
    grid_dir = tmp_path / "grid"
    run_bench("filter_grid.py", "--bundles", str(tmp_path / "bundles"), "--rigs", "arm",
              "--min-cutoff", "1", "--beta", "0.5,40", "--out", str(grid_dir))
    grid = json.loads((grid_dir / "filter_grid.json").read_text())["rigs"]["arm"]["grid"]
    slow, fast = sorted(grid, key=lambda g: g["beta"])
    assert fast["mean_err"] < slow["mean_err"] and fast["jitter"] > slow["jitter"]
    assert (grid_dir / "filter_grid.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_quality_bench_draws_fresh_zoo_seeds_each_run(tmp_path: Path) -> None:
    runs = [run_bench("quality.py", "--dry-run", "--zoo", "3", "--out", str(tmp_path)).stdout
            for _ in range(2)]
    seeds = [next(line for line in r.splitlines() if line.startswith("zoo seeds: ")) for r in runs]
    assert seeds[0] != seeds[1]
    assert "rigs: ['face', 'face-linear', 'arm', 'zoo-" in runs[0]
    replay = run_bench("quality.py", "--dry-run", "--zoo-seeds", "4,5", "--out", str(tmp_path))
    assert "zoo seeds: [4, 5]" in replay.stdout


def test_batch_bench_synthetic_run_writes_fps_frames_and_fit_error_mode(tmp_path: Path) -> None:
    proc = run_bench("batch.py", "--synthetic", "--frames", "1500", "--repeats", "1",
                     "--batch-size", "256", "--per-frame-frames", "100", "--out", str(tmp_path),
                     timeout=120.0)
    assert "fit error full" in proc.stdout
    figures = json.loads((tmp_path / "batch.json").read_text())
    assert figures["bundle"] == "synthetic"
    assert figures["frames"] == 1500
    assert isinstance(figures["frames_per_second"], float) and figures["frames_per_second"] > 0
    assert figures["fit_error"] == "full"
    by_mode = figures["frames_per_second_by_fit_error"]
    assert set(by_mode) == {"subset", "full", "off"} and all(v > 0 for v in by_mode.values())
    assert math.isclose(figures["frames_per_second"], by_mode["full"])
    assert 0 < figures["fit_vertices"] <= figures["vertices"]
    assert figures["off_manifold_planted"] > 0
    assert 0 <= figures["off_manifold_found"] <= figures["off_manifold_planted"]


def check_stage_row(row: dict, realign: int) -> None:
    med, p99 = row["median_us"], row["p99_us"]
    assert set(med) == {"decode", "align", "infer", "filter", "publish", "total"}
    assert all(0 < med[s] <= p99[s] for s in med)
    # total runs from receipt to the send, so it covers every stage after the decode
    assert med["total"] >= max(med["align"], med["infer"], med["filter"], med["publish"])
    # the frame's thread CPU time (215c796): decode and StreamState.process, on this thread
    thread = row["thread_us"]
    assert set(thread) == {"median", "p99"}
    assert 0 < thread["median"] <= thread["p99"]
    graphs = row["graphs"]
    assert set(graphs) == {"inverse", "forward", "project", "refine"}  # a moment-form bundle
    calls = {g: d["calls_per_frame"] for g, d in graphs.items()}
    used = {g: d["thread_us_per_frame"] for g, d in graphs.items()}
    # runtime/solve/solve_core.solve_points: one projection a frame, the realignment from its
    # moments (no new projection, no forward graph on all V; fit-error telemetry is off here),
    # the inverse network once for the solve and once for each realignment pass
    assert calls["project"] == 1.0
    assert calls["forward"] == 0.0 and used["forward"] == 0.0
    assert calls["inverse"] == 1.0 + realign
    # the refinement is on: it evaluates its graph at the network's answer in each solve
    assert calls["refine"] >= 1.0 + realign
    assert all(used[g] > 0 for g in ("inverse", "project", "refine"))
    # every graph call runs inside a measured frame on this thread (one onnxruntime thread), so
    # the graphs' thread time summed over frames is at most the frames' own: their sum per frame
    # is at most the frames' mean thread time, which the p99 bounds unless 1 % of the frames
    # are outliers far beyond the rest
    assert sum(used.values()) <= thread["p99"]


def test_pipeline_stages_bench_reports_each_stage(tmp_path: Path) -> None:
    run_bench("pipeline_stages.py", "--vertices", "2000", "--frames", "200", "--train-steps",
              "40", "--cache", str(tmp_path / "cache"), "--out", str(tmp_path), timeout=400.0)
    (run,) = json.loads((tmp_path / "pipeline_stages.json").read_text())["runs"]
    assert run["vertices"] == 2000 and run["frames"] == 200
    # the headline row (trained) at the top level, the worst case (untrained) beside it
    assert run["inverse"] == "trained" and run["untrained"]["inverse"] == "untrained"
    check_stage_row(run, run["realign"])
    check_stage_row(run["untrained"], run["realign"])
    # (which row takes more refinement steps depends on the training: a 40-step network is no
    # better a start than the random one, so the test does not compare them)

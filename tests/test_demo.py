"""``rigcast demo --quick`` end to end, as a user runs it: build (cached), serve, stream, summary,
report with plots."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from rigcast.commands.demo import corrupt_schedule
from rigcast.commands.report import RunRecord, most_active
from rigcast.live.send import CORRUPTIONS, Rehearsal, plan_actions

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.mark.timeout(600)
def test_demo_quick_runs_end_to_end(tmp_path: Path) -> None:
    report = tmp_path / "report"
    proc = subprocess.run(
        [sys.executable, "-m", "rigcast", "demo", "--quick", "--cache", str(tmp_path / "cache"),
         "--report", str(report)],
        capture_output=True, text=True, timeout=540, check=False, stdin=subprocess.DEVNULL,
        cwd=tmp_path,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "Traceback" not in proc.stderr
    out = proc.stdout
    assert "summary:" in out
    assert "latency end to end: p50" in out and "p99" in out
    assert "mean fit error:" in out and "off-manifold frames:" in out
    assert "dropped:" in out
    assert "pushed off the manifold in the take; a batch solve of the same take flags" in out
    phases = [ln for ln in out.splitlines() if ln.strip().startswith("time: build")]
    assert phases and "serve and stream" in phases[0] and "report" in phases[0], out[-2000:]
    # Not a terminal: periodic plain telemetry lines instead of the live view.
    assert "[tamsin] latency p50/p99 ms" in out
    # Every corrupt frame the demo sends is rejected for its own reason: 2 of each kind.
    rejected = [ln for ln in out.splitlines() if ln.strip().startswith("rejected:")][-1]
    for reason in ("bad_vertex_count 2", "malformed 2", "non_finite 2"):
        assert reason in rejected, rejected
    assert (report / "report.md").read_text().startswith("# rigcast demo")
    for name in ("controls.png", "fit_error.png", "latency.png"):
        data = (report / name).read_bytes()
        assert data[:8] == PNG_MAGIC and len(data) > 5000, name
    # `rigcast latency-check` on the bundle the demo built (issue 15: a short run on the demo
    # bundle), checked as tests/test_latency_check.py checks its runs.
    from rigcast.runtime.bundle import load_bundle
    from test_latency_check import check_report, run_latency_check

    bundle = report / "demo-face.rcb"
    done = run_latency_check(bundle, tmp_path / "latency")
    check_report(tmp_path / "latency", done, load_bundle(bundle).vertex_count)


def test_corrupt_schedule_spreads_each_kind() -> None:
    schedule = corrupt_schedule(600, per_kind=2)
    assert len(schedule) == 6
    assert sorted(schedule.values()) == sorted(CORRUPTIONS * 2)
    assert min(schedule) >= 60 and max(schedule) <= 540


def test_plan_actions_follows_the_rates() -> None:
    rng = np.random.default_rng(0)
    actions = plan_actions(20000, Rehearsal(drop_rate=0.1, corrupt_rate=0.05), rng)
    drops = actions.count("drop") / len(actions)
    corrupt = sum(actions.count(k) for k in CORRUPTIONS) / len(actions)
    assert abs(drops - 0.1) < 0.01 and abs(corrupt - 0.05) < 0.01
    assert all(actions.count(k) > 200 for k in CORRUPTIONS)


def test_most_active_orders_by_mean_deviation() -> None:
    controls = np.zeros((10, 4))
    controls[:, 2] = 0.9
    controls[:5, 0] = 0.5
    record = RunRecord(("a", "b", "c", "d"), np.arange(10.0), controls, np.zeros(10, bool),
                       np.arange(10.0), np.zeros(10), np.zeros(10))
    assert list(most_active(record.controls, np.zeros(4), 2)) == [2, 0]

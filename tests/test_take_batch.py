"""Batches of takes (`rigcast solve BUNDLE FOLDER -o OUT`): takes found in folders, globs and
list files; the same outputs on local processes and on a dask.distributed LocalCluster; resumed
after a real Ctrl-C without redoing finished takes; a summary table as CSV and Markdown."""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import tiny_rig

from rigcast.solving.solve_take import SolveSettings
from rigcast.solving.take_batch import (
    RECORDS,
    TakeBatchError,
    find_takes,
    is_batch,
    solve_takes,
)
from rigcast.writers.animation_out import read_csv_columns

TAKES = 20


def _write_takes(folder: Path, count: int = TAKES, frames: int = 120) -> list[Path]:
    """``count`` takes of the tiny rig; every fifth one has a few frames off the rig."""
    rig = tiny_rig()
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i in range(count):
        rng = np.random.default_rng(100 + i)
        controls = np.clip(rng.normal(0.3, 0.2, (frames, len(rig.schema))), 0.0, 1.0)
        verts = rig.evaluate(controls)
        if i % 5 == 0:
            verts[60:64] += rng.normal(0, 0.05, verts[60:64].shape).astype(np.float32)
        path = folder / f"take_{i:02d}.npz"
        np.savez(path, vertices=verts, times=np.arange(frames) / 30.0)
        paths.append(path)
    return paths


def _controls(path: Path) -> np.ndarray:
    return read_csv_columns(path)[1]


def _summary(folder: Path) -> list[dict[str, str]]:
    with (folder / "summary.csv").open(newline="") as fh:
        return list(csv.DictReader(fh))


def test_find_takes_reads_folders_globs_and_list_files(tmp_path: Path) -> None:
    takes = _write_takes(tmp_path / "day1", count=3, frames=4)
    obj = tmp_path / "day1" / "objtake"
    obj.mkdir()
    (obj / "f1.obj").write_text("v 0 0 0\n")
    (tmp_path / "day1" / "notes.txt").write_text("not a take")
    assert find_takes([str(tmp_path / "day1")]) == [obj, *takes]
    assert find_takes([str(tmp_path / "day1" / "take_0*.npz")]) == takes
    listing = tmp_path / "takes.txt"
    listing.write_text("# day one\nday1/take_02.npz\n\nday1/take_00.npz  # the first\n")
    assert find_takes([str(listing)]) == [takes[2], takes[0]]
    assert is_batch([str(tmp_path / "day1")]) and is_batch([str(listing)])
    assert not is_batch([str(takes[0])]) and not is_batch([str(obj)])
    with pytest.raises(TakeBatchError, match="matches nothing"):
        find_takes([str(tmp_path / "*.glb")])


def test_two_takes_with_one_output_name_are_refused(tmp_path: Path, tiny_bundle: Path) -> None:
    a = _write_takes(tmp_path / "a", count=1, frames=4)
    b = _write_takes(tmp_path / "b", count=1, frames=4)
    with pytest.raises(TakeBatchError, match="would both write"):
        solve_takes(tiny_bundle, [*a, *b], tmp_path / "out", workers=0)


def test_twenty_takes_on_local_processes_and_on_dask_give_the_same_outputs(
        tmp_path: Path, tiny_bundle: Path) -> None:
    distributed = pytest.importorskip("distributed")
    takes = _write_takes(tmp_path / "takes")
    settings = SolveSettings(filter="causal")
    local = solve_takes(tiny_bundle, takes, tmp_path / "local", settings=settings, workers=2)
    # Threads, not processes: two worker processes each importing onnxruntime beside the
    # local pool would crowd a 2-core machine; the scheduler protocol is the same.
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  protocol="tcp://", host="127.0.0.1", dashboard_address=None,
                                  silence_logs=40) as cluster:
        seen: list[int] = []
        on_dask = solve_takes(tiny_bundle, takes, tmp_path / "dask", settings=settings,
                              scheduler=cluster.scheduler_address,
                              progress=lambda row, done, total: seen.append(done))
    assert seen == list(range(1, TAKES + 1))
    assert [r.status for r in local.rows] == ["solved"] * TAKES
    assert [r.status for r in on_dask.rows] == ["solved"] * TAKES
    for take in takes:
        a = _controls(tmp_path / "local" / f"{take.stem}.csv")
        b = _controls(tmp_path / "dask" / f"{take.stem}.csv")
        assert a.shape == (120, 8)
        np.testing.assert_array_equal(a, b)
    rows = {Path(r["take"]).stem: r for r in _summary(tmp_path / "dask")}
    assert len(rows) == TAKES
    assert rows["take_01"]["frames"] == "120" and float(rows["take_01"]["fps"]) == 30.0
    # every fifth take's spoiled frames 60-63 (after the threshold's 30-frame warm-up) are
    # flagged; the clean takes are not
    assert rows["take_05"]["flagged"] == "60-63" and rows["take_01"]["flagged"] == "none"
    assert float(rows["take_05"]["fit_rms_mean"]) > float(rows["take_01"]["fit_rms_mean"])
    md = (tmp_path / "dask" / "summary.md").read_text()
    assert "| take_05.npz | 120 | 30 |" in md and "20 of 20 takes solved" in md


def test_an_interrupted_batch_resumes_without_redoing_finished_takes(
        tmp_path: Path, tiny_bundle: Path) -> None:
    _write_takes(tmp_path / "takes", frames=3000)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "rigcast", "solve", str(tiny_bundle), str(tmp_path / "takes"),
           "-o", str(out), "--workers", "0"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while len(list((out / RECORDS).glob("*.json"))) < 3:
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "no take finished in time"
        time.sleep(0.01)
    proc.send_signal(signal.SIGINT)
    _, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130, stderr
    assert "Traceback" not in stderr
    finished = sorted(p.stem for p in (out / RECORDS).glob("*.json"))
    assert 3 <= len(finished) < TAKES, "the batch finished before the interrupt"
    # the summary of what finished is written on the way out
    assert {Path(r["take"]).stem for r in _summary(out)} == set(finished)
    assert not list(out.glob(".*.partial*")), "a half-written output was left behind"
    stamps = {name: os.stat(out / f"{name}.csv").st_mtime_ns for name in finished}

    again = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert again.returncode == 0, again.stderr
    rows = {Path(r["take"]).stem: r for r in _summary(out)}
    assert len(rows) == TAKES
    assert {n for n, r in rows.items() if r["status"] == "skipped"} == set(finished)
    assert all(os.stat(out / f"{n}.csv").st_mtime_ns == stamps[n] for n in finished)
    assert f"{TAKES} of {TAKES} takes solved" in again.stdout

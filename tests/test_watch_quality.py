"""Telemetry's ``fit_error.threshold`` and ``bundle_quality`` (issue 15 points 1 and 4): the
operator view shows the fit error against the threshold in force before any frame goes
off-manifold, and "quality poor" from the build's self-check in the bundle's manifest; a real
server process, a real sender and `rigcast watch --plain` as an operator runs it."""

from __future__ import annotations

import json
import threading
import zipfile
from pathlib import Path

import pytest
import zmq
from conftest import TINY_FIT_RMS, server_process
from rigcast.runtime.messaging import protocol
from rigcast.runtime.serve.bundle_quality import bundle_quality
from test_watch_live import _send_for, watching

pytestmark = pytest.mark.timeout(90)

REFERENCE = {"rig_mean_err": 0.004, "lsq_mean_err": 0.001, "worse_than_reference": True,
             "lost_controls": []}


def with_self_check(bundle: Path, out: Path, reference: dict) -> Path:
    """A copy of ``bundle`` whose manifest carries ``training.reference`` as a build writes it
    (export/bundling/build_finish.py), the other members byte for byte."""
    with zipfile.ZipFile(bundle) as src, zipfile.ZipFile(out, "w") as dst:
        for item in src.infolist():
            data = src.read(item.filename)
            if item.filename == "manifest.json":
                manifest = json.loads(data)
                manifest.setdefault("training", {})["reference"] = reference
                data = json.dumps(manifest).encode()
            dst.writestr(item, data)
    return out


def test_verdicts_of_the_self_check() -> None:
    def verdict(ref: dict | None, controls: int = 46) -> tuple[bool | None, str]:
        q = bundle_quality({} if ref is None else {"training": {"reference": ref}}, controls)
        return q.ok, q.reason

    assert verdict(None) == (None, "the bundle carries no build self-check")
    ok, why = verdict(REFERENCE)
    assert ok is False and "less accurate than linear least squares" in why and "0.004" in why
    assert verdict({"lost_controls": ["a", "b"]})[0] is True  # 2 of 46: a rig hides a few
    ok, why = verdict({"lost_controls": [f"c{i}" for i in range(5)]})
    assert ok is False and why == "5 of 46 controls not recoverable"


def first_telemetry(output: str, stream: str) -> dict:
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, protocol.TOPIC_TELEMETRY + stream.encode())
    sub.connect(output)
    try:
        assert sub.poll(10_000), "no telemetry"
        return protocol.decode_header(sub.recv_multipart()[1])
    finally:
        sub.close()
        ctx.term()


def test_watch_shows_quality_poor_and_the_fit_against_the_threshold(
        tmp_path: Path, tiny_bundle: Path) -> None:
    poor = with_self_check(tiny_bundle, tmp_path / "poor.rcb", REFERENCE)
    args = ["--bundle", f"tiny={poor}", "--off-manifold-threshold", "0.006"]
    with server_process(args, tmp_path) as (_, ready):
        tel = first_telemetry(ready["output"], "tiny")
        # In force from the start, before any off_manifold event carried it.
        assert (tel["fit_error"]["threshold"], tel["fit_error"]["threshold_on"]) == (0.006, "rms")
        assert tel["bundle_quality"]["ok"] is False
        with watching("--plain", "--from", ready["output"], "--to", "") as watch:
            watch.wait_for("[tiny] state:", 20)
            sender = threading.Thread(target=_send_for, args=(ready["input"], "tiny", 3.0))
            sender.start()
            watch.wait_for("[tiny] state: quality poor (solve less accurate than linear least "
                           "squares", 15)
            watch.wait_for("x thr rms", 10)  # the fit against 0.006, not a raw figure
            sender.join()


def test_adaptive_threshold_is_on_the_worst_vertex(tmp_path: Path, tiny_bundle: Path) -> None:
    with server_process(["--bundle", f"tiny={tiny_bundle}"], tmp_path) as (_, ready):
        tel = first_telemetry(ready["output"], "tiny")
        assert tel["fit_error"]["threshold_on"] == "max"
        assert tel["fit_error"]["threshold"] is None  # warming up: nothing flagged yet
        assert tel["bundle_quality"] == {"ok": None, "reason": "the bundle carries no build "
                                         "self-check", "lost_controls": 0,
                                         "worse_than_reference": False}
        _send_for(ready["input"], "tiny", 1.5)
        tel = first_telemetry(ready["output"], "tiny")
    assert tel["fit_error"]["threshold"] is not None
    assert tel["fit_error"]["threshold"] >= 3 * TINY_FIT_RMS - 1e-12  # the floor: 3 x training

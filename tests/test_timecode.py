"""SMPTE timecode (issue 15 point 6): the label arithmetic against its naive twin and against the
drop-frame rule of SMPTE ST 12-1; the header field checked by a real server, echoed in the
controls and telemetry; and `rigcast send --timecode` into `rigcast record` as a user runs them."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import TINY, peer_for, rig_mesh, running_server, server_config, server_process, tiny_rig
from rigcast.runtime.messaging import protocol
from rigcast.runtime.messaging.timecode import (
    RATES,
    Timecode,
    TimecodeError,
    frames_per_day,
    frames_to_timecode,
    frames_to_timecode_naive,
    parse_timecode,
    timecode_to_frames,
)

pytestmark = pytest.mark.timeout(120)


@pytest.mark.parametrize(("rate", "drop"), [("29.97", True), ("59.94", True), ("24", False),
                                            ("29.97", False), ("50", False)])
def test_closed_form_matches_counting_labels(rate: str, drop: bool) -> None:
    # every frame of the first 12 minutes, and a stretch around an hour
    for n in [*range(0, 12 * 60 * 60 + 7, 7), *range(215_000, 216_500)]:
        tc = frames_to_timecode(n, rate, drop)
        assert timecode_to_frames(tc) == n
    for n in (0, 1799, 1800, 1801, 17_981, 17_982, 107_892, 107_893):
        assert frames_to_timecode(n, rate, drop) == frames_to_timecode_naive(n, rate, drop)


def test_drop_frame_follows_smpte_st_12_1() -> None:
    # SMPTE ST 12-1: at 29.97 drop-frame, labels ;00 and ;01 are skipped at each minute but
    # every tenth, so a minute holds 1798 frames, ten minutes 17,982 and a day 2,589,408.
    assert str(frames_to_timecode(1799, "29.97", True)) == "00:00:59;29"
    assert str(frames_to_timecode(1800, "29.97", True)) == "00:01:00;02"
    assert str(frames_to_timecode(17_982, "29.97", True)) == "00:10:00;00"
    assert frames_per_day("29.97", True) == 2_589_408
    assert str(frames_to_timecode(3600, "59.94", True)) == "00:01:00;04"
    assert frames_to_timecode(frames_per_day("24", False), "24") == Timecode(0, 0, 0, 0, "24")
    # a drop-frame hour is within 3.6 ms of a clock hour (108 frames of 1001/30000 s short)
    hour = timecode_to_frames(parse_timecode("01:00:00;00", "29.97"))
    assert abs(hour / float(RATES["29.97"]) - 3600.0) < 0.004


@pytest.mark.parametrize(("text", "rate", "words"), [
    ("25:00:00:00", "24", "hours must be 0-23"),
    ("00:00:60:00", "24", "seconds must be 0-59"),
    ("00:00:00:24", "24", "frames must be 0-23"),
    ("00:00:00;00", "25", "drop-frame (';') exists only at 29.97 and 59.94"),
    ("00:01:00;01", "29.97", "does not exist in drop-frame"),
    ("1:00:00:00", "24", "is not HH:MM:SS:FF"),
    ("01:00:00:00", "29", "tc_rate '29' is not a timecode rate"),
    (7, "24", "is not HH:MM:SS:FF"),
])
def test_bad_timecodes_are_named(text: object, rate: str, words: str) -> None:
    with pytest.raises(TimecodeError, match=words.replace("(", r"\(").replace(")", r"\)")):
        parse_timecode(text, rate)


def test_server_echoes_the_timecode_and_refuses_a_bad_one(tiny_bundle: Path) -> None:
    rig = tiny_rig(TINY)
    mesh = rig_mesh(rig, np.full(TINY["controls"], 0.4))
    start = parse_timecode("10:00:00:00", "25")
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        got: list[protocol.ControlsMessage] = []
        tel = None
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline and (len(got) < 3 or tel is None):
            if len(got) < 3 and not any(m.frame == len(got) for m in got):
                i = len(got)  # one at a time: a frame waiting with a newer one would be dropped
                peer.dealer.send_multipart(protocol.encode_mesh(
                    "a", i, t0 + i * 40_000_000, mesh, timecode=start.advanced(i)))
            frames = peer.recv_pub(0.2)
            if frames and frames[0] == b"ctl.a":
                got.append(protocol.decode_controls(frames))
            elif frames and frames[0] == b"tel.a" and len(got) == 3:
                tel = protocol.decode_header(frames[1])
        assert [(m.timecode, m.tc_rate) for m in got] == [
            ("10:00:00:00", "25"), ("10:00:00:01", "25"), ("10:00:00:02", "25")]
        assert tel is not None and (tel["timecode"], tel["tc_rate"]) == ("10:00:00:02", "25")
        # A bad timecode: a clear error to the sender, and the stream goes on.
        header = protocol.pack({"v": 1, "type": "mesh", "stream": "a", "frame": 3,
                                "t_send_ns": t0 + 200_000_000, "vertices": TINY["vertices"],
                                "timecode": "10:00:00:25", "tc_rate": "25"})
        peer.dealer.send_multipart([header, mesh.tobytes()])
        reply = protocol.decode_reply(peer.recv_reply(3.0) or b"")
        assert reply["reason"] == "malformed"
        assert "frame 3: timecode '10:00:00:25' at 25 fps: frames must be 0-24" in reply["message"]
        peer.dealer.send_multipart(protocol.encode_mesh("a", 4, t0 + 240_000_000, mesh))
        plain = None
        while plain is None and time.monotonic() < deadline + 5:
            frames = peer.recv_pub(0.2)
            if frames and frames[0] == b"ctl.a":
                plain = protocol.decode_controls(frames)
        assert plain is not None and (plain.frame, plain.timecode, plain.tc_rate) == (4, None, None)


def test_send_stamps_and_record_keeps_the_timecode(tiny_bundle: Path, tmp_path: Path) -> None:
    rig = tiny_rig(TINY)
    take = tmp_path / "take.npy"
    rng = np.random.default_rng(5)
    np.save(take, np.stack([rig_mesh(rig, rng.uniform(0, 1, TINY["controls"]))
                            for _ in range(30)]))
    out = tmp_path / "rec.npz"
    with server_process(["--bundle", f"tiny={tiny_bundle}"], tmp_path) as (_, ready):
        rec = subprocess.Popen([sys.executable, "-m", "rigcast", "record", "-o", str(out),
                                "--from", ready["output"], "--to", ready["input"], "--duration",
                                "6"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                               stdin=subprocess.DEVNULL)
        assert rec.stderr is not None
        rec.stderr.readline()  # subscribed
        # 90 frames from 00:00:59;20 at 29.97 drop-frame: through the minute's skipped labels
        sent = subprocess.run([sys.executable, "-m", "rigcast", "send", str(take), "--to",
                               ready["input"], "--stream", "tiny", "--fps", "60", "--loop",
                               "--frames", "90", "--timecode", "00:00:59;20", "--tc-rate",
                               "29.97"], capture_output=True, text=True, timeout=60)
        assert sent.returncode == 0, sent.stderr
        _, err = rec.communicate(timeout=60)
    assert rec.returncode == 0, err
    start = timecode_to_frames(parse_timecode("00:00:59;20", "29.97"))
    with np.load(out) as z:
        frames = z["tiny/frame"]
        assert frames.shape[0] > 30
        expected = [str(frames_to_timecode(start + int(f), "29.97", True)) for f in frames]
        assert z["tiny/timecode"].tolist() == expected
        assert set(z["tiny/tc_rate"].tolist()) == {"29.97"}
    assert "00:01:00;02" in expected or frames.max() < 10  # the labels ;00 and ;01 were skipped
    assert "00:01:00;00" not in expected


def test_send_refuses_a_bad_timecode_in_one_line(tmp_path: Path) -> None:
    take = tmp_path / "take.npy"
    np.save(take, np.zeros((2, 5, 3), np.float32))
    done = subprocess.run([sys.executable, "-m", "rigcast", "send", str(take), "--to",
                           "tcp://127.0.0.1:9", "--stream", "x", "--fps", "24", "--timecode",
                           "00:00:00:30"], capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert done.stderr.startswith("rigcast: error: ") and "frames must be 0-23" in done.stderr
    assert "Traceback" not in done.stderr

"""Fuzz a LIVE server with random and mutated messages (hypothesis).

Every bad message must get exactly one error reply and be counted; valid frames interleaved with
them must still come back with the right controls; the server must stay up throughout.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import onnxruntime as ort
import pytest
from conftest import TINY, peer_for, rig_mesh, running_server, server_config, tiny_rig
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.messaging import protocol

V = TINY["vertices"]
WRONG_TYPE = st.one_of(st.text(max_size=5), st.floats(allow_nan=False), st.none(),
                       st.lists(st.integers(), max_size=3), st.booleans(), st.binary(max_size=4))
KEYS = ("v", "type", "stream", "frame", "t_send_ns", "vertices")


def header(**changes: Any) -> dict[str, Any]:
    h: dict[str, Any] = {"v": 1, "type": "mesh", "stream": "a", "frame": 1, "t_send_ns": 1,
                         "vertices": V}
    h.update(changes)
    return h


@st.composite
def bad_message(draw: st.DrawFn) -> list[bytes]:
    payload = tiny_rig(TINY).neutral.tobytes()
    kind = draw(st.sampled_from(["random", "wrong_type", "missing", "version", "stream",
                                 "count", "size", "nan", "garbage_tail"]))
    if kind == "random":
        frames = draw(st.lists(st.binary(max_size=64), min_size=1, max_size=3))
        return frames
    if kind == "wrong_type":
        return [msgpack.packb(header(**{draw(st.sampled_from(KEYS)): draw(WRONG_TYPE)})), payload]
    if kind == "missing":
        h = header()
        del h[draw(st.sampled_from(KEYS))]
        return [msgpack.packb(h), payload]
    if kind == "version":
        v = draw(st.integers(-(2**31), 2**31).filter(lambda x: x != 1))
        return [msgpack.packb(header(v=v)), payload]
    if kind == "stream":
        name = draw(st.text(min_size=1, max_size=8).filter(lambda s: s != "a"))
        return [msgpack.packb(header(stream=name)), payload]
    if kind == "count":
        n = draw(st.integers(0, 2**40).filter(lambda x: x != V))
        return [msgpack.packb(header(vertices=n)), payload]
    if kind == "size":
        cut = draw(st.integers(1, len(payload)))
        extra = draw(st.binary(min_size=0, max_size=24))
        body = payload[:-cut] + extra
        if len(body) == len(payload):
            body += b"\0"
        return [msgpack.packb(header()), body]
    if kind == "nan":
        mesh = tiny_rig(TINY).neutral.copy().reshape(-1)
        where = draw(st.lists(st.integers(0, mesh.size - 1), min_size=1, max_size=5))
        mesh[where] = draw(st.sampled_from([np.nan, np.inf, -np.inf]))
        return [msgpack.packb(header()), mesh.tobytes()]
    packed = msgpack.packb(header())
    return [packed[: draw(st.integers(0, len(packed) - 1))], payload]


BAD = st.tuples(st.just("bad"), bad_message())
MESSAGE = st.one_of(  # two bad messages for each good one
    BAD,
    BAD,
    st.tuples(st.just("good"), st.lists(st.floats(0, 1), min_size=TINY["controls"],
                                        max_size=TINY["controls"])),
)


@pytest.mark.timeout(120)
def test_live_server_survives_fuzzing_and_counts_every_bad_frame(tiny_bundle: Path) -> None:
    rig = tiny_rig(TINY)
    bundle = load_bundle(tiny_bundle)
    inverse = ort.InferenceSession(bundle.inverse_onnx, providers=["CPUExecutionProvider"])
    config = server_config({"a": tiny_bundle},
                           stream_overrides={"passthrough": True, "stabilise": False})
    counts = {"bad": 0, "good": 0}
    with running_server(config) as server, peer_for(server) as peer:

        @settings(max_examples=60, deadline=None,
                  suppress_health_check=[HealthCheck.function_scoped_fixture,
                                         HealthCheck.too_slow])
        @given(st.lists(MESSAGE, min_size=1, max_size=4))
        def run(messages: list[tuple[str, Any]]) -> None:
            for kind, body in messages:
                if kind == "bad":
                    peer.dealer.send_multipart(body)
                    counts["bad"] += 1
                    raw = peer.recv_reply(3.0)
                    assert raw is not None, f"no error reply for {body!r:.200}"
                    assert protocol.decode_reply(raw)["type"] == "error"
                    continue
                counts["good"] += 1
                frame = counts["good"]
                mesh = rig_mesh(rig, np.array(body))
                peer.dealer.send_multipart(protocol.encode_mesh("a", frame, time.time_ns(), mesh))
                deadline = time.monotonic() + 3
                got = None
                while got is None and time.monotonic() < deadline:
                    frames = peer.recv_pub(0.2)
                    if frames and frames[0] == b"ctl.a":
                        got = protocol.decode_controls(frames)
                assert got is not None and got.frame == frame
                subset = np.ascontiguousarray(mesh[bundle.input_indices])[None]
                want = np.clip(inverse.run(None, {"mesh": subset})[0][0], 0.0, 1.0)
                np.testing.assert_allclose(got.values, want, atol=1e-6)

        run()
        assert peer.recv_reply(0.1) is None, "an unexpected extra reply"
        state = server.streams["a"].telemetry
        assert server.rejected.total() == counts["bad"]
        assert "processing_error" not in server.rejected
        assert state.processed == counts["good"]
        assert state.dropped == 0 and state.stale == 0
    assert counts["bad"] > 0 and counts["good"] > 0

"""The Python client against a real ROUTER/PUB pair bound on 127.0.0.1 random ports."""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import pytest
import zmq
from rigcast.runtime.messaging import protocol as P
from rigcast.runtime.messaging.client import ControlsSubscriber, MeshSender, ServerError
from rigcast.runtime.schema import Control, ControlSchema

pytestmark = pytest.mark.timeout(20)

SCHEMA = ControlSchema((Control("jaw_open", 0.0, 1.0, 0.0, group="jaw"),
                        Control("smile", 0.0, 1.0, 0.0, group="mouth")))


@dataclass
class Peer:
    ctx: zmq.Context
    router: zmq.Socket
    pub: zmq.Socket
    input: str
    output: str

    def recv(self, timeout_ms: int = 5000) -> list[bytes]:
        assert self.router.poll(timeout_ms), "the server side received nothing"
        return self.router.recv_multipart()


@pytest.fixture
def peer() -> Iterator[Peer]:
    ctx = zmq.Context()
    router = ctx.socket(zmq.ROUTER)
    pub = ctx.socket(zmq.PUB)
    for s in (router, pub):
        s.setsockopt(zmq.LINGER, 0)
        s.setsockopt(zmq.SNDHWM, 1000)
    in_port = router.bind_to_random_port("tcp://127.0.0.1")
    out_port = pub.bind_to_random_port("tcp://127.0.0.1")
    try:
        yield Peer(ctx, router, pub, f"tcp://127.0.0.1:{in_port}", f"tcp://127.0.0.1:{out_port}")
    finally:
        router.close(linger=0)
        pub.close(linger=0)
        ctx.term()


def _until_subscribed(peer: Peer, sub: ControlsSubscriber, frames: list[bytes]) -> object:
    """Publish until the subscriber sees a message (the subscription handshake), bounded."""
    for _ in range(200):
        peer.pub.send_multipart(frames)
        got = sub.recv(timeout_ms=25)
        if got is not None:
            return got
    raise AssertionError("subscription never became active")


def test_send_is_decoded_by_the_server_side(peer: Peer) -> None:
    verts = np.arange(12, dtype=np.float32).reshape(4, 3)
    with MeshSender(peer.input, context=peer.ctx) as sender:
        assert sender.send("tamsin", 5, verts, t_send_ns=123)
        identity, *frames = peer.recv()
    header, payload = P.decode_request(frames)
    mesh = P.decode_mesh(header, payload, expected_vertices=4, max_bytes=1 << 20)
    assert (mesh.stream, mesh.frame, mesh.t_send_ns) == ("tamsin", 5, 123)
    np.testing.assert_array_equal(mesh.vertices, verts)
    assert identity


def test_request_schema_and_errors(peer: Peer) -> None:
    with MeshSender(peer.input, context=peer.ctx) as sender:
        sender.send("tamsin", 1, np.zeros((3, 3), np.float32))
        identity, *_ = peer.recv()
        # The server side rejects the mesh, then a schema request gets its reply: the client
        # must return the reply and keep the earlier error for poll_errors.
        peer.router.send_multipart([identity, P.encode_error("bad_vertex_count", "need 4",
                                                             "tamsin", 1)])
        t0 = time.monotonic()
        def serve() -> None:
            ident, body = peer.recv()
            req = P.decode_header(body)
            version = P.negotiate_version(req["versions"])
            peer.router.send_multipart([ident, P.encode_schema_reply(
                req["stream"], SCHEMA, bundle="t.rcb", bundle_version=1, fingerprint="f",
                vertices=4, version=version)])

        thread = threading.Thread(target=serve)
        thread.start()
        reply = sender.request_schema("tamsin", timeout_s=5.0)
        thread.join(5)
        assert time.monotonic() - t0 < 5
        assert P.schema_from_reply(reply) == SCHEMA and reply["vertices"] == 4
        errors = sender.poll_errors()
        assert [e["reason"] for e in errors] == ["bad_vertex_count"]
        assert sender.poll_errors() == []


def test_refused_request_raises_and_silence_times_out(peer: Peer) -> None:
    with MeshSender(peer.input, context=peer.ctx) as sender:
        def refuse() -> None:
            ident, _ = peer.recv()
            peer.router.send_multipart([ident, P.encode_error("unknown_stream", "no ghost",
                                                              "ghost")])

        thread = threading.Thread(target=refuse)
        thread.start()
        with pytest.raises(ServerError, match="unknown_stream") as info:
            sender.request_reload("ghost", "/nowhere.rcb", timeout_s=5.0)
        thread.join(5)
        assert info.value.reason == "unknown_stream"
        with pytest.raises(TimeoutError, match="schema_reply"):
            sender.request_schema("tamsin", timeout_s=0.2)


def test_subscriber_matches_topics_exactly(peer: Peer) -> None:
    with ControlsSubscriber("tamsin", peer.output, context=peer.ctx, telemetry=True,
                            events=True) as sub:
        first = _until_subscribed(peer, sub, P.encode_telemetry("tamsin", {"input_fps": 120.0}))
        assert isinstance(first, dict) and first["input_fps"] == 120.0
        values = np.array([0.25, 1.0], np.float32)
        # A stream whose id extends ours shares the prefix; it must be skipped.
        peer.pub.send_multipart(P.encode_controls("tamsin2", 1, 0, 0, 0, values, 0))
        peer.pub.send_multipart(P.encode_controls("tamsin", 9, 10, 20, 30, values,
                                                  P.FLAG_STALE))
        peer.pub.send_multipart(P.encode_event("reload", "tamsin", {"ok": True}))
        got = [sub.recv(timeout_ms=2000) for _ in range(2)]
        # Drain any extra handshake telemetry.
        got = [g for g in got if not (isinstance(g, dict) and g["type"] == "telemetry")]
        while len(got) < 2:
            g = sub.recv(timeout_ms=2000)
            assert g is not None
            if not (isinstance(g, dict) and g["type"] == "telemetry"):
                got.append(g)
        ctl, evt = got
        assert isinstance(ctl, P.ControlsMessage)
        assert (ctl.stream, ctl.frame, ctl.t_pub_ns, ctl.flags) == ("tamsin", 9, 30, 8)
        np.testing.assert_array_equal(ctl.values, values)
        assert isinstance(evt, dict) and evt["kind"] == "reload" and evt["ok"] is True
        assert sub.recv(timeout_ms=100) is None


def test_send_drops_instead_of_blocking_when_nobody_listens() -> None:
    ctx = zmq.Context()
    try:
        # Nothing is bound here: the DEALER queues up to SNDHWM then drops without blocking.
        with MeshSender("tcp://127.0.0.1:1", context=ctx, sndhwm=2) as sender:
            sent = [sender.send("s", i, np.zeros((2, 3), np.float32)) for i in range(50)]
        assert not all(sent) and sender.dropped == sent.count(False) > 0
    finally:
        ctx.term()

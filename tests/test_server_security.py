"""Issue 13 acceptance: the live server on a shared stage network. One test (or a few) per finding
1-9, each over real sockets on 127.0.0.1; each docstring says what the old server did."""

from __future__ import annotations

import contextlib
import io
import json
import resource
import socket
import subprocess
import sys
import time
import zipfile
from collections.abc import Iterator
from pathlib import Path

import msgpack
import numpy as np
import onnx
import pytest
import zmq
from conftest import TINY, Peer, peer_for, rig_mesh, running_server, server_config, tiny_rig
from rich.console import Console
from rigcast.runtime.messaging import protocol
from rigcast.runtime.messaging.client import ControlsSubscriber, MeshSender
from rigcast.runtime.serve.config import ConfigError, load_config
from rigcast.runtime.trust.keys import ClientCurve, create_key_pair

from rigcast.live.watch import WatchState, render_view

pytestmark = pytest.mark.timeout(90)

STEP_NS = 8_333_333


@pytest.fixture(scope="module")
def keys(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("keys")
    _, server_secret = create_key_pair(root, "server")
    _, actor_secret = create_key_pair(root / "clients", "actor")
    _, stranger_secret = create_key_pair(root / "strangers", "stranger")
    return {"server": root / "server.key", "server_secret": server_secret,
            "clients": root / "clients", "actor": actor_secret, "stranger": stranger_secret}


def _curve(keys: dict[str, Path], who: str) -> ClientCurve:
    return ClientCurve.from_files(keys["server"], keys[who])


def _reply(sock: zmq.Socket, timeout_s: float = 2.0) -> dict | None:
    if not sock.poll(int(timeout_s * 1000)):
        return None
    return protocol.decode_header(sock.recv_multipart()[0], max_header_bytes=1 << 20)


def _dealer(ctx: zmq.Context, endpoint: str, curve: ClientCurve | None = None) -> zmq.Socket:
    sock = ctx.socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    if curve is not None:
        curve.apply(sock)
    sock.connect(endpoint)
    return sock


def _controls(sub: zmq.Socket, stream: str, timeout_s: float) -> list[protocol.ControlsMessage]:
    out, end = [], time.monotonic() + timeout_s
    topic = protocol.TOPIC_CONTROLS + stream.encode()
    while (left := end - time.monotonic()) > 0:
        if sub.poll(int(left * 1000) + 1):
            frames = sub.recv_multipart()
            if frames[0] == topic:
                out.append(protocol.decode_controls(frames))
    return out


def _frames_until(sub: zmq.Socket, stream: str, frame: int, timeout_s: float) -> list[int]:
    """The frame numbers published on ``stream`` up to and including ``frame`` (or until the
    timeout): a loaded machine may publish late, never out of order."""
    out: list[int] = []
    end = time.monotonic() + timeout_s
    while frame not in out and (left := end - time.monotonic()) > 0:
        out += [m.frame for m in _controls(sub, stream, min(left, 0.1))]
    return out


# --- finding 1: authentication (CurveZMQ RFC 26, ZAP RFC 27) -----------------------------------

def test_curve_server_serves_authorised_keys_only(tiny_bundle: Path, keys: dict[str, Path]) -> None:
    """CurveZMQ (RFC 26) on both sockets, client keys checked by pyzmq's ZAP handler (RFC 27).
    Old server: any process that reached the ports could send frames, subscribe and reload."""
    config = server_config({"a": tiny_bundle}, curve_secret_key=keys["server_secret"],
                           authorized_keys=keys["clients"])
    mesh = tiny_rig(TINY).neutral
    ctx = zmq.Context()
    with running_server(config) as server, contextlib.ExitStack() as stack:
        actor = MeshSender(server.input_endpoint, context=ctx, curve=_curve(keys, "actor"))
        stack.callback(actor.close)
        sub = ControlsSubscriber("a", server.output_endpoint, telemetry=True, context=ctx,
                                 curve=_curve(keys, "actor"))
        stack.callback(sub.close)
        assert actor.request_schema("a")["vertices"] == TINY["vertices"]
        # Strangers: a known server key but an unknown client key, and no CURVE at all.
        stranger = _dealer(ctx, server.input_endpoint, _curve(keys, "stranger"))
        plain = _dealer(ctx, server.input_endpoint)
        eavesdropper = ctx.socket(zmq.SUB)
        eavesdropper.setsockopt(zmq.LINGER, 0)
        _curve(keys, "stranger").apply(eavesdropper)
        eavesdropper.setsockopt(zmq.SUBSCRIBE, b"")
        eavesdropper.connect(server.output_endpoint)
        for sock in (stranger, plain, eavesdropper):
            stack.callback(sock.close, 0)
        t0 = time.time_ns()
        for i in range(5):
            for sock in (stranger, plain):
                # zmq.Again once the refused handshake has closed the socket's only pipe (soon
                # on a loaded machine): the try is dropped on this side, as the server drops it.
                with contextlib.suppress(zmq.Again):
                    sock.send(protocol.encode_schema_request("a"), zmq.NOBLOCK)
                    sock.send_multipart(protocol.encode_mesh("a", 100 + i, t0 + i, mesh),
                                        zmq.NOBLOCK)
        # The subscriber's CURVE handshake may end after the actor's: wait for its first message
        # (telemetry), so frame 1 is not published before the subscription is live.
        assert sub.recv(10_000) is not None, "the authorised subscriber received nothing"
        actor.send("a", 1, mesh)
        got = []
        end = time.monotonic() + 10
        while not got and (msg := sub.recv(int((end - time.monotonic()) * 1000))) is not None:
            if isinstance(msg, protocol.ControlsMessage):
                got.append(msg.frame)
        assert got == [1], "the authorised sender's frame was not served"
        assert _reply(stranger, 1.0) is None and _reply(plain, 0.1) is None
        assert not eavesdropper.poll(500), "an unknown key received published messages"
        assert not [m for m in _controls(sub.socket, "a", 0.3) if m.frame >= 100]
        assert server.security is not None and server.security.auth.refused == 0
    ctx.term()


def test_non_loopback_without_curve_needs_the_loud_flag(tiny_bundle: Path,
                                                        keys: dict[str, Path]) -> None:
    """Old server: a non-loopback bind with --allow-remote only logged a caution."""
    streams = {"streams": {"a": {"bundle": str(tiny_bundle)}}}
    remote = {**streams, "input": "tcp://0.0.0.0:*", "allow_remote": True}
    with pytest.raises(ConfigError, match="insecure-no-auth"):
        load_config(None, remote)
    assert load_config(None, {**remote, "insecure_no_auth": True}).insecure_no_auth
    with_keys = load_config(None, {**remote, "curve_secret_key": str(keys["server_secret"]),
                                   "authorized_keys": str(keys["clients"])})
    assert with_keys.curve_secret_key == keys["server_secret"]


# --- finding 2: reloads -------------------------------------------------------------------------

def _rebundle(src: Path, dst: Path, change: dict[str, bytes]) -> Path:
    """A copy of a bundle with members replaced and the manifest's checksums updated."""
    import hashlib

    with zipfile.ZipFile(src) as zf:
        blobs = {n: zf.read(n) for n in zf.namelist()}
    blobs.update(change)
    manifest = json.loads(blobs["manifest.json"])
    for name in manifest["members"]:
        manifest["members"][name] = hashlib.sha256(blobs[name]).hexdigest()
    blobs["manifest.json"] = json.dumps(manifest).encode()
    with zipfile.ZipFile(dst, "w") as zf:
        for name, data in blobs.items():
            zf.writestr(name, data)
    return dst


def _reload(peer: Peer, path: str | Path) -> dict:
    peer.dealer.send(protocol.encode_reload_request("a", str(path)))
    raw = peer.recv_reply(30.0)
    assert raw is not None, "no reload reply"
    return protocol.decode_reply(raw)


def test_reload_reads_only_allowed_folders_and_says_the_same_for_every_refused_path(
        tiny_bundle: Path, tmp_path: Path) -> None:
    """Old server: any readable path loaded, and the replies told "does not exist" from "not a
    file" from "not a ZIP", with the server's absolute paths, to the asker and every subscriber."""
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "notes.txt").write_text("private")
    config = server_config({"a": tiny_bundle}, reload_min_interval_s=0.0)
    with running_server(config) as server, peer_for(server) as peer:
        messages = set()
        for path in (outside / "notes.txt", outside, outside / "missing.rcb", "/etc/hostname",
                     "../" * 12 + "etc/hostname"):
            reply = _reload(peer, path)
            assert reply["ok"] is False
            assert str(tmp_path) not in reply["message"] and "/" not in reply["message"], reply
            messages.add(reply["message"].split("'")[0])
        assert len(messages) == 1, messages  # one wording: nothing to tell files apart
        same = _reload(peer, tiny_bundle.name)  # by name, inside the bundle's folder: allowed
        assert same["ok"] is True and same["bundle"] == tiny_bundle.name
        assert server.streams["a"].model.label == tiny_bundle.name


def test_reload_refuses_onnx_external_data_before_a_session_reads_it(
        tiny_bundle: Path, tmp_path: Path) -> None:
    """Old server: onnxruntime followed a relative external-data path and the bytes of a file
    in the server's working folder came back as published controls. Checked from onnx.proto's
    TensorProto.data_location / external_data (the ONNX IR)."""
    with zipfile.ZipFile(tiny_bundle) as zf:
        model = onnx.load_from_string(zf.read("inverse.onnx"))
    init = model.graph.initializer[0]
    init.ClearField("raw_data")
    del init.float_data[:]
    init.data_location = onnx.TensorProto.EXTERNAL
    entry = init.external_data.add()
    entry.key, entry.value = "location", "secret.bin"
    _rebundle(tiny_bundle, tmp_path / "crafted.rcb",
                        {"inverse.onnx": model.SerializeToString()})
    (tmp_path / "secret.bin").write_bytes(np.arange(4096, dtype=np.float32).tobytes())
    config = server_config({"a": tiny_bundle}, reload_dirs=str(tmp_path))
    with running_server(config) as server, peer_for(server) as peer:
        reply = _reload(peer, "crafted.rcb")
        assert reply["ok"] is False and "external data" in reply["message"], reply
        assert server.streams["a"].model.label == tiny_bundle.name


def test_a_served_bundle_with_external_data_is_refused_at_startup(
        tiny_bundle: Path, tmp_path: Path) -> None:
    """The same check guards the bundles a server starts with. Old server: it loaded them."""
    from rigcast.runtime.bundle import BundleError
    from rigcast.runtime.serve.server import Server

    with zipfile.ZipFile(tiny_bundle) as zf:
        model = onnx.load_from_string(zf.read("forward.onnx"))
    init = model.graph.initializer[0]
    init.ClearField("raw_data")
    init.data_location = onnx.TensorProto.EXTERNAL
    init.external_data.add().key = "location"
    crafted = _rebundle(tiny_bundle, tmp_path / "served.rcb",
                        {"forward.onnx": model.SerializeToString()})
    ctx = zmq.Context()
    with pytest.raises(BundleError, match="external data"):
        Server(server_config({"a": crafted}), ctx=ctx).startup()
    ctx.term()


def _peak_rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    raise AssertionError("no VmHWM")  # Linux /proc/PID/status, proc(5)


@contextlib.contextmanager
def serve_process(args: list[str], tmp_path: Path, nofile: int | None = None
                  ) -> Iterator[tuple[subprocess.Popen[str], dict]]:
    """The bare server entry in a subprocess (optionally with a low file limit)."""
    ready = tmp_path / f"ready-{time.monotonic_ns()}.json"
    cmd = [sys.executable, "-m", "rigcast.runtime.serve.serve_main", "--input", "tcp://127.0.0.1:*",
           "--output", "tcp://127.0.0.1:*", "--ready-file", str(ready), *args]

    def limit() -> None:
        if nofile is not None:
            resource.setrlimit(resource.RLIMIT_NOFILE, (nofile, nofile))

    log = (tmp_path / f"server-{time.monotonic_ns()}.log").open("w")
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=log, text=True,
                            preexec_fn=limit)
    try:
        end = time.monotonic() + 30
        while not ready.exists():
            assert proc.poll() is None, Path(log.name).read_text()
            assert time.monotonic() < end, "server did not start"
            time.sleep(0.05)
        yield proc, json.loads(ready.read_text())
    finally:
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()


def test_a_zip_bomb_is_refused_from_its_directory_while_frames_flow(
        tiny_bundle: Path, tmp_path: Path) -> None:
    """Old server: a 1 MB ZIP bomb took it from 71 to 2,120 MiB, was refused after 6.4 s, and
    377 of 783 frames of a live stream were not published meanwhile."""
    bomb = tmp_path / "bomb.rcb"
    with zipfile.ZipFile(tiny_bundle) as src, zipfile.ZipFile(
            bomb, "w", zipfile.ZIP_DEFLATED, compresslevel=1) as zf:
        for name in src.namelist():
            if name != "arrays.npz":
                zf.writestr(name, src.read(name))
        with zf.open("arrays.npz", "w", force_zip64=True) as out:
            chunk = bytes(1 << 20)
            for _ in range(1024):  # 1 GiB of zeros, about 1 MB on disk
                out.write(chunk)
    assert bomb.stat().st_size < 8 << 20
    with serve_process(["--bundle", f"a={tiny_bundle}", "--reload-dirs", str(tmp_path)],
                       tmp_path) as (proc, ready):
        peer = Peer(ready["input"], ready["output"])
        try:
            peer.handshake()
            before = _peak_rss_mb(proc.pid)
            t0 = time.monotonic()
            reply = _reload(peer, "bomb.rcb")
            took = time.monotonic() - t0
            assert reply["ok"] is False and "over the limit" in reply["message"], reply
            assert took < 2.0, f"refused after {took:.1f} s"
            assert _peak_rss_mb(proc.pid) - before < 32
            mesh = tiny_rig(TINY).neutral
            peer.dealer.send_multipart(protocol.encode_mesh("a", 1, time.time_ns(), mesh))
            assert _frames_until(peer.sub, "a", 1, 10.0) == [1]
        finally:
            peer.close()


def test_reloads_are_rate_limited_per_stream_and_a_same_bundle_keeps_the_detector(
        tiny_bundle: Path) -> None:
    """Old server: 2,366 reloads in 20 s raised its CPU five-fold and reset the off-manifold
    detector each time."""
    config = server_config({"a": tiny_bundle}, reload_min_interval_s=30.0)
    with running_server(config) as server, peer_for(server) as peer:
        tracker = server.streams["a"].manifold
        first = _reload(peer, tiny_bundle.name)
        second = _reload(peer, tiny_bundle.name)
        assert first["ok"] is True and "already serves" in first["message"]
        assert second["ok"] is False and "try again" in second["message"], second
        assert server.streams["a"].manifold is tracker, "the detector was reset"


# --- finding 3: timestamps ----------------------------------------------------------------------

def test_a_far_timestamp_is_refused_with_a_reason_and_the_stream_goes_on(
        tiny_bundle: Path) -> None:
    """Old server: one frame stamped t_send_ns = 2^63 - 1 made every later frame "stale"
    (0 of 241 published, no reply); so did a sender restarting with a lower monotonic clock."""
    mesh = tiny_rig(TINY).neutral
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        peer.dealer.send_multipart(protocol.encode_mesh("a", 0, t0, mesh, session=1))
        assert _frames_until(peer.sub, "a", 0, 10.0) == [0]
        peer.dealer.send_multipart(protocol.encode_mesh("a", 1, 2**63 - 1, mesh, session=1))
        err = _reply(peer.dealer)
        assert err is not None and err["reason"] == "bad_timestamp" and err["frame"] == 1
        for i in range(2, 6):
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, time.time_ns(), mesh,
                                                            session=1))
            assert _frames_until(peer.sub, "a", i, 10.0) == [i]
        # A restarted sender with a monotonic clock that starts lower: refused by name ...
        peer.dealer.send_multipart(protocol.encode_mesh("a", 0, 1_000, mesh, session=1))
        err = _reply(peer.dealer)
        assert err is not None and err["reason"] == "bad_timestamp" and "session" in err["message"]
        # ... and served once it announces its new session (the restart rule).
        for i in range(3):
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, 1_000 + i * STEP_NS, mesh,
                                                            session=2))
            assert _frames_until(peer.sub, "a", i, 10.0) == [i]


# --- finding 4: memory per message --------------------------------------------------------------

def test_one_peer_cannot_make_the_server_hold_a_huge_multipart_message(
        tiny_bundle: Path, tmp_path: Path) -> None:
    """Old server: the cap applied per ZeroMQ frame (4 x the payload cap): one 12 x 50 MiB
    message took it to 619 MiB before it was refused, and 300,000 empty parts stalled it for
    2 s. Here 12 x 20 MiB parts: each part is over ZMQ_MAXMSGSIZE (16 MiB + 64 KiB), which
    the old 64 MiB per-frame cap let through."""
    mesh = tiny_rig(TINY).neutral
    with serve_process(["--bundle", f"a={tiny_bundle}"], tmp_path) as (proc, ready):
        peer = Peer(ready["input"], ready["output"])
        stack = contextlib.ExitStack()
        try:
            peer.handshake()
            before = _peak_rss_mb(proc.pid)
            attacker = _dealer(peer.ctx, ready["input"])
            stack.callback(attacker.close, 0)
            attacker.setsockopt(zmq.SNDHWM, 100)
            part = bytes(20 << 20)
            attacker.send_multipart([protocol.encode_schema_request("a")] + [part] * 12)
            attacker.send_multipart([protocol.encode_schema_request("a")] + [b""] * 300_000)
            peer.dealer.send_multipart([protocol.encode_schema_request("a"), b"", b""])
            err = _reply(peer.dealer, 10.0)
            assert err is not None and err["reason"] == "malformed" and "got 3" in err["message"]
            t0 = time.time_ns()
            for i in range(3):
                peer.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i * STEP_NS, mesh))
                assert _frames_until(peer.sub, "a", i, 10.0) == [i]
            grew = _peak_rss_mb(proc.pid) - before
            assert grew < 64, f"peak RSS grew {grew:.0f} MB"
        finally:
            stack.close()
            peer.close()


# --- finding 5: nesting -------------------------------------------------------------------------

def test_a_deeply_nested_header_gets_a_malformed_reply(tiny_bundle: Path) -> None:
    """Old server: a header nested ~1,000 deep was accepted by the decoder, then building the
    error reply hit Python's recursion limit: no reply, processing_error, a traceback logged."""
    deep = b"\x81\xa1x" * 1000 + b"\xc0"  # {"x": {"x": ... nil}} 1,000 maps deep, 3 KB
    header = b"\x83\xa1v\x01\xa4type\xa4mesh\xa6stream" + deep
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        for _ in range(3):
            peer.dealer.send_multipart([header, b""])
            err = _reply(peer.dealer)
            assert err is not None and err["reason"] == "malformed" and "deeper" in err["message"]
        assert server.rejected["processing_error"] == 0


# --- finding 6: streams and connections ---------------------------------------------------------

def test_a_stream_takes_frames_from_one_sender_at_a_time(tiny_bundle: Path) -> None:
    """Old server: another peer's frames were published on a stream mixed with the real ones
    (173 of 177), each resetting its filter."""
    mesh = tiny_rig(TINY).neutral
    config = server_config({"a": tiny_bundle}, owner_timeout_s=0.5)
    with running_server(config) as server, peer_for(server) as owner:
        intruder = _dealer(owner.ctx, server.input_endpoint)
        t0 = time.time_ns()
        for i in range(4):
            owner.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i * STEP_NS, mesh))
            intruder.send_multipart(protocol.encode_mesh("a", 1000 + i, t0 + i * STEP_NS + 1,
                                                         mesh))
            assert _frames_until(owner.sub, "a", i, 10.0) == [i]
        err = _reply(intruder)
        assert err is not None and err["reason"] == "stream_owned", err
        assert _controls(owner.sub, "a", 0.3) == []
        # Once the owner has been silent for owner_timeout_s, another sender may claim it.
        end = time.monotonic() + 10
        served: list[int] = []
        while not served and time.monotonic() < end:
            intruder.send_multipart(protocol.encode_mesh("a", 2000, time.time_ns(), mesh))
            served = [m.frame for m in _controls(owner.sub, "a", 0.2)]
        # The intruder's frame, from one try or more (a loaded machine may publish a try after
        # its 0.2 s window, beside the next one).
        assert served and set(served) == {2000}, served
        intruder.close(0)


def test_made_up_streams_expire_and_free_the_limit(tiny_bundle: Path) -> None:
    """Old server: with --accept-any-stream, 15 made-up ids filled the 16-stream limit for good
    and locked out a real actor; streams never expired."""
    mesh = tiny_rig(TINY).neutral
    # The refusal below must come while the made-up streams live: stream_idle_s leaves a loaded
    # machine 2 s for it (with 0.5 s, and idle streams looked for every second, an idle check
    # could expire them first).
    config = server_config({"a": tiny_bundle}, accept_any_stream=True, max_streams=4,
                           stream_idle_s=2.0)
    with running_server(config) as server, peer_for(server) as peer:
        for i in range(3):
            peer.dealer.send_multipart(protocol.encode_mesh(f"junk{i}", 0, time.time_ns(), mesh))
        assert _frames_until(peer.sub, "junk2", 0, 10.0) == [0]
        peer.dealer.send_multipart(protocol.encode_mesh("actor", 0, time.time_ns(), mesh))
        err = _reply(peer.dealer)
        assert err is not None and err["reason"] == "unknown_stream", (err, set(server.streams))
        end = time.monotonic() + 15
        while len(server.streams) > 1 and time.monotonic() < end:
            peer.recv_pub(0.1)
        assert set(server.streams) == {"a"}
        peer.dealer.send_multipart(protocol.encode_mesh("actor", 1, time.time_ns(), mesh))
        assert _frames_until(peer.sub, "actor", 1, 10.0) == [1]


def test_idle_connections_cannot_lock_out_a_new_client(tiny_bundle: Path, tmp_path: Path) -> None:
    """Old server: 340 idle connections exhausted its file limit and a new client got no schema
    reply. Here the server runs with a 128-file limit and 200 connections say nothing: the
    handshake timeout (ZMQ_HANDSHAKE_IVL) closes them."""
    args = ["--bundle", f"a={tiny_bundle}", "--handshake-timeout-ms", "300"]
    with serve_process(args, tmp_path, nofile=128) as (proc, ready):
        _host, port = ready["input"].rsplit(":", 1)
        idle = []
        try:
            for _ in range(200):
                s = socket.create_connection(("127.0.0.1", int(port)), timeout=2)
                idle.append(s)
            ctx = zmq.Context()
            with MeshSender(ready["input"], context=ctx) as client:
                reply = client.request_schema("a", timeout_s=10.0)
                assert reply["vertices"] == TINY["vertices"]
            ctx.term()
            assert proc.poll() is None
        finally:
            for s in idle:
                s.close()


def test_handshakes_past_the_connection_cap_are_refused(tiny_bundle: Path) -> None:
    """ZAP (RFC 27) refuses a handshake while the socket holds max_connections (counted from
    socket monitor events). Old server: no cap."""
    config = server_config({"a": tiny_bundle}, max_connections=4)
    ctx = zmq.Context()
    with running_server(config) as server:
        socks = [_dealer(ctx, server.input_endpoint) for _ in range(12)]
        for sock in socks:
            sock.send(protocol.encode_schema_request("a"))
        answered = sum(_reply(sock, 1.0) is not None for sock in socks)
        assert server.security is not None
        assert answered <= 6 and server.security.auth.refused >= 6, answered
        for sock in socks:
            sock.close(0)
        end = time.monotonic() + 5
        reply = None
        while reply is None and time.monotonic() < end:
            late = _dealer(ctx, server.input_endpoint)
            late.send(protocol.encode_schema_request("a"))
            reply = _reply(late, 0.5)
            late.close(0)
        assert reply is not None, "a new client was refused after the others left"
    ctx.term()


# --- finding 7: exposure ------------------------------------------------------------------------

def test_replies_and_telemetry_reveal_no_server_paths_or_other_streams(
        tiny_bundle: Path, other_bundle: Path) -> None:
    """Old server: the schema reply carried the absolute bundle path and the unknown-stream
    error listed every configured stream id."""
    config = server_config({"secret_actor": tiny_bundle, "a": tiny_bundle})
    with running_server(config) as server, peer_for(server) as peer:
        peer.dealer.send(protocol.encode_schema_request("a"))
        reply = protocol.decode_reply(peer.recv_reply())
        assert reply["bundle"] == tiny_bundle.name
        peer.dealer.send(protocol.encode_schema_request("nobody"))
        err = protocol.decode_header(peer.recv_reply())
        assert err["reason"] == "unknown_stream" and "nobody" in err["message"]
        assert "secret_actor" not in err["message"]
        tel = None
        while tel is None:
            frames = peer.recv_pub(2.0)
            assert frames is not None
            if frames[0] == b"tel.a":
                tel = protocol.decode_header(frames[1])
        assert "/" not in tel["bundle"] and str(tiny_bundle.parent) not in repr(tel)


# --- finding 8: fairness ------------------------------------------------------------------------

def test_every_streams_fit_error_runs(tiny_bundle: Path) -> None:
    """Old server: the fit-error time share was global and served the first stream first; in
    a 3-stream soak the 2nd and 3rd streams had their fit error skipped on 35,789 and 35,904
    of 36,000 frames. Frames of the three streams arrive together here, as they do on stage."""
    rig = tiny_rig(TINY)
    rng = np.random.default_rng(8)
    streams = ("s1", "s2", "s3")
    config = server_config({s: tiny_bundle for s in streams})
    with running_server(config) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        rounds = 40
        for i in range(rounds):
            mesh = rig_mesh(rig, rng.uniform(0, 1, TINY["controls"]))
            for s in streams:
                peer.dealer.send_multipart(protocol.encode_mesh(s, i, t0 + i * STEP_NS, mesh))
            got = 0
            end = time.monotonic() + 2
            while got < 3 and time.monotonic() < end:
                frames = peer.recv_pub(0.2)
                got += frames is not None and frames[0].startswith(protocol.TOPIC_CONTROLS)
            time.sleep(0.01)  # the capture's frame interval: the server is idle between rounds
        for s in streams:
            tel = server.streams[s].telemetry
            assert tel.fit_skipped <= rounds // 4, (s, tel.fit_skipped)


# --- finding 9: watch ---------------------------------------------------------------------------

def test_watch_shows_wire_text_as_text() -> None:
    """Old view: `rigcast watch` exited with a raw traceback (rich MarkupError) when a stream id
    contained "[/bold]"."""
    state = WatchState()
    name = "[/bold]evil[red]"
    state.add({"type": "telemetry", "stream": name, "bundle": "[/x]", "processed": 3,
               "rejected_by_reason": {"[/y]": 1}, "rejected": 1, "input_fps": "[/z]"})
    state.add({"type": "event", "kind": "reject", "stream": name, "reason": "[/bold]"})
    out = io.StringIO()
    Console(file=out, width=160, force_terminal=False).print(render_view(state))
    text = out.getvalue()
    assert name in text and "[/x]" in text and "[/y]" in text


def test_loopback_without_keys_stays_zero_setup(tiny_bundle: Path) -> None:
    """The default needs no keys: a plain DEALER on loopback is served as before."""
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        peer.dealer.send(protocol.encode_schema_request("a"))
        assert protocol.decode_reply(peer.recv_reply())["type"] == "schema_reply"
        assert server.security is not None and not server.security.curve


def test_deeply_nested_lists_are_refused_the_same(tiny_bundle: Path) -> None:
    """msgpack nests arrays too: a schema request whose versions nest 2,000 arrays deep."""
    prefix = msgpack.packb({"v": 1, "type": "schema", "stream": "a"})
    header = b"\x84" + prefix[1:] + msgpack.packb("versions") + b"\x91" * 2000 + b"\x01"
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        peer.dealer.send(header)
        err = _reply(peer.dealer)
        assert err is not None and err["reason"] == "malformed", err
        assert server.rejected["processing_error"] == 0

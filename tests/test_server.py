"""The live server over real sockets on 127.0.0.1: round trips, streams, bad input, load, reload,
signals and the off-manifold flag."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import msgpack
import numpy as np
import onnxruntime as ort
import pytest
from conftest import (
    OTHER,
    TINY,
    TINY_FIT_RMS,
    Peer,
    peer_for,
    rig_mesh,
    running_server,
    server_config,
    server_process,
    tiny_rig,
)
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.messaging import protocol
from rigcast.runtime.solve.one_euro import OneEuroParams, one_euro_step_naive

pytestmark = pytest.mark.timeout(60)

STEP_NS = 8_333_333  # 120 fps


def rotation_z(deg: float) -> np.ndarray:
    a = np.radians(deg)
    return np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])


def controls_of(peer: Peer, stream: str, count: int, timeout_s: float = 5.0,
                events: list[dict] | None = None) -> list[protocol.ControlsMessage]:
    """The next ``count`` controls messages of ``stream``; events seen meanwhile go to
    ``events``, other messages are skipped."""
    out: list[protocol.ControlsMessage] = []
    deadline = time.monotonic() + timeout_s
    topic = protocol.TOPIC_CONTROLS + stream.encode()
    while len(out) < count and time.monotonic() < deadline:
        frames = peer.recv_pub(0.2)
        if frames is not None and frames[0] == topic:
            out.append(protocol.decode_controls(frames))
        elif frames is not None and frames[0] == protocol.TOPIC_EVENTS and events is not None:
            events.append(protocol.decode_header(frames[1]))
    return out


def telemetry_of(peer: Peer, stream: str, timeout_s: float = 3.0) -> dict:
    topic = protocol.TOPIC_TELEMETRY + stream.encode()
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        frames = peer.recv_pub(0.2)
        if frames is not None and frames[0] == topic:
            return protocol.decode_header(frames[1])
    raise TimeoutError(f"no telemetry for {stream}")


def expected_controls(bundle_path: Path, subsets: list[np.ndarray], times: list[int],
                      filtered: bool = True) -> np.ndarray:
    """Reference: the inverse ONNX run directly, then One Euro (naive twin) and clamp."""
    bundle = load_bundle(bundle_path)
    sess = ort.InferenceSession(bundle.inverse_onnx, providers=["CPUExecutionProvider"])
    # StreamConfig defaults, beta per unit of each control's range (the tiny rig's span is 1)
    params = OneEuroParams.uniform(bundle.control_count, 1.0, 10.0, 1.0).per_unit_range(
        bundle.schema.upper - bundle.schema.lower)
    state = None
    out = []
    for subset, t in zip(subsets, times, strict=True):
        raw = sess.run(None, {"mesh": subset[None].astype(np.float32)})[0][0]
        if filtered:
            raw, state = one_euro_step_naive(state, raw, t, params)
        out.append(np.clip(raw, bundle.schema.lower, bundle.schema.upper))
    return np.array(out)


def test_round_trip_matches_direct_inference_filter_and_clamp(tiny_bundle: Path) -> None:
    rig = tiny_rig(TINY)
    rng = np.random.default_rng(3)
    weights = rng.uniform(0, 1, size=(6, TINY["controls"]))
    rot, shift = rotation_z(12.0), np.array([0.3, -0.1, 0.05])
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        times, subsets = [], []
        for i, w in enumerate(weights):
            mesh = rig_mesh(rig, w)
            moved = (mesh.astype(np.float64) @ rot.T + shift).astype(np.float32)
            times.append(t0 + i * STEP_NS)
            subsets.append(mesh[rig.input_indices])  # what stabilisation must recover
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, times[-1], moved))
            got = controls_of(peer, "a", 1)
            assert len(got) == 1, f"no controls for frame {i}"
            msg = got[0]
            assert (msg.frame, msg.t_send_ns) == (i, times[-1])
            assert msg.t_recv_ns <= msg.t_pub_ns
            assert msg.has(protocol.FLAG_FILTERED) == (i > 0)
            assert not msg.has(protocol.FLAG_OFF_MANIFOLD)
            np.testing.assert_allclose(msg.values, expected_controls(
                tiny_bundle, subsets, times)[-1], atol=2e-4)
        assert peer.recv_reply(0.05) is None, "a valid frame got an error reply"


def test_streams_keep_their_own_filter_state_and_bundles(tiny_bundle: Path,
                                                         other_bundle: Path) -> None:
    rigs = {"a": tiny_rig(TINY), "b": tiny_rig(TINY), "c": tiny_rig(OTHER)}
    paths = {"a": tiny_bundle, "b": tiny_bundle, "c": other_bundle}
    rng = np.random.default_rng(4)
    sent: dict[str, tuple[list, list]] = {s: ([], []) for s in rigs}
    received: dict[str, list] = {s: [] for s in rigs}
    with running_server(server_config(paths, stream_overrides={"stabilise": False})) as server, \
            peer_for(server) as peer:
        peer.dealer.send(protocol.encode_schema_request("c"))
        schema_c = peer.recv_reply()
        assert schema_c is not None
        assert len(protocol.decode_reply(schema_c)["controls"]) == OTHER["controls"]
        t0 = time.time_ns()
        for i in range(5):
            for sid, rig in rigs.items():
                w = rng.uniform(0, 1, size=rig.deltas.shape[0])
                mesh = rig_mesh(rig, w)
                t = t0 + i * STEP_NS + hash(sid) % 1000
                sent[sid][0].append(mesh[rig.input_indices])
                sent[sid][1].append(t)
                peer.dealer.send_multipart(protocol.encode_mesh(sid, i, t, mesh))
                received[sid] += controls_of(peer, sid, 1)
    for sid in rigs:
        assert [m.frame for m in received[sid]] == list(range(5))
        want = expected_controls(paths[sid], *sent[sid])
        np.testing.assert_allclose(np.array([m.values for m in received[sid]]), want, atol=1e-5)


def _valid_header(**changes: object) -> dict:
    header = {"v": 1, "type": "mesh", "stream": "a", "frame": 7, "t_send_ns": 1,
              "vertices": TINY["vertices"]}
    header.update(changes)
    return header


def _bad_messages() -> dict[str, list[bytes]]:
    neutral = tiny_rig(TINY).neutral
    good = neutral.tobytes()
    nan = neutral.copy()
    nan[5, 1] = np.nan
    inf = neutral.copy()
    inf[0, 0] = np.inf
    packed = msgpack.packb(_valid_header())
    return {
        "bad_vertex_count": [msgpack.packb(_valid_header(vertices=299)), neutral[:-1].tobytes()],
        "non_finite/nan": [packed, nan.tobytes()],
        "non_finite/inf": [packed, inf.tobytes()],
        "malformed/truncated": [packed[:-4], good],
        "malformed/garbage": [b"\xc1\xff\x00", good],
        "malformed/short_payload": [packed, good[:-12]],
        "malformed/missing_field": [msgpack.packb({"v": 1, "type": "mesh", "stream": "a"}), good],
        "unknown_version": [msgpack.packb(_valid_header(v=99)), good],
        "oversize": [msgpack.packb(_valid_header(vertices=1000)), b"\0" * 12000],
        "unknown_stream": [msgpack.packb(_valid_header(stream="nobody")), good],
    }


def test_every_bad_input_gets_a_named_rejection_and_serving_goes_on(tiny_bundle: Path) -> None:
    rig = tiny_rig(TINY)
    bad = _bad_messages()
    config = server_config({"a": tiny_bundle}, max_message_bytes=8192)
    events: list[dict] = []
    with running_server(config) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        for i, (label, frames) in enumerate(bad.items()):
            reason = label.split("/")[0]
            peer.dealer.send_multipart(frames)
            raw = peer.recv_reply()
            assert raw is not None, f"no reply for {label}"
            reply = protocol.decode_reply(raw)
            assert reply["type"] == "error"
            assert reply["reason"] == reason, (label, reply)
            assert reply["message"]
            # The server keeps serving: a valid frame right after comes back.
            mesh = rig_mesh(rig, np.full(TINY["controls"], 0.3))
            peer.dealer.send_multipart(protocol.encode_mesh("a", 100 + i, t0 + i * STEP_NS, mesh))
            got = controls_of(peer, "a", 1, events=events)
            assert [m.frame for m in got] == [100 + i], label
        deadline = time.monotonic() + 2
        while time.monotonic() < deadline and len(events) < len(bad):
            pub = peer.recv_pub(0.1)
            if pub and pub[0] == protocol.TOPIC_EVENTS:
                events.append(protocol.decode_header(pub[1]))
        tel = telemetry_of(peer, "a")
    assert sorted(e["reason"] for e in events) == sorted(k.split("/")[0] for k in bad)
    assert server.rejected.total() == len(bad)
    assert tel["server"]["rejected"] == len(bad)
    assert tel["processed"] == len(bad)


def test_events_name_the_reason(tiny_bundle: Path) -> None:
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        peer.dealer.send_multipart(_bad_messages()["unknown_stream"])
        deadline = time.monotonic() + 3
        event = None
        while time.monotonic() < deadline and event is None:
            frames = peer.recv_pub(0.1)
            if frames and frames[0] == protocol.TOPIC_EVENTS:
                event = protocol.decode_header(frames[1])
    assert event is not None
    assert (event["kind"], event["reason"], event["stream"]) == ("reject", "unknown_stream",
                                                                  "nobody")


def test_newest_frame_wins_under_a_burst(tiny_bundle: Path) -> None:
    rig = tiny_rig(TINY)
    mesh = rig_mesh(rig, np.full(TINY["controls"], 0.2))
    sent = 200
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        for i in range(sent):
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i, mesh))
        deadline = time.monotonic() + 10
        last = None
        while time.monotonic() < deadline:
            frames = peer.recv_pub(0.2)
            if frames and frames[0] == b"ctl.a":
                last = protocol.decode_controls(frames)
            if frames and frames[0] == b"tel.a":
                tel = protocol.decode_header(frames[1])
                if tel["processed"] + tel["dropped"] + tel["stale"] >= sent:
                    break
    assert tel["dropped"] > 0, "the burst never made the server fall behind"
    assert tel["stale"] == 0
    assert tel["processed"] + tel["dropped"] == sent
    assert last is not None and last.frame == sent - 1
    assert last.has(protocol.FLAG_STALE)  # it followed dropped frames


def test_a_drain_reads_at_most_max_drain_messages(tiny_bundle: Path) -> None:
    # A sender faster than the server must not keep one drain from ever reaching a frame: each
    # drain reads at most max_drain messages and publishes the newest of them.
    rig = tiny_rig(TINY)
    mesh = rig_mesh(rig, np.full(TINY["controls"], 0.2))
    sent, limit = 300, 4
    config = server_config({"a": tiny_bundle}, max_drain=limit)
    with running_server(config) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        for i in range(sent):
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i, mesh))
        deadline = time.monotonic() + 10
        tel: dict = {}
        while time.monotonic() < deadline:
            frames = peer.recv_pub(0.2)
            if frames and frames[0] == b"tel.a":
                tel = protocol.decode_header(frames[1])
                if tel["processed"] + tel["dropped"] + tel["stale"] >= sent:
                    break
    assert tel["processed"] + tel["dropped"] == sent
    assert tel["processed"] * limit >= sent, tel


def test_busy_poll_serves_frames_and_restores_the_collector(tiny_bundle: Path) -> None:
    import gc

    rig = tiny_rig(TINY)
    assert gc.isenabled()
    config = server_config({"a": tiny_bundle}, busy_poll_us=500)
    with running_server(config) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        for i in range(5):
            mesh = rig_mesh(rig, np.full(TINY["controls"], 0.1 * i))
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i * STEP_NS, mesh))
            assert [m.frame for m in controls_of(peer, "a", 1)] == [i]
    assert gc.isenabled(), "the server left the garbage collector disabled"


@pytest.mark.parametrize("value", [-1, 2_000_000])
def test_busy_poll_budget_is_validated(tiny_bundle: Path, value: int) -> None:
    from rigcast.runtime.serve.config import ConfigError

    with pytest.raises(ConfigError, match=r"busy_poll_us must be 0\.\.1000000"):
        server_config({"a": tiny_bundle}, busy_poll_us=value)


def test_fit_error_keeps_to_its_time_share(tiny_bundle: Path) -> None:
    # With a vanishing share, the first fit pushes the next one far into the future: every
    # later frame is published, its fit is skipped and counted.
    rig = tiny_rig(TINY)
    config = server_config({"a": tiny_bundle}, fit_error_max_share=1e-9)
    with running_server(config) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        for i in range(5):
            mesh = rig_mesh(rig, np.full(TINY["controls"], 0.1 * i))
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i * STEP_NS, mesh))
            assert [m.frame for m in controls_of(peer, "a", 1)] == [i]
            # The next frame goes only once telemetry shows this one processed: no input
            # waits when its fit is due, so only the time share can skip it.
            tel = telemetry_of(peer, "a")
            while tel["processed"] < i + 1:
                tel = telemetry_of(peer, "a")
    assert tel["fit_error"]["frame"] == 0, tel["fit_error"]
    # Frames 1-3 were replaced unfitted by a newer frame of the stream; frame 4 still waits for
    # its turn (runtime/trust/fairness.py), so it is not counted yet.
    assert tel["fit_error"]["skipped"] == 3


@pytest.mark.parametrize("value", [0.0, 1.5])
def test_fit_error_share_is_validated(tiny_bundle: Path, value: float) -> None:
    from rigcast.runtime.serve.config import ConfigError

    with pytest.raises(ConfigError, match="fit_error_max_share"):
        server_config({"a": tiny_bundle}, fit_error_max_share=value)


def test_stale_frames_are_counted_not_published(tiny_bundle: Path) -> None:
    mesh = tiny_rig(TINY).neutral
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        peer.dealer.send_multipart(protocol.encode_mesh("a", 5, t0, mesh))
        assert [m.frame for m in controls_of(peer, "a", 1)] == [5]
        peer.dealer.send_multipart(protocol.encode_mesh("a", 4, t0 - 1000, mesh))  # older
        peer.dealer.send_multipart(protocol.encode_mesh("a", 6, t0 + STEP_NS, mesh))
        assert [m.frame for m in controls_of(peer, "a", 1)] == [6]
        tel = telemetry_of(peer, "a")
    assert tel["stale"] == 1
    assert tel["processed"] == 2


def test_reload_swaps_atomically_while_frames_flow(tiny_bundle: Path, tmp_path: Path) -> None:
    new_path = build_synthetic_bundle(tmp_path / "tiny_mlp.rcb", **TINY, inverse="mlp",
                                      fit_rms=TINY_FIT_RMS)
    rig = tiny_rig(TINY)
    rng = np.random.default_rng(5)
    meshes = [rig_mesh(rig, rng.uniform(0, 1, TINY["controls"])) for _ in range(8)]
    sessions = {name: ort.InferenceSession(load_bundle(p).inverse_onnx,
                                           providers=["CPUExecutionProvider"])
                for name, p in (("old", tiny_bundle), ("new", new_path))}
    config = server_config({"a": tiny_bundle}, reload_dirs=str(tmp_path),
                           stream_overrides={"passthrough": True, "stabilise": False})
    stop = threading.Event()
    sent: list[int] = []
    received: list[protocol.ControlsMessage] = []
    with running_server(config) as server, peer_for(server) as peer:
        def stream_frames() -> None:
            """Lockstep: each frame waits for its controls, so none can be superseded."""
            t0 = time.time_ns()
            i = 0
            while not stop.is_set():
                peer.dealer.send_multipart(protocol.encode_mesh(
                    "a", i, t0 + i * STEP_NS, meshes[i % len(meshes)]))
                sent.append(i)
                received.extend(controls_of(peer, "a", 1, timeout_s=10.0))
                i += 1

        def wait_for(count: int) -> None:
            deadline = time.monotonic() + 10
            while len(received) < count and time.monotonic() < deadline:
                time.sleep(0.01)

        sender = threading.Thread(target=stream_frames)
        reloader = Peer(server.input_endpoint, server.output_endpoint)
        try:
            sender.start()
            wait_for(10)
            reloader.dealer.send(protocol.encode_reload_request("a", str(new_path)))
            reply = reloader.recv_reply(10.0)
            wait_for(len(received) + 10)
        finally:
            stop.set()
            sender.join()
            reloader.close()
        assert peer.recv_reply(0.05) is None, "a frame was rejected during the reload"
    assert reply is not None and protocol.decode_reply(reply)["ok"] is True
    assert [m.frame for m in received] == sent, "frames were lost during the reload"
    owners = []
    for m in received:
        subset = meshes[m.frame % len(meshes)][rig.input_indices][None]
        match = [name for name, s in sessions.items()
                 if np.allclose(s.run(None, {"mesh": subset})[0][0], m.values, atol=1e-5)]
        assert len(match) == 1, f"frame {m.frame} matches {match}"
        owners.append(match[0])
    switch = owners.index("new")
    assert switch > 0 and set(owners[switch:]) == {"new"}, "the swap was not atomic"


def test_reload_refuses_bad_or_incompatible_bundles(tiny_bundle: Path, other_bundle: Path,
                                                    tmp_path: Path) -> None:
    corrupt = tmp_path / "corrupt.rcb"
    corrupt.write_bytes(b"not a zip")
    mesh = tiny_rig(TINY).neutral
    folders = os.pathsep.join([str(tmp_path), str(other_bundle.parent)])
    config = server_config({"a": tiny_bundle}, reload_dirs=folders, reload_min_interval_s=0.0)
    with running_server(config) as server, peer_for(server) as peer:
        for path, words in ((other_bundle, "vertices"), (corrupt, "not a readable rigcast bundle"),
                            (tmp_path / "missing.rcb", "no bundle 'missing.rcb'")):
            peer.dealer.send(protocol.encode_reload_request("a", str(path)))
            raw = peer.recv_reply(10.0)
            assert raw is not None
            reply = protocol.decode_reply(raw)
            assert reply["ok"] is False and words in reply["message"], reply
        peer.dealer.send_multipart(protocol.encode_mesh("a", 1, time.time_ns(), mesh))
        assert [m.frame for m in controls_of(peer, "a", 1)] == [1]
        assert len(controls_of(peer, "a", 1, 0.1)) == 0
    assert server.streams["a"].model.label == tiny_bundle.name


def _flags_and_events(peer: Peer, meshes: list[np.ndarray]) -> tuple[dict[int, bool], list[dict]]:
    """Send meshes one at a time, each once the previous frame's controls came back and
    telemetry says its fit error ran (the fit runs after the publish, within its time share; a
    frame sent before it would replace the unfitted frame, which a fixed pause cannot rule out
    on a loaded machine)."""
    t0 = time.time_ns()
    flags: dict[int, bool] = {}
    events: list[dict] = []
    for i, mesh in enumerate(meshes):
        peer.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i * STEP_NS, mesh))
        deadline = time.monotonic() + 10
        fitted = False
        while time.monotonic() < deadline and not (i in flags and fitted):
            frames = peer.recv_pub(0.2)
            if frames and frames[0] == b"ctl.a":
                msg = protocol.decode_controls(frames)
                flags[msg.frame] = msg.has(protocol.FLAG_OFF_MANIFOLD)
            elif frames and frames[0] == protocol.TOPIC_EVENTS:
                events.append(protocol.decode_header(frames[1]))
            elif frames and frames[0] == b"tel.a":
                fitted = protocol.decode_header(frames[1])["fit_error"]["frame"] == i
        assert i in flags and fitted, f"frame {i}: no controls or no fit within 10 s"
    while (tail := peer.recv_pub(0.05)) is not None:
        if tail[0] == protocol.TOPIC_EVENTS:
            events.append(protocol.decode_header(tail[1]))
    return flags, events


def test_off_manifold_flag_follows_a_mesh_far_from_the_rig(tiny_bundle: Path) -> None:
    # An explicit threshold: a fixed limit on the fit-error RMS.
    rig = tiny_rig(TINY)
    good = rig_mesh(rig, np.full(TINY["controls"], 0.4))
    far = good + np.random.default_rng(6).normal(scale=0.2, size=good.shape).astype(np.float32)
    cfg = server_config({"a": tiny_bundle}, stream_overrides={"off_manifold_threshold": 0.006})
    with running_server(cfg) as server, peer_for(server) as peer:
        flags, events = _flags_and_events(peer, [good, good, far, good, good])
        tel = telemetry_of(peer, "a")
    # Computed after the publish: the flag lands on the frame after the far one.
    assert flags == {0: False, 1: False, 2: False, 3: True, 4: False}
    off = [e for e in events if e["kind"] == "off_manifold"]
    assert [e["frame"] for e in off] == [2]
    assert off[0]["rms"] > off[0]["threshold"] == pytest.approx(0.006)
    assert tel["fit_error"]["last_off_manifold_frame"] == 2
    assert tel["fit_error"]["rms"] < 1e-4  # the last frame was on the rig


def test_adaptive_off_manifold_rule_follows_the_streams_noise(tiny_bundle: Path) -> None:
    # No explicit threshold: running median + k MAD of the worst-vertex error (runtime/solve/manifold.py).
    # Sensor noise puts every frame's worst error above the floor (3 x the training fit error,
    # which a fixed rule would flag on every frame); only the bulge stands out from the stream.
    rig = tiny_rig(TINY)
    good = rig_mesh(rig, np.full(TINY["controls"], 0.4))
    rng = np.random.default_rng(8)
    meshes = [good + rng.normal(scale=0.004, size=good.shape).astype(np.float32) for _ in range(45)]
    bulge = meshes[40].copy()
    bulge[:5] += 0.3  # five vertices pushed where no control can take them
    meshes[40] = bulge
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        flags, events = _flags_and_events(peer, meshes)
    off = [e for e in events if e["kind"] == "off_manifold"]
    assert [e["frame"] for e in off] == [40], off
    assert flags[41] and sum(flags.values()) == 1
    assert off[0]["max"] > off[0]["threshold"] > 3 * TINY_FIT_RMS


def test_sigterm_stops_a_server_process_cleanly(tiny_bundle: Path, tmp_path: Path) -> None:
    with server_process(["--bundle", f"a={tiny_bundle}"], tmp_path) as (proc, ready):
        peer = Peer(ready["input"], ready["output"])
        try:
            peer.handshake()
            peer.dealer.send_multipart(protocol.encode_mesh("a", 0, time.time_ns(),
                                                            tiny_rig(TINY).neutral))
            assert [m.frame for m in controls_of(peer, "a", 1)] == [0]
        finally:
            peer.close()
        start = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(5)
        elapsed = time.monotonic() - start
    assert code == 0
    assert elapsed < 3.0


def test_non_loopback_bind_without_the_flag_is_refused(tiny_bundle: Path) -> None:
    proc = subprocess.run(
        [sys.executable, "-m", "rigcast.runtime.serve.serve_main",
         "--bundle", str(tiny_bundle), "--input", "tcp://0.0.0.0:0"],
        capture_output=True, text=True, timeout=60, check=False)
    assert proc.returncode == 2
    assert "not a loopback address" in proc.stderr and "--allow-remote" in proc.stderr


def test_new_streams_are_served_up_to_the_limit_even_with_long_ids(tiny_bundle: Path) -> None:
    """accept_any_stream: any id the protocol allows (up to 255 bytes) gets its own stream, up to
    max_streams; one more is refused as unknown_stream, and the server keeps serving."""
    rig = tiny_rig(TINY)
    mesh = rig_mesh(rig, np.full(TINY["controls"], 0.3))
    long_id = "actor-" + "x" * 240  # 246 bytes
    config = server_config({"a": tiny_bundle}, accept_any_stream=True, max_streams=2)
    with running_server(config) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        # Refused frames and requests from new ids take no stream slot.
        peer.dealer.send_multipart(protocol.encode_mesh("ghost", 0, t0, mesh[:-1]))
        reply = peer.recv_reply(3.0)
        assert reply is not None and protocol.decode_reply(reply)["reason"] == "bad_vertex_count"
        peer.dealer.send_multipart([protocol.encode_schema_request("visitor")])
        reply = peer.recv_reply(3.0)
        assert reply is not None and protocol.decode_reply(reply)["type"] == "schema_reply"
        assert sorted(server.streams) == ["a"]
        peer.dealer.send_multipart(protocol.encode_mesh(long_id, 0, t0, mesh))
        got = controls_of(peer, long_id, 1)
        assert len(got) == 1 and got[0].stream == long_id
        peer.dealer.send_multipart(protocol.encode_mesh("one-too-many", 0, t0, mesh))
        reply = peer.recv_reply(3.0)
        assert reply is not None
        err = protocol.decode_reply(reply)
        assert err["reason"] == "unknown_stream" and "maximum of 2 streams" in err["message"]
        peer.dealer.send_multipart(protocol.encode_mesh("a", 0, t0, mesh))
        assert len(controls_of(peer, "a", 1)) == 1, "server stopped serving after a refusal"


def test_a_header_with_a_map_for_its_stream_does_not_stop_the_server(tiny_bundle: Path) -> None:
    """A server-to-client type whose own fields are fine but whose stream is a map: it is refused
    as unknown_type, and the server goes on serving."""
    rig = tiny_rig(TINY)
    mesh = rig_mesh(rig, np.full(TINY["controls"], 0.3))
    odd = msgpack.packb({"v": 1, "type": "reload_reply", "stream": {"a": 1}, "ok": True,
                         "message": "x"})
    with running_server(server_config({"a": tiny_bundle})) as server, peer_for(server) as peer:
        peer.dealer.send_multipart([odd])
        reply = peer.recv_reply(3.0)
        assert reply is not None
        err = protocol.decode_reply(reply)
        assert err["reason"] == "unknown_type" and err["stream"] is None
        peer.dealer.send_multipart(protocol.encode_mesh("a", 0, time.time_ns(), mesh))
        assert len(controls_of(peer, "a", 1)) == 1, "the server stopped after an odd header"
        assert server.rejected["unknown_type"] == 1

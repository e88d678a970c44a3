"""OSC 1.0 relay: a real server solves a stream, the relay subscribes to it, and a real python-osc
UDP server on 127.0.0.1 receives one time-tagged bundle per frame with the published values."""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import rig_mesh, running_server, server_config, tiny_rig
from rigcast.runtime.messaging.client import ControlsSubscriber, MeshSender
from rigcast.runtime.messaging.protocol import ControlsMessage

from rigcast.live.osc_out import OscError, osc_addresses, parse_target, relay, safe_part

if os.environ.get("CI"):
    import pythonosc  # noqa: F401  CI installs the osc extra (.ci/run): a missing one must fail
pytest.importorskip("pythonosc", reason="python-osc not installed: pip install 'rigcast[osc]'")
from pythonosc import dispatcher as osc_dispatcher
from pythonosc import osc_server
from pythonosc.osc_bundle import OscBundle

pytestmark = pytest.mark.timeout(60)


def test_addresses_are_made_safe_as_osc_1_0_requires() -> None:
    # OSC 1.0, "OSC Address Patterns": no space # * , / ? [ ] { } and printable ASCII only
    assert safe_part("brow arch#l") == "brow_arch_l"
    assert safe_part("lid{0}/shut?") == "lid_0__shut_"
    assert safe_part("mâchoire") == "m_choire"
    assert safe_part("") == "_"
    names = ["jaw_drop", "jaw drop", "frame", "ok"]
    assert osc_addresses("/rig cast/", "actor 1", names) == (
        "/rig_cast/actor_1/jaw_drop", "/rig_cast/actor_1/jaw_drop_2",
        "/rig_cast/actor_1/frame_2", "/rig_cast/actor_1/ok")
    for address in osc_addresses("/rigcast", "a", [chr(c) for c in range(0, 200, 3)]):
        part = address.rsplit("/", 1)[1]
        assert all(32 < ord(ch) < 127 and ch not in " #*,/?[]{}" for ch in part), address
    with pytest.raises(OscError, match="must start with '/'"):
        osc_addresses("rigcast", "a", ["x"])
    assert parse_target("127.0.0.1:9000") == ("127.0.0.1", 9000)
    assert parse_target("[::1]:7000") == ("::1", 7000)
    with pytest.raises(OscError, match="HOST:PORT"):
        parse_target("127.0.0.1")


class _Recorder(osc_dispatcher.Dispatcher):
    """python-osc's dispatcher, keeping each datagram too (to check the bundle structure)."""

    def __init__(self) -> None:
        super().__init__()
        self.datagrams: list[bytes] = []
        self.calls: list[tuple[str, tuple]] = []
        self.set_default_handler(lambda address, *args: self.calls.append((address, args)))

    def call_handlers_for_packet(self, data: bytes, client_address: tuple) -> list:
        self.datagrams.append(bytes(data))
        return super().call_handlers_for_packet(data, client_address)


def test_every_frame_arrives_as_one_bundle_with_the_published_values(tiny_bundle: Path) -> None:
    rig = tiny_rig()
    names = rig.schema.names
    frames = 600  # a 10-second stream at 60 fps (issue 14's acceptance)
    recorder = _Recorder()
    listener = osc_server.ThreadingOSCUDPServer(("127.0.0.1", 0), recorder)
    port = listener.server_address[1]
    listen = threading.Thread(target=listener.serve_forever, daemon=True)
    listen.start()
    stop = threading.Event()
    stats: list = []
    try:
        with running_server(server_config({"tiny": tiny_bundle})) as server, \
                ControlsSubscriber("tiny", server.output_endpoint) as relay_sub, \
                ControlsSubscriber("tiny", server.output_endpoint) as truth_sub, \
                MeshSender(server.input_endpoint) as sender:
            worker = threading.Thread(target=lambda: stats.append(relay(
                relay_sub, names, "127.0.0.1", port, should_stop=stop.is_set)))
            worker.start()
            published: dict[int, ControlsMessage] = {}
            # warm-up frames until both subscriptions and the listener see traffic (no sleeps)
            frame = 0
            while not (published and recorder.datagrams):
                assert frame < 500, "subscriptions never became active"
                sender.send("tiny", frame, rig_mesh(rig, rig.schema.defaults), t_send_ns=time.time_ns())
                msg = truth_sub.recv(timeout_ms=20)
                if isinstance(msg, ControlsMessage):
                    published[msg.frame] = msg
                frame += 1
            first = frame
            rng = np.random.default_rng(0)
            start = time.monotonic()
            for k in range(frames):  # paced at 60 fps, each frame published before the next
                controls = rng.uniform(rig.schema.lower, rig.schema.upper)
                sender.send("tiny", first + k, rig_mesh(rig, controls), t_send_ns=time.time_ns())
                deadline = time.monotonic() + 5
                while first + k not in published:
                    assert time.monotonic() < deadline, f"frame {first + k} was not published"
                    msg = truth_sub.recv(timeout_ms=100)
                    if isinstance(msg, ControlsMessage):
                        published[msg.frame] = msg
                time.sleep(max(0.0, start + (k + 1) / 60.0 - time.monotonic()))
            last = first + frames - 1
            deadline = time.monotonic() + 5
            try:
                while not any(OscBundle(d).content(OscBundle(d).num_contents - 1).params[0]
                              == last for d in recorder.datagrams[-5:]):
                    assert time.monotonic() < deadline, "the relay did not send the last frame"
                    time.sleep(0.02)
            finally:
                stop.set()  # the relay stops before its subscriber closes
                worker.join(10)
    finally:
        stop.set()
        listener.shutdown()
        listener.server_close()
    assert stats and stats[0].send_errors == 0
    bundles = {}
    for dgram in recorder.datagrams:
        assert OscBundle.dgram_is_bundle(dgram)  # one OSC 1.0 bundle per frame
        bundle = OscBundle(dgram)
        assert bundle.num_contents == len(names) + 1
        frame_msg = bundle.content(len(names))
        assert frame_msg.address == "/rigcast/tiny/frame"
        bundles[frame_msg.params[0]] = bundle
    for f in range(first, first + frames):
        assert f in bundles, f"frame {f} never reached the OSC listener"
        msg, bundle = published[f], bundles[f]
        got = np.array([bundle.content(i).params[0] for i in range(len(names))], np.float32)
        np.testing.assert_array_equal(got, msg.values)  # float32 on both sides: equal
        assert [bundle.content(i).address for i in range(len(names))] == \
            [f"/rigcast/tiny/{n}" for n in names]
        assert bundle.content(len(names)).params[1] == msg.flags
        assert bundle.timestamp == pytest.approx(msg.t_pub_ns / 1e9, abs=1e-6)  # NTP time tag
    # python-osc's dispatcher delivered every control message of those frames to its handler
    delivered = sum(1 for address, _ in recorder.calls if address != "/rigcast/tiny/frame")
    assert delivered >= frames * len(names)


def test_osc_command_help_and_bad_target() -> None:
    import subprocess
    import sys

    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-m", "rigcast", "osc", *args], capture_output=True,
                              text=True, timeout=60, check=False, stdin=subprocess.DEVNULL)

    helped = run("--help")
    assert helped.returncode == 0 and "examples:" in helped.stdout
    assert "rigcast osc --osc 127.0.0.1:7000" in helped.stdout
    bad = run("--osc", "nowhere")
    assert bad.returncode == 2
    assert bad.stderr.startswith("rigcast: error: OSC target must be HOST:PORT")
    assert len(bad.stderr.strip().splitlines()) == 1

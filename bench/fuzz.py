"""Fuzz a real server process with random and mutated messages, with CurveZMQ off and on.

For each mode (``--modes off on``) a server process serves two streams of a small synthetic
bundle: ``fz`` for the fuzzer and ``real`` for a second peer that sends valid frames all along.
The fuzzer sends ``--messages`` / modes messages, in batches, of every kind the trust work covers:
valid and mutated mesh frames, random bytes, too many parts (up to 100,000), oversize headers and
payloads, parts over ZMQ_MAXMSGSIZE (on a socket of their own, since libzmq drops the
connection), headers nested thousands deep, far timestamps and new sessions, frames into the
other peer's stream, made-up and markup stream ids, schema and reload requests (paths outside the
allowed folders, traversal, a ZIP bomb, the served bundle), server-to-client types, and with
CURVE on, handshakes with a key the server does not know.

Accounting: every message the fuzzer sends is answered by exactly one reply (error, schema or
reload reply), or is a valid frame that the server's counters show as processed, dropped,
stale or a processing error, or is refused by the transport by design (a part over
ZMQ_MAXMSGSIZE, an unknown key). ``unaccounted`` is what is left. ``crashes`` counts server
process deaths and messages the server's catch-all had to handle (``processing_error`` outside
a stream: an exception nobody expected). The second peer's frames repeat a small set of meshes
with the filter off (``--passthrough``), so every controls message it gets back must equal,
bit for bit, the one published for the same mesh before the fuzzing began.

    python bench/fuzz.py --messages 1000000 --out bench/out
"""

from __future__ import annotations

import argparse
import json
import os
import random
import subprocess
import sys
import tempfile
import threading
import time
import zipfile
from collections import Counter
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import zmq
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.messaging import protocol
from rigcast.runtime.trust.keys import ClientCurve, create_key_pair

V, C = 300, 8
BATCH = 200
MAXMSG = 16 * 1024 * 1024  # the server's default max_message_bytes


def rss_mb(pid: int, key: str = "VmRSS:") -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(key):
            return int(line.split()[1]) / 1024.0
    return float("nan")


def header(**kw: Any) -> dict[str, Any]:
    base = {"v": 1, "type": "mesh", "stream": "fz", "frame": 0, "t_send_ns": time.time_ns(),
            "vertices": V, "session": 1}
    base.update(kw)
    return {k: v for k, v in base.items() if v is not ...}


class Fuzzer:
    """Makes messages; each is (parts, kind) with kind 'reply', 'mesh' or 'transport'."""

    def __init__(self, rng: random.Random, mesh: np.ndarray, folder: Path) -> None:
        self.rng = rng
        self.mesh = mesh
        self.payload = mesh.tobytes()
        self.folder = folder
        self.frame = 0

    def valid(self) -> list[bytes]:
        self.frame += 1
        return [msgpack.packb(header(frame=self.frame)), self.payload]

    def mutate(self, data: bytes) -> bytes:
        b = bytearray(data)
        for _ in range(self.rng.randint(1, 4)):
            op = self.rng.random()
            if op < 0.5 and b:
                b[self.rng.randrange(len(b))] = self.rng.randrange(256)
            elif op < 0.7 and b:
                del b[self.rng.randrange(len(b)):]
            elif op < 0.85:
                b.insert(self.rng.randrange(len(b) + 1), self.rng.randrange(256))
            else:
                b += os.urandom(self.rng.randint(1, 16))
        return bytes(b)

    def message(self) -> tuple[list[bytes], str]:
        r = self.rng.random()
        rng = self.rng
        if r < 0.10:
            return self.valid(), "mesh"
        if r < 0.40:
            h, p = self.valid()
            return ([self.mutate(h), p] if rng.random() < 0.7 else [h, self.mutate(p)]), "any"
        if r < 0.50:
            return [os.urandom(rng.randint(0, 64)) for _ in range(rng.randint(1, 2))], "reply"
        if r < 0.55:
            n = rng.choice([3, 4, 17, 100, 1000]) if rng.random() < 0.999 else 100_000
            return [msgpack.packb(header())] + [b""] * (n - 1), "reply"
        if r < 0.58:
            return [msgpack.packb(header(pad="x" * rng.randint(4100, 9000))), self.payload], "reply"
        if r < 0.62:
            depth = rng.randint(9, 1300)
            deep = (b"\x91" * depth + b"\x01" if rng.random() < 0.5
                    else b"\x81\xa1x" * depth + b"\xc0")
            prefix = msgpack.packb({"v": 1, "type": "schema", "stream": "fz"})
            return [b"\x84" + prefix[1:] + msgpack.packb("versions") + deep], "reply"
        if r < 0.68:
            t = rng.choice([2**63 - 1, -(2**63), 0, 1, time.time_ns() + 10**12])
            session = rng.choice([1, 1, 1, rng.randrange(2**63)])
            self.frame += 1
            return [msgpack.packb(header(frame=self.frame, t_send_ns=t, session=session)),
                    self.payload], "any"
        if r < 0.72:
            return [msgpack.packb(header(stream="real", frame=rng.randrange(2**40))),
                    self.payload], "reply"
        if r < 0.76:
            sid = rng.choice(["[/bold]", "nobody", "x" * 255, "ü" * 100, "fz\x00"])
            return [msgpack.packb(header(stream=sid)), self.payload], "reply"
        if r < 0.82:
            versions = rng.choice([[1], [2, 3], [], list(range(70)), ["1"], [1, 1.0]])
            sid = rng.choice(["fz", "real", "nobody", "[red]"])
            return [msgpack.packb({"v": 1, "type": "schema", "stream": sid,
                                   "versions": versions})], "reply"
        if r < 0.84:
            path = rng.choice(["/etc/passwd", "../" * 8 + "etc/hostname", "bomb.rcb",
                               "fz.rcb", str(self.folder / "fz.rcb"), str(self.folder),
                               "missing.rcb", "\x00", "a" * 5000])
            sid = rng.choice(["fz", "real", "nobody"])
            return [msgpack.packb({"v": 1, "type": "reload", "stream": sid, "bundle": path})], "reply"
        if r < 0.88:
            kind = rng.choice(["controls", "error", "telemetry", "event", "schema_reply",
                               "reload_reply", "nonsense"])
            return [msgpack.packb({"v": rng.choice([1, 2, True, "1"]), "type": kind,
                                   "stream": "fz"})], "reply"
        if r < 0.9995:
            value = rng.choice([[], 1, None, True, "s", 2**64 - 1, -1, {"a": 1}, b"bin", 1.5])
            return [msgpack.packb(value) if rng.random() < 0.5
                    else msgpack.packb(header(**{rng.choice(["v", "type", "stream", "frame",
                                                              "t_send_ns", "vertices",
                                                              "session"]): value}))], "reply"
        if rng.random() < 0.5:
            return [msgpack.packb(header()), bytes(MAXMSG + 1)], "reply"  # oversize, replied
        return [msgpack.packb(header()), bytes(MAXMSG + 70_000)], "transport"  # over MAXMSGSIZE


def make_bomb(path: Path, bundle: Path) -> None:
    with zipfile.ZipFile(bundle) as src, zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED,
                                                         compresslevel=1) as zf:
        for name in src.namelist():
            if name != "arrays.npz":
                zf.writestr(name, src.read(name))
        with zf.open("arrays.npz", "w", force_zip64=True) as out:
            for _ in range(1024):
                out.write(bytes(1 << 20))


class SecondPeer(threading.Thread):
    """Sends valid frames of a few meshes on stream 'real'; checks every result bit for bit."""

    def __init__(self, ctx: zmq.Context, ready: dict[str, str], meshes: list[np.ndarray],
                 curve: ClientCurve | None) -> None:
        super().__init__(daemon=True)
        self.meshes = meshes
        self.dealer = ctx.socket(zmq.DEALER)
        self.sub = ctx.socket(zmq.SUB)
        for s in (self.dealer, self.sub):
            s.setsockopt(zmq.LINGER, 0)
            if curve is not None:
                curve.apply(s)
        self.sub.setsockopt(zmq.SUBSCRIBE, b"ctl.real")
        self.sub.setsockopt(zmq.RCVHWM, 100_000)
        self.dealer.connect(ready["input"])
        self.sub.connect(ready["output"])
        self.reference: dict[int, bytes] = {}
        self.stop = threading.Event()
        self.sent = self.received = self.exact = self.mismatched = 0
        self.frame = 0

    def exchange(self, reference: bool) -> None:
        self.frame += 1
        which = self.frame % len(self.meshes)
        self.dealer.send_multipart(protocol.encode_mesh("real", self.frame, time.time_ns(),
                                                        self.meshes[which], session=7))
        self.sent += 1
        end = time.monotonic() + 0.5
        while time.monotonic() < end:
            if not self.sub.poll(20):
                continue
            frames = self.sub.recv_multipart()
            msg = protocol.decode_controls(frames)
            self.received += 1
            got = msg.values.tobytes()
            key = msg.frame % len(self.meshes)
            if reference:
                self.reference.setdefault(key, got)
            elif got == self.reference.get(key):
                self.exact += 1
            else:
                self.mismatched += 1
            if msg.frame == self.frame:
                return

    def run(self) -> None:
        while not self.stop.is_set():
            self.exchange(False)
            time.sleep(0.005)

    def close(self) -> None:
        self.dealer.close(0)
        self.sub.close(0)


def telemetry(ctx: zmq.Context, ready: dict[str, str], curve: ClientCurve | None,
              stream: str) -> dict[str, Any]:
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    if curve is not None:
        curve.apply(sub)
    sub.setsockopt(zmq.SUBSCRIBE, b"tel." + stream.encode())
    sub.connect(ready["output"])
    try:
        if not sub.poll(5000):
            raise RuntimeError("no telemetry")
        sub.recv_multipart()  # may be from before the last counts
        sub.poll(5000)
        return protocol.decode_header(sub.recv_multipart()[1], max_header_bytes=1 << 20)
    finally:
        sub.close(0)


def run_mode(curve_on: bool, count: int, work: Path, bundle: Path, keys: Path,
             seed: int) -> dict[str, Any]:
    ready_file = work / f"ready-{curve_on}.json"
    cmd = [sys.executable, "-m", "rigcast.runtime.serve.serve_main", "--input", "tcp://127.0.0.1:*",
           "--output", "tcp://127.0.0.1:*", "--ready-file", str(ready_file), "--bundle",
           f"fz={bundle}", "--bundle", f"real={bundle}", "--passthrough", "--log-level",
           "WARNING", "--reload-min-interval-s", "0.5"]
    client_curve = stranger = real_curve = None
    if curve_on:
        cmd += ["--curve-secret-key", str(keys / "server.key_secret"),
                "--authorized-keys", str(keys / "clients")]
        client_curve = ClientCurve.from_files(keys / "server.key",
                                              keys / "clients" / "fz.key_secret")
        stranger = ClientCurve.from_files(keys / "server.key", keys / "stranger.key_secret")
        # The second peer has a key of its own: with CURVE a key is a sender (ownership).
        real_curve = ClientCurve.from_files(keys / "server.key",
                                            keys / "clients" / "real.key_secret")
    log = (work / f"server-{curve_on}.log").open("w")
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=log)
    while not ready_file.exists():
        if proc.poll() is not None:
            raise RuntimeError(f"server did not start: {(work / f'server-{curve_on}.log').read_text()}")
        time.sleep(0.05)
    ready = json.loads(ready_file.read_text())
    ctx = zmq.Context()
    rig = make_synthetic_rig(V, C, inputs=40, stable=16, seed=0)
    rng_np = np.random.default_rng(seed)
    meshes = [np.ascontiguousarray(rig.evaluate(rng_np.uniform(0, 1, (1, C)))[0], np.float32)
              for _ in range(4)]
    peer = SecondPeer(ctx, ready, meshes, real_curve)
    time.sleep(0.3)
    for _ in range(40):
        peer.exchange(True)
    rss_start = rss_mb(proc.pid)
    rss_peak = rss_start
    peer.sent = peer.received = 0
    peer.start()
    dealer = ctx.socket(zmq.DEALER)
    dealer.setsockopt(zmq.LINGER, 0)
    dealer.setsockopt(zmq.RCVHWM, 1_000_000)
    dealer.setsockopt(zmq.SNDHWM, 1_000_000)
    if client_curve is not None:
        client_curve.apply(dealer)
    dealer.connect(ready["input"])
    fuzz = Fuzzer(random.Random(seed), meshes[0], bundle.parent)
    sent = Counter[str]()
    answers = Counter[str]()
    expected_replies = 0
    crashes = 0
    t0 = time.monotonic()
    next_rss = 0.0
    done = 0
    while done < count:
        n = min(BATCH, count - done)
        want = 0
        for _ in range(n):
            parts, kind = fuzz.message()
            if kind == "transport":
                # libzmq drops the connection of a part over ZMQ_MAXMSGSIZE: its own socket
                side = ctx.socket(zmq.DEALER)
                side.setsockopt(zmq.LINGER, 200)
                if client_curve is not None:
                    client_curve.apply(side)
                side.connect(ready["input"])
                side.send_multipart(parts)
                side.close()
                sent["transport"] += 1
                continue
            dealer.send_multipart(parts)
            sent[kind] += 1
            if kind == "reply":
                want += 1
        if stranger is not None and fuzz.rng.random() < 0.02:
            side = ctx.socket(zmq.DEALER)
            side.setsockopt(zmq.LINGER, 0)
            stranger.apply(side)
            side.connect(ready["input"])
            side.send(protocol.encode_schema_request("fz"))
            side.close()
            sent["transport"] += 1  # an extra message, refused at the handshake
        # A sentinel closes the batch: the server handles one peer's messages in order, so
        # once its reply is here every message before it has been handled (a reload's reply
        # may still come: its work runs in the background).
        dealer.send(protocol.encode_schema_request("sync"))
        sent["reply"] += 1
        expected_replies += want + 1
        end = time.monotonic() + 30
        synced = False
        while not synced and time.monotonic() < end:
            if not dealer.poll(100):
                continue
            raw = dealer.recv_multipart()
            answers["reply"] += 1
            try:
                reply = protocol.decode_reply(raw[0])
            except protocol.FrameError:
                answers["undecodable"] += 1
                continue
            answers[reply["type"]] += 1
            synced = reply.get("stream") == "sync"
        if not synced:
            answers["sync_timeouts"] += 1
        done += n
        if time.monotonic() >= next_rss:
            next_rss = time.monotonic() + 0.5
            if proc.poll() is not None:
                crashes += 1
                break
            rss_peak = max(rss_peak, rss_mb(proc.pid))
    # Late replies (reloads): until the socket has been quiet for 2 s.
    while dealer.poll(2000):
        dealer.recv_multipart()
        answers["reply"] += 1
    peer.stop.set()
    peer.join(5)
    seconds = time.monotonic() - t0
    rss_peak = max(rss_peak, rss_mb(proc.pid))
    alive = proc.poll() is None
    tel = telemetry(ctx, ready, client_curve, "fz") if alive else {}
    server_counts = tel.get("server", {}).get("rejected_by_reason", {})
    stream_errors = int((tel.get("rejected_by_reason") or {}).get("processing_error", 0))
    # A mesh the server kept (processed, dropped, stale or lost to a processing error) has no
    # reply; every other message of the fuzzer's has exactly one.
    kept = sum(int(tel.get(k) or 0) for k in ("processed", "dropped", "stale")) + stream_errors
    fuzzer_messages = sent["mesh"] + sent["any"] + sent["reply"]
    unaccounted = fuzzer_messages - answers["reply"] - kept
    catch_all = int(server_counts.get("processing_error", 0)) - stream_errors
    crashes += (0 if alive else 1) + max(catch_all, 0)
    proc.terminate()
    try:
        proc.wait(10)
    except subprocess.TimeoutExpired:
        crashes += 1  # a server that does not stop on SIGTERM counts as a crash
        proc.kill()
        proc.wait()
    log.close()
    dealer.close(0)
    peer.close()
    ctx.term()
    return {"curve": curve_on, "sent": fuzzer_messages + sent["transport"],
            "sent_by_kind": dict(sent), "replies": dict(answers), "kept_by_server": kept,
            "unaccounted": unaccounted, "crashes": crashes, "seconds": seconds,
            "rss_start_mb": rss_start, "rss_peak_mb": rss_peak,
            "server_rejected_by_reason": server_counts,
            "valid_frames_sent": peer.sent, "valid_frames_received": peer.received,
            "valid_frames_bit_exact": peer.exact, "valid_frames_mismatched": peer.mismatched}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--messages", type=int, default=1_000_000, help="in all, over the modes")
    parser.add_argument("--modes", nargs="+", choices=["off", "on"], default=["off", "on"],
                        help="CurveZMQ off and/or on")
    parser.add_argument("--seed", type=int, default=13)
    parser.add_argument("--out", type=Path, required=True)
    args = parser.parse_args()
    runs = []
    with tempfile.TemporaryDirectory(prefix="rigcast-fuzz-") as tmp:
        work = Path(tmp)
        bundle = build_synthetic_bundle(work / "fz.rcb", vertices=V, controls=C, inputs=40,
                                        stable=16, seed=0, fit_rms=0.002, name="fz")
        make_bomb(work / "bomb.rcb", bundle)
        keys = work / "keys"
        create_key_pair(keys, "server")
        create_key_pair(keys / "clients", "fz")
        create_key_pair(keys / "clients", "real")
        create_key_pair(keys, "stranger")
        per_mode = -(-args.messages // len(args.modes))
        for mode in args.modes:
            run = run_mode(mode == "on", per_mode, work, bundle, keys, args.seed)
            runs.append(run)
            print(f"CURVE {mode}: sent {run['sent']} in {run['seconds']:.0f} s, crashes "
                  f"{run['crashes']}, unaccounted {run['unaccounted']}, RSS {run['rss_start_mb']:.0f}"
                  f" -> peak {run['rss_peak_mb']:.0f} MB, second peer {run['valid_frames_bit_exact']}"
                  f" of {run['valid_frames_received']} bit-exact", flush=True)
    summary = {
        "sent": sum(r["sent"] for r in runs),
        "crashes": sum(r["crashes"] for r in runs),
        "unaccounted": sum(r["unaccounted"] for r in runs),
        "rss_start_mb": max(r["rss_start_mb"] for r in runs),
        "rss_peak_mb": max(r["rss_peak_mb"] for r in runs),
        "rss_peak_over_start_mb": max(r["rss_peak_mb"] - r["rss_start_mb"] for r in runs),
        "valid_frames_received": sum(r["valid_frames_received"] for r in runs),
        "valid_frames_bit_exact": sum(r["valid_frames_bit_exact"] for r in runs),
        "valid_frames_mismatched": sum(r["valid_frames_mismatched"] for r in runs),
        "runs": runs,
    }
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "fuzz.json").write_text(json.dumps(summary, indent=2))
    print(f"wrote {args.out / 'fuzz.json'}")


if __name__ == "__main__":
    main()

"""End-to-end latency of the live server: a real server process, a real client process.

For each vertex count (default 5,000 and 20,000) this builds two synthetic bundles of that size
(export/bundling/synthetic_bundle.py: 50 linear blendshapes forward, K=256 input vertices, the
refinement on), which differ only in their inverse network:

- **trained** (the headline, what a user gets): the inverse a build trains
  (export/training/train_inverse.py, the default InverseConfig) on the synthetic rig's sampled
  poses (export/bundling/synthetic_trained.py), so the network lands near each frame's solution
  and the refinement stops early (its ``tol``). The training runs once per vertex count and
  settings and is kept in ``--cache`` (default .rigcast-cache/bench), so reruns are cheap;
- **untrained** (the worst case, kept beside it): a two-layer MLP with random weights, far from
  every frame's solution, so the refinement runs all its steps and halvings.

The frames are the rig's poses with every control a little active, sensor noise of 0.15 % of the
bounding-box diagonal per coordinate and a little rigid head motion
(rigcast.live.latency_probe.pose_meshes). It then measures, in one run:

1. the transport floor: the same sockets and message sizes against an echo process that does no
   work (it receives the mesh and publishes a same-size controls message), paced at 120 fps;
2. the server on each bundle (the trained one first), paced at 120 fps for ``--duration`` seconds
   with the fit error on (after_publish):
   client send -> controls received, p50/p95/p99 (both ends are perf_counter_ns in the client
   process, so no cross-process clock is involved); the server's RSS after warm-up and at the end;
3. flat out, lockstep: the next frame goes when the previous controls arrive -> max_sustained_fps
   (frames answered per second, with never more than one frame in flight); the same loop against
   the echo process gives ``floor_max_sustained_fps``, the ceiling the transport alone allows;
4. flat out, free-running: frames sent as fast as the socket takes them for a few seconds; the
   server must keep publishing and its RSS must stay bounded (newest frame wins, no queue). The
   server's own counters (telemetry before and after) say how many frames it received, processed,
   dropped as superseded and ignored as stale, so sent, received and published can be compared.

``--busy-poll-us N`` gives the same spin-then-block wait (runtime.messaging.sockets.wait_for_input) to the
server, the echo process and the client's wait for controls, so floor and server stay comparable.

By default the server (or echo) process is pinned to CPU 0 and the client to CPU 1 with
os.sched_setaffinity, so they do not steal each other's core. ``--curve`` turns CurveZMQ
(RFC 26) on for the server, the echo process and the client alike (fresh keys made with
runtime/trust/keys.py), so the floor and the server are measured with the same encryption.
``--realign N`` passes the server its realignment passes (default 1, the server's own).
``--inverse trained untrained`` chooses the rows (default both); ``--train-steps N`` shortens
the training (smoke runs only: a short training is not what a user gets).
``--out DIR`` writes DIR/latency.json as {"runs": [{...}, ...]}, one run per vertex count: the
floor's fields, the headline bundle's server fields at the top level (``inverse`` names it:
"trained" unless only the untrained row was asked for), with ``ratio_p50_vs_floor`` and
``ratio_p99_vs_floor_p99`` against the floor of the same run, and the untrained row's server
fields, ratios included, under ``"untrained"`` (against the same floor); ``trained_inverse``
says how the trained network was made (steps, the training's seconds, its held-out mesh error
through the rig, whether it came from the cache) and
``noise_frac`` the frames' noise.

    python bench/latency.py --duration 60 --out bench/out
    python bench/latency.py --vertices 20000 --duration 30 --curve
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.trust.keys import ClientCurve, create_key_pair

# The measuring code is the package's, shared with `rigcast latency-check`.
from rigcast.live.latency_probe import NOISE_FRAC, Client, echo_main, ms_percentiles, pose_meshes

CONTROLS, INPUTS, STABLE, HIDDEN, SEED = 50, 256, 128, 256, 7
STREAM = "bench"
FPS = 120.0
WARMUP_S = 3.0
INVERSES = ("trained", "untrained")
CACHE = Path(".rigcast-cache") / "bench"


def add_inverse_options(parser: argparse.ArgumentParser) -> None:
    """The bundles' inverse options, shared with bench/pipeline_stages.py."""
    parser.add_argument("--inverse", nargs="+", choices=INVERSES, default=list(INVERSES),
                        help="the bundles' inverse networks, the first the headline (default: "
                        "trained, then untrained, the worst case)")
    parser.add_argument("--cache", type=Path, default=CACHE,
                        help="where the trained inverse is kept between runs (default %(default)s)")
    parser.add_argument("--train-steps", type=int, default=None,
                        help="the trained inverse's steps (default: the build's; smoke runs only)")


# --- client process --------------------------------------------------------------------------

def make_meshes(vertices: int, count: int = 32) -> list[np.ndarray]:
    """Rig poses with sensor noise and a little rigid head motion, so stabilisation does real
    work (the recipe is rigcast.live.latency_probe.pose_meshes, which `rigcast latency-check`
    draws too)."""
    rig = make_synthetic_rig(vertices, CONTROLS, inputs=INPUTS, stable=STABLE, seed=SEED)
    return pose_meshes(rig.evaluate, rig.schema.lower, rig.schema.upper, count)


def client_main(args: argparse.Namespace) -> None:
    endpoints = json.loads(Path(args.endpoints).read_text())
    curve = (ClientCurve.from_files(args.curve_keys / "server.key",
                                    args.curve_keys / "clients" / "bench.key_secret")
             if args.curve_keys is not None else None)
    client = Client(endpoints, make_meshes(args.vertices[0]), args.busy_poll_us * 1000, curve)
    client.handshake()
    result: dict[str, Any] = {}
    lat, lost = client.paced(args.duration, FPS, Path(args.result).with_suffix(".warm"))
    result["latency_ns"] = lat
    result["lost"] = lost
    Path(args.result).with_suffix(".paced").write_text("done")  # the parent reads RSS now
    if args.mode == "echo":
        # the same lockstep loop against a process that does no work: the transport's own ceiling
        result["max_sustained_fps"] = client.lockstep(args.flat_seconds)
    if args.mode == "server":
        client.recv_controls(None, 200)  # pick up a telemetry message of the paced window
        result["telemetry"] = client.telemetry
        result["max_sustained_fps"] = client.lockstep(args.flat_seconds)
        result["blast"] = client.blast(args.flat_seconds)
        client.send()
        result["alive_after_blast"] = client.recv_controls(client.frame, 2000) is not None
    Path(args.result).write_text(json.dumps(result))


# --- orchestration ---------------------------------------------------------------------------

def rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024.0
    raise RuntimeError(f"no VmRSS for pid {pid}")


def pin(pid: int, cpu: int, enabled: bool) -> None:
    if enabled and cpu < (os.cpu_count() or 1):
        os.sched_setaffinity(pid, {cpu})


def start_and_wait(cmd: list[str], ready: Path, pin_cpu: int, args: argparse.Namespace
                   ) -> tuple[subprocess.Popen[bytes], dict[str, Any]]:
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL)
    pin(proc.pid, pin_cpu, args.pin)
    deadline = time.monotonic() + 60
    while not ready.exists():
        if proc.poll() is not None or time.monotonic() > deadline:
            raise RuntimeError(f"{cmd[:4]} did not start")
        time.sleep(0.05)
    time.sleep(0.05)
    return proc, json.loads(ready.read_text())


def run_client(mode: str, endpoints_file: Path, vertices: int, duration: float, work: Path,
               args: argparse.Namespace, server_pid: int) -> tuple[dict[str, Any], float, float]:
    result = work / f"{mode}-{vertices}.json"
    cmd = [sys.executable, __file__, "--role", "client", "--mode", mode, "--endpoints",
           str(endpoints_file), "--vertices", str(vertices), "--duration", str(duration),
           "--flat-seconds", str(args.flat_seconds), "--busy-poll-us", str(args.busy_poll_us),
           "--result", str(result), *keys_args(args)]
    proc = subprocess.Popen(cmd)
    pin(proc.pid, 1, args.pin)
    warm = result.with_suffix(".warm")
    while not warm.exists() and proc.poll() is None:
        time.sleep(0.02)
    rss_warm = rss_mb(server_pid)
    marker = result.with_suffix(".paced")
    while not marker.exists() and proc.poll() is None:
        time.sleep(0.05)
    rss_end = rss_mb(server_pid)
    if proc.wait(duration + 120) != 0:
        raise RuntimeError(f"client ({mode}) failed")
    return json.loads(result.read_text()), rss_warm, rss_end


def keys_args(args: argparse.Namespace) -> list[str]:
    return [] if args.curve_keys is None else ["--curve-keys", str(args.curve_keys)]


def bench_bundle(vertices: int, inverse: str, work: Path, cache: Path | None,
                 train_steps: int | None = None, refine: bool = True,
                 fit_rms: float | None = 10.0) -> tuple[Path, dict[str, Any] | None]:
    """The bench's synthetic bundle of ``vertices`` with the ``inverse`` "trained" (trained on
    the rig, kept in ``cache``; ``train_steps`` None: the default schedule) or "untrained" (the
    random MLP) -> (its path, how the trained network was made or None)."""
    made = None
    graph = None
    if inverse == "trained":
        # torch only here: the untrained row, the client and the echo never import it
        from rigcast.export.bundling.synthetic_trained import trained_inverse
        from rigcast.export.training.train_inverse import InverseConfig

        config = InverseConfig() if train_steps is None else InverseConfig(steps=train_steps)
        rig = make_synthetic_rig(vertices, CONTROLS, inputs=INPUTS, stable=STABLE, seed=SEED)
        trained = trained_inverse(rig, cache, config)
        graph = trained.onnx
        made = {"steps": trained.steps, "seconds": trained.seconds,
                "mean_err": trained.mean_err, "mean_err_pct_diag": trained.mean_err_pct_diag,
                "cached": trained.cached}
    elif inverse != "untrained":
        raise ValueError(f"inverse must be one of {INVERSES}, got {inverse!r}")
    path = build_synthetic_bundle(work / f"synthetic-{vertices}-{inverse}-{refine}.rcb",
                                  vertices=vertices, controls=CONTROLS, inputs=INPUTS,
                                  stable=STABLE, inverse="mlp", hidden=HIDDEN, seed=SEED,
                                  fit_rms=fit_rms, name=f"synthetic-{vertices}", refine=refine,
                                  inverse_onnx=graph)
    return path, made


def measure(vertices: int, args: argparse.Namespace, work: Path) -> dict[str, Any]:
    bundles = {inv: bench_bundle(vertices, inv, work, args.cache, args.train_steps)
               for inv in args.inverse}
    # Floor: echo process.
    ready = work / f"echo-{vertices}.ready"
    echo, _ = start_and_wait([sys.executable, __file__, "--role", "echo", "--ready", str(ready),
                              "--busy-poll-us", str(args.busy_poll_us), *keys_args(args)],
                             ready, 0, args)
    try:
        floor, _, _ = run_client("echo", ready, vertices, args.floor_duration, work, args,
                                 echo.pid)
    finally:
        echo.kill()
        echo.wait()
    f50, f95, f99 = ms_percentiles(floor["latency_ns"])
    run: dict[str, Any] = {
        "vertices": vertices,
        "duration_s": args.duration,
        "fps": FPS,
        "fit_error": "after_publish",
        "realign": args.realign,
        "noise_frac": NOISE_FRAC,
        "floor_p50_ms": f50,
        "floor_p95_ms": f95,
        "floor_p99_ms": f99,
        "floor_max_sustained_fps": floor["max_sustained_fps"],
    }
    rows = {inv: serve(path, vertices, inv, args, work, f50, f99)
            for inv, (path, _) in bundles.items()}
    head, *rest = args.inverse
    run.update(rows[head])
    for inv in rest:
        run[inv] = rows[inv]
    if "trained" in bundles:
        run["trained_inverse"] = bundles["trained"][1]
    run.update({"pinned": bool(args.pin), "curve": args.curve_keys is not None,
                "busy_poll_us": int(args.busy_poll_us)})
    return run


def serve(bundle: Path, vertices: int, inverse: str, args: argparse.Namespace, work: Path,
          f50: float, f99: float) -> dict[str, Any]:
    """The real server on ``bundle``: its row of the run, ratios against the floor's p50 and
    p99 (ms) measured in the same run."""
    ready = work / f"server-{vertices}-{inverse}.ready"
    cmd = [sys.executable, "-m", "rigcast.runtime.serve.serve_main", "--bundle", f"{STREAM}={bundle}",
           "--input", "tcp://127.0.0.1:*", "--output", "tcp://127.0.0.1:*", "--ready-file",
           str(ready), "--fit-error-schedule", "after_publish", "--telemetry-hz", "10",
           "--window", "1000", "--log-level", "WARNING",
           "--busy-poll-us", str(args.busy_poll_us), "--realign", str(args.realign)]
    if args.curve_keys is not None:
        cmd += ["--curve-secret-key", str(args.curve_keys / "server.key_secret"),
                "--authorized-keys", str(args.curve_keys / "clients")]
    server, _ = start_and_wait(cmd, ready, 0, args)
    try:
        res, rss_warm, rss_end = run_client("server", ready, vertices, args.duration, work,
                                            args, server.pid)
        rss_after_blast = rss_mb(server.pid)
    finally:
        server.terminate()
        server.wait(10)
    p50, p95, p99 = ms_percentiles(res["latency_ns"])
    tel = res.get("telemetry") or {}
    stages = {k: v["p50_ms"] for k, v in tel.get("latency", {}).items()}
    return {
        "inverse": inverse,
        "frames": len(res["latency_ns"]),
        "p50_ms": p50,
        "p95_ms": p95,
        "p99_ms": p99,
        "max_ms": float(np.max(res["latency_ns"]) / 1e6),
        "ratio_p50_vs_floor": p50 / f50,
        "ratio_p99_vs_floor_p99": p99 / f99,
        "lost": res["lost"],
        "max_sustained_fps": res["max_sustained_fps"],
        "blast": res["blast"],
        "alive_after_blast": res["alive_after_blast"],
        "rss_warm_mb": rss_warm,
        "rss_end_mb": rss_end,
        "rss_growth_mb": rss_end - rss_warm,
        "rss_after_blast_mb": rss_after_blast,
        "stage_median_ms": stages,
        # fits skipped by the end of the paced run (input waiting, or over fit_error_max_share)
        "fit_error_skipped_paced": (tel.get("fit_error") or {}).get("skipped"),
        "processed_paced": tel.get("processed"),
    }


def print_row(row: dict[str, Any]) -> None:
    print(f"  server ({row['inverse']}) p50 {row['p50_ms']:.3f} "
          f"p95 {row['p95_ms']:.3f} p99 {row['p99_ms']:.3f} ms | ratio p50 "
          f"{row['ratio_p50_vs_floor']:.2f} p99 {row['ratio_p99_vs_floor_p99']:.2f} | lockstep "
          f"{row['max_sustained_fps']:.0f} fps | blast sent {row['blast']['sent_fps']:.0f}/s "
          f"server received {row['blast']['server_received_fps']:.0f}/s published "
          f"{row['blast']['published_fps']:.0f}/s | RSS growth "
          f"{row['rss_growth_mb']:+.2f} MB (after blast {row['rss_after_blast_mb']:.1f} MB)")
    print("    stage medians (ms): " + ", ".join(
        f"{k} {v:.3f}" for k, v in row["stage_median_ms"].items() if v is not None))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--role", choices=["bench", "echo", "client"], default="bench",
                        help=argparse.SUPPRESS)
    parser.add_argument("--vertices", type=int, nargs="+", default=[5000, 20000])
    parser.add_argument("--duration", type=float, default=60.0,
                        help="seconds of the paced 120 fps run (after a 3 s warm-up)")
    parser.add_argument("--floor-duration", type=float, default=None,
                        help="seconds of the paced echo run (default: a third of --duration)")
    parser.add_argument("--flat-seconds", type=float, default=5.0,
                        help="seconds of each flat-out run")
    parser.add_argument("--no-pin", dest="pin", action="store_false",
                        help="do not pin server and client to CPUs 0 and 1")
    parser.add_argument("--busy-poll-us", type=int, default=0,
                        help="spin-then-block budget for server, echo and client waits (µs)")
    parser.add_argument("--curve", action="store_true",
                        help="CurveZMQ on (server, echo and client), floor and server alike")
    parser.add_argument("--realign", type=int, default=1,
                        help="the server's realignment passes (serve --realign; default 1, its own)")
    add_inverse_options(parser)
    parser.add_argument("--out", type=Path, default=None)
    parser.add_argument("--curve-keys", type=Path, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--mode", default="server", help=argparse.SUPPRESS)
    parser.add_argument("--endpoints", help=argparse.SUPPRESS)
    parser.add_argument("--ready", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--result", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.role == "echo":
        echo_main(args.ready, args.busy_poll_us * 1000, args.curve_keys)
        return
    if args.role == "client":
        client_main(args)
        return
    if args.floor_duration is None:
        args.floor_duration = max(args.duration / 3, 5.0)
    runs = []
    with tempfile.TemporaryDirectory(prefix="rigcast-latency-") as tmp:
        if args.curve:
            args.curve_keys = Path(tmp) / "keys"
            create_key_pair(args.curve_keys, "server")
            create_key_pair(args.curve_keys / "clients", "bench")
        for v in args.vertices:
            print(f"V={v}: floor {args.floor_duration:.0f} s, then per bundle "
                  f"({', '.join(args.inverse)}) paced {args.duration:.0f} s, flat out 2 x "
                  f"{args.flat_seconds:.0f} s ...", flush=True)
            run = measure(v, args, Path(tmp))
            runs.append(run)
            print(f"  floor (echo) p50 {run['floor_p50_ms']:.3f} p99 {run['floor_p99_ms']:.3f} ms, "
                  f"lockstep {run['floor_max_sustained_fps']:.0f} fps")
            print_row(run)
            for inv in args.inverse[1:]:
                print_row(run[inv])
    if args.out is not None:
        args.out.mkdir(parents=True, exist_ok=True)
        (args.out / "latency.json").write_text(json.dumps({"runs": runs}, indent=2))
        print(f"wrote {args.out / 'latency.json'}")


if __name__ == "__main__":
    main()

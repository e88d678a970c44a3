"""The live pipeline's own cost per frame, in one process, with no network and warm caches.

    python bench/pipeline_stages.py [--vertices 5000 20000] [--frames 3000] [--no-refine]
                                    [--realign N] [--inverse trained untrained] [--out DIR]

For each vertex count it builds the same synthetic bundles as bench/latency.py, the trained
inverse (the headline, what a user gets; kept in ``--cache`` between runs) and the untrained one
(the worst case: the refinement runs all its steps), and on each, with bench/latency.py's frames
(rig poses with sensor noise and head motion), runs the server's per-frame code (protocol
decode, then runtime/solve/pipeline.py StreamState.process, the solve core on a batch of one:
stabilise, infer (with the bundle's refinement steps unless ``--no-refine``), filter, clamp,
publish with the head pose on a PUB socket with no subscriber) back to back, the first 500
frames being warm-up; ``--realign N`` sets the stream's realignment passes (default 1, the
server's). It prints per-stage medians and p99 in microseconds, and
beside them the frame's thread CPU time (``time.thread_time_ns`` around decode and
``process``: what the frame costs the core it runs on, which a machine loaded by others
disturbs far less than the wall clock) and each graph's onnxruntime calls and thread time per
frame (the graphs' arithmetic; the rest is the Python and numpy around them). Set beside
bench/latency.py, it separates what the code costs from what waking up and crossing the
sockets costs: the paced server's stage medians there include cold caches after each 8 ms idle
gap and the ZeroMQ I/O thread's work on the same core. The refinement graph's calls per frame
say what the refinement does: one evaluation at the network's answer in each solve (two with
the realignment), then one per step and halving tried.
``--out DIR`` writes DIR/pipeline_stages.json as {"runs": [{"vertices", "frames", "refine",
"realign", "inverse", "median_us": {...}, "p99_us": {...}, "thread_us": {"median", "p99"},
"graphs": {name: {"calls_per_frame", "thread_us_per_frame"}}, "untrained": {"inverse",
"median_us", "p99_us", "thread_us", "graphs"}}]}: the headline bundle's figures at the top level
(``inverse`` names it: "trained" unless only the untrained row was asked for), the untrained
row's under ``"untrained"`` (the graphs' figures are means over the measured frames; the thread
time's are quantiles).
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import zmq
from latency import (  # bench/latency.py, beside this
    CACHE,
    INVERSES,
    add_inverse_options,
    bench_bundle,
    make_meshes,
)
from rigcast.runtime.messaging import protocol
from rigcast.runtime.serve.config import StreamConfig
from rigcast.runtime.serve.telemetry import STAGES
from rigcast.runtime.solve.pipeline import StreamState, load_stream_model

WARMUP = 500


def count_sessions(model: Any) -> dict[str, list[int]]:
    """Wraps ``run`` of the model's onnxruntime sessions (on the session objects): the returned
    {graph: [calls, thread ns]} counts them from then on."""
    inverse = model.inverse
    found = {"inverse": inverse.session, "forward": model.forward.session}
    if inverse.moment_form is not None:
        found["project"] = inverse.moment_form.project
        found["refine"] = inverse.moment_form.refine
    counts: dict[str, list[int]] = {name: [0, 0] for name in found}
    for name, session in found.items():
        def timed(*args: Any, _run: Any = session.run, _into: list[int] = counts[name],
                  **kwargs: Any) -> Any:
            start = time.thread_time_ns()
            try:
                return _run(*args, **kwargs)
            finally:
                _into[0] += 1
                _into[1] += time.thread_time_ns() - start
        session.run = timed
    return counts


def measure(vertices: int, frames: int, work: Path, refine: bool = True,
            realign: int = 1, inverses: tuple[str, ...] = INVERSES, cache: Path | None = CACHE,
            train_steps: int | None = None) -> dict[str, Any]:
    """One vertex count: the first of ``inverses`` at the top level, the others under their
    names."""
    meshes = make_meshes(vertices)
    rows = {}
    for inverse in inverses:
        path, _ = bench_bundle(vertices, inverse, work, cache, train_steps, refine=refine,
                               fit_rms=None)
        rows[inverse] = {"inverse": inverse, **measure_bundle(path, meshes, frames, realign)}
    head, *rest = inverses
    run = {"vertices": vertices, "frames": frames, "refine": refine, "realign": realign,
           **rows[head]}
    for inverse in rest:
        run[inverse] = rows[inverse]
    return run


def measure_bundle(path: Path, meshes: list[np.ndarray], frames: int, realign: int
                   ) -> dict[str, Any]:
    """The per-frame code on one bundle: stage medians and p99, thread time, graphs."""
    vertices = meshes[0].shape[0]
    model = load_stream_model(path, threads=1, threshold=None, factor=3.0)
    state = StreamState(StreamConfig(stream="bench", bundle=path, realign=realign), model,
                        window=1000)
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    pub.setsockopt(zmq.SNDHWM, 1000)
    pub.bind("tcp://127.0.0.1:*")
    rows = []
    cpu = []
    counts: dict[str, list[int]] = {}
    try:
        for i in range(frames + WARMUP):
            if i == WARMUP:
                counts = count_sessions(model)
            wire = protocol.encode_mesh("bench", i, i * 8_333_333, meshes[i % len(meshes)])
            t0 = time.perf_counter_ns()
            c0 = time.thread_time_ns()
            header = protocol.decode_header(wire[0])
            mesh = protocol.decode_mesh(header, wire[1], expected_vertices=vertices,
                                        max_bytes=1 << 26)
            t1 = time.perf_counter_ns()
            result = state.process(mesh, time.time_ns(), t0, t1 - t0, pub.send_multipart)
            if i >= WARMUP:
                rows.append(result.stage_ns)
                cpu.append(time.thread_time_ns() - c0)
    finally:
        pub.close()
        ctx.term()
    us = np.asarray(rows, dtype=np.float64) / 1e3
    med = dict(zip(STAGES, np.median(us, axis=0).tolist(), strict=True))
    p99 = dict(zip(STAGES, np.percentile(us, 99, axis=0).tolist(), strict=True))
    thread_us = np.asarray(cpu, dtype=np.float64) / 1e3
    graphs = {name: {"calls_per_frame": n / frames, "thread_us_per_frame": ns / 1e3 / frames}
              for name, (n, ns) in counts.items()}
    return {"median_us": med, "p99_us": p99,
            "thread_us": {"median": float(np.median(thread_us)),
                          "p99": float(np.percentile(thread_us, 99))},
            "graphs": graphs}


def print_row(vertices: int, row: dict[str, Any], args: argparse.Namespace) -> None:
    tag = (f"V={vertices} {row['inverse']} refine={'off' if args.no_refine else 'on'} "
           f"realign={args.realign}")
    for label, key in (("median", "median_us"), ("p99", "p99_us")):
        cells = ", ".join(f"{s} {row[key][s]:.1f}" for s in STAGES)
        print(f"{tag} {label} (us): {cells}")
    graphs = ", ".join(f"{g} {d['calls_per_frame']:.2f} calls {d['thread_us_per_frame']:.0f}"
                       for g, d in row["graphs"].items())
    print(f"{tag} frame thread CPU (us): median {row['thread_us']['median']:.1f}, p99 "
          f"{row['thread_us']['p99']:.1f}; onnxruntime per frame (calls, thread us): {graphs}")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--vertices", type=int, nargs="+", default=[5000, 20000])
    ap.add_argument("--frames", type=int, default=3000, help="measured frames after warm-up")
    ap.add_argument("--out", type=Path, help="folder for pipeline_stages.json")
    ap.add_argument("--no-refine", action="store_true",
                    help="a bundle without the refinement graph (the inverse network alone)")
    ap.add_argument("--realign", type=int, default=1,
                    help="the stream's realignment passes (StreamConfig.realign)")
    add_inverse_options(ap)
    args = ap.parse_args(argv)
    runs = []
    with tempfile.TemporaryDirectory(prefix="rigcast-stages-") as tmp:
        for v in args.vertices:
            run = measure(v, args.frames, Path(tmp), refine=not args.no_refine,
                          realign=args.realign, inverses=tuple(args.inverse), cache=args.cache,
                          train_steps=args.train_steps)
            runs.append(run)
            for row in (run, *(run[inv] for inv in args.inverse[1:])):
                print_row(v, row, args)
    if args.out is not None:
        args.out.mkdir(parents=True, exist_ok=True)
        (args.out / "pipeline_stages.json").write_text(json.dumps({"runs": runs}, indent=2))
        print(f"wrote {args.out / 'pipeline_stages.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""The live subcommands' parsers and handlers: serve, send, watch, record, osc, keys.
Each handler makes one library call; heavy modules are imported inside it."""

from __future__ import annotations

import argparse
from pathlib import Path

from rigcast.commands.cli_common import (
    DEFAULT_FPS,
    FIRST_STREAM,
    SCHEMA_TO,
    Subparsers,
    add_endpoints,
    add_limits,
    sub,
)


def add_serve(subs: Subparsers) -> None:
    from rigcast.runtime.serve import serve_main

    p = sub(
        subs, "serve", "serve bundles live over ZeroMQ",
        "Serve one or more bundles: mesh frames in on a ROUTER socket, controls, telemetry and "
        "events out on a PUB socket (docs/protocol.md). Binds to loopback unless --allow-remote "
        "is given; put a remote-facing server on a closed stage network only.",
        "  rigcast serve --bundle face.rcb                 # stream id 'face'\n"
        "  rigcast serve --bundle actor1=face.rcb --bundle actor2=arm.rcb\n"
        "  rigcast serve --bundle face.rcb --input tcp://127.0.0.1:6000 "
        "--output tcp://127.0.0.1:6001\n"
        "  rigcast serve --config stage.toml\n",
        cmd_serve,
        show_defaults=False,  # the server's flags state their defaults themselves
    )
    serve_main.add_serve_arguments(p)
    p.add_argument("--quiet", action="store_true",
                   help="print nothing at start and no status lines (errors still print)")
    p.add_argument("--status-every", type=float, default=5.0, metavar="SECONDS",
                   help="seconds between status lines (default: 5)")


def add_keys(subs: Subparsers) -> None:
    p = sub(
        subs, "keys", "make a CurveZMQ key pair for a server or a client",
        "Write FOLDER/NAME.key (the public key, to share) and FOLDER/NAME.key_secret (the secret "
        "key, readable by you only). A server on a stage network needs a pair of its own and a "
        "folder of its clients' public keys; each client needs a pair and the server's public key.",
        "  rigcast keys keys --name server\n"
        "  rigcast keys keys/clients --name capture\n",
        cmd_keys,
    )
    p.add_argument("folder", type=Path, help="folder to write the two files in")
    p.add_argument("--name", required=True, help="file name of the pair, e.g. server or capture")


def add_send(subs: Subparsers) -> None:
    p = sub(
        subs, "send", "stream a take to a server, with stage rehearsal options",
        "Stream a take to a running server at a frame rate. Before sending it asks the server for "
        "its schema and stops if the take's vertex count is not the bundle's. The rehearsal "
        "options spoil the take on purpose, to see how a stage setup copes.",
        "  rigcast send take.npz\n"
        "  rigcast send frames/ --fps 30 --loop --duration 60\n"
        "  rigcast send take.npz --head-motion --noise 0.002 --drop-rate 0.05 \\\n"
        "      --corrupt-rate 0.01\n",
        cmd_send,
    )
    p.add_argument("take", type=Path, help="take: .npy/.npz, a folder of .obj, or .gltf/.glb")
    add_endpoints(p, to_help="the server's input endpoint",
                  from_help="the server's output endpoint, to learn the stream id when not given",
                  stream_help=FIRST_STREAM)
    p.add_argument("--fps", type=float, default=None,
                   help=f"frame rate (default: the take's own, else {DEFAULT_FPS:g}, said when "
                        "assumed)")
    p.add_argument("--loop", action="store_true", help="start over at the end of the take")
    add_limits(p)
    p.add_argument("--head-motion", action="store_true",
                   help="add smooth rigid head motion (a few degrees, ~2%% of the mesh size)")
    p.add_argument("--noise", type=float, default=0.0,
                   help="Gaussian noise per vertex, as a fraction of the bounding-box diagonal")
    p.add_argument("--drop-rate", type=float, default=0.0, help="fraction of frames not sent")
    p.add_argument("--corrupt-rate", type=float, default=0.0,
                   help="fraction of frames sent corrupt (NaN, wrong vertex count, bad header)")
    p.add_argument("--seed", type=int, default=0, help="seed of the rehearsal's randomness")
    p.add_argument("--timeout", type=float, default=5.0,
                   help="seconds to wait for the schema reply")
    p.add_argument("--timecode", default=None, metavar="HH:MM:SS:FF",
                   help="stamp frames with SMPTE timecode from this one on (HH:MM:SS;FF for "
                        "drop-frame); it counts with the frame numbers")
    p.add_argument("--tc-rate", default=None, metavar="RATE",
                   help="the timecode's rate: 23.976, 24, 25, 29.97, 30, 47.952, 48, 50, 59.94 or "
                        "60 (default: the --fps rate when it is one)")


def add_watch(subs: Subparsers) -> None:
    p = sub(
        subs, "watch", "the operator view: every stream's state, live, in the terminal",
        "Subscribe to a server's publish endpoint and show each stream's health as a state with "
        "a reason (live; server silent; no input for N s; off-manifold now; latency over the "
        "frame budget at the stream's rate; bundle quality poor), the fit error against the "
        "stream's threshold, per-stage latency p50/p95/p99, input fps, drops and rejects by "
        "reason, and the most active controls as bars. --compact shows one line per actor (8 "
        "actors fit an 80 x 24 terminal). Only the publish endpoint is needed; --to, when it "
        "answers, names the controls in the bars. Ctrl-C ends it.",
        "  rigcast watch\n"
        "  rigcast watch --compact                       # one line per actor\n"
        "  rigcast watch --from tcp://10.0.0.5:5571 --to ''   # publish side only\n"
        "  rigcast watch --once --plain  # one snapshot as text, then exit (scripts, CI)\n"
        "  rigcast watch --plain --duration 30\n",
        cmd_watch,
    )
    add_endpoints(p, to_help=SCHEMA_TO + " ('' for none)",
                  from_help="the server's output (PUB) endpoint",
                  stream_help="show only this stream (default: all)")
    p.add_argument("--once", action="store_true",
                   help="print one snapshot after telemetry arrives, then exit")
    add_limits(p, frames=False)
    p.add_argument("--compact", action="store_true", help="one line per actor")
    p.add_argument("--top", type=int, default=8,
                   help="how many of the most active controls to show")
    p.add_argument("--timeout", type=float, default=10.0,
                   help="with --once: seconds to wait for the first telemetry")
    p.add_argument("--silent-after", type=float, default=1.0,
                   help="seconds without any message before the server counts as silent")
    p.add_argument("--plain", action="store_true", help="plain text lines instead of the live view")


def add_record(subs: Subparsers) -> None:
    p = sub(
        subs, "record", "record every stream's published controls to NPZ, JSON or CSV",
        "Subscribe to a server's publish endpoint and record the controls of every stream (or "
        "the ones named with --stream) in one process, until --duration, --frames or Ctrl-C: "
        "the sender's frame numbers, times from the sender's timestamps, the flag bits, and "
        "the head pose the server's telemetry carries. .npz keeps everything; .json the same "
        "as text; .csv writes one file per stream (the columns `rigcast solve` writes) and a "
        ".meta.json beside it. The take's name (--take, default the file's name) is in the "
        "file. Only the publish endpoint is needed; the control names are asked from --to "
        "when it answers, else the controls are named by index.",
        "  rigcast record -o take12.npz --duration 60\n"
        "  rigcast record -o live.csv --stream actor2 --frames 600\n"
        "  rigcast record -o scene3.npz --stream actor1 --stream actor2 --take scene3_take2\n"
        "  rigcast record -o mon.json --from tcp://10.0.0.5:5571 --to ''   # publish side only\n"
        "  rigcast record -o day1.npz --meshes   # server: rigcast serve --publish-meshes raw\n",
        cmd_record,
    )
    p.add_argument("-o", "--out", type=Path, required=True, help="output file: .npz, .json or .csv")
    add_endpoints(p, to_help="the server's input endpoint, asked for the control names ('' "
                             "for none)",
                  from_help="the server's output (PUB) endpoint",
                  stream_help="record this stream (repeat for several; default: every stream)",
                  many_streams=True)
    p.add_argument("--take", default=None, help="the take's name (default: the output's name)")
    add_limits(p)
    p.add_argument("--timeout", type=float, default=2.0,
                   help="seconds to wait for each stream's schema reply")
    p.add_argument("--meshes", action="store_true",
                   help="also keep the meshes of a server started with --publish-meshes, in "
                        "chunked NPZ beside the output that `rigcast solve` re-solves")
    p.add_argument("--mesh-chunk", type=int, default=600, metavar="FRAMES",
                   help="frames per mesh chunk file")


def add_osc(subs: Subparsers) -> None:
    p = sub(
        subs, "osc", "relay a stream's solved controls to OSC listeners",
        "Subscribe to a server's controls for one stream and send each solved frame as one OSC "
        "1.0 bundle over UDP, time-tagged with the server's publish time: one message per "
        "control (<prefix>/<stream>/<control>, float) and <prefix>/<stream>/frame (frame "
        "number, flag bits). Characters OSC addresses may not hold become '_'. Needs the "
        "`osc` extra (python-osc).",
        "  rigcast osc                                   # to 127.0.0.1:9000\n"
        "  rigcast osc --osc 127.0.0.1:7000 --prefix /tamsin --stream actor2\n",
        cmd_osc,
    )
    p.add_argument("--osc", default="127.0.0.1:9000", metavar="HOST:PORT",
                   help="where the OSC listener is")
    p.add_argument("--prefix", default="/rigcast", help="OSC address prefix")
    add_endpoints(p, to_help=SCHEMA_TO, from_help="the server's output (PUB) endpoint",
                  stream_help=FIRST_STREAM)
    add_limits(p)
    p.add_argument("--timeout", type=float, default=5.0,
                   help="seconds to wait for the schema reply")


def add_latency_check(subs: Subparsers) -> None:
    from rigcast.runtime.serve.serve_main import DeprecatedAlias

    p = sub(
        subs, "latency-check", "measure end-to-end latency of your bundle on this machine",
        "Start a server on your bundle and send it frames of its own rig from a sender process "
        "of its own, paced at --fps, after measuring the transport floor (an echo process on the same "
        "sockets) in the same run. Prints p50, p95, p99 and max end to end, the server's "
        "per-stage medians, the headroom against the frame budget at --fps and the largest "
        "rate it sustains, and writes a report (Markdown, JSON, and with matplotlib a latency "
        "histogram and latency over time). With --server, the sender here measures a server "
        "already running elsewhere (the floor stays this machine's loopback).",
        "  rigcast latency-check face.rcb\n"
        "  rigcast latency-check face.rcb --fps 120 --duration 30 --out latency-report/\n"
        "  rigcast latency-check face.rcb --server tcp://10.0.0.5:5570,tcp://10.0.0.5:5571 "
        "--stream face\n",
        cmd_latency_check,
    )
    p.add_argument("bundle", type=Path, help="bundle file (its rig's poses are the frames sent)")
    p.add_argument("--fps", type=float, default=60.0, help="frame rate of the paced runs")
    p.add_argument("--duration", type=float, default=10.0,
                   help="seconds of the paced run against the server (after the warm-up)")
    p.add_argument("--floor-duration", type=float, default=None,
                   help="seconds of the paced floor run (default: a third of --duration, >= 3)")
    p.add_argument("--flat-seconds", type=float, default=3.0,
                   help="seconds of each lockstep run (the largest sustained rate)")
    p.add_argument("--warmup", type=float, default=2.0, help="seconds sent before timing")
    p.add_argument("--server", default=None, metavar="INPUT,OUTPUT",
                   help="endpoints of a running server to measure instead of starting one")
    p.add_argument("--stream", default=None, help="the running server's stream for this bundle")
    schedules = ("after_publish", "every_n", "off")
    p.add_argument("--fit-error-schedule", choices=schedules, default="after_publish",
                   help="when the started server computes the fit error (as `rigcast serve`)")
    p.add_argument("--fit-error", dest="fit_error_schedule", action=DeprecatedAlias,
                   new="--fit-error-schedule", choices=schedules, help=argparse.SUPPRESS)
    p.add_argument("--no-pin", dest="pin", action="store_false",
                   help="do not pin the server to CPU 0 and the sender to CPU 1")
    p.add_argument("--out", type=Path, default=Path("rigcast-latency-report"),
                   help="report folder")


def cmd_latency_check(args: argparse.Namespace) -> int:
    from rigcast.commands.cli_common import say
    from rigcast.errors import EXIT_OK, UserError
    from rigcast.live.latency_check import CheckConfig, run_check, summary_lines, write_report

    server = None
    if args.server is not None:
        parts = [p.strip() for p in args.server.split(",")]
        if len(parts) != 2 or not all(p.startswith("tcp://") for p in parts):
            raise UserError(f"--server must be INPUT,OUTPUT endpoints, got {args.server!r}",
                            "e.g. --server tcp://10.0.0.5:5570,tcp://10.0.0.5:5571", code=2)
        server = (parts[0], parts[1])
    for name in ("fps", "duration", "flat_seconds", "warmup"):
        if not getattr(args, name) > 0:
            raise UserError(f"--{name.replace('_', '-')} must be > 0, got {getattr(args, name)}",
                            code=2)
    floor = args.floor_duration or max(args.duration / 3, 3.0)
    config = CheckConfig(bundle=args.bundle, fps=args.fps, duration_s=args.duration,
                         floor_duration_s=floor, flat_seconds=args.flat_seconds,
                         warmup_s=args.warmup, server=server, stream=args.stream, pin=args.pin,
                         fit_error=args.fit_error_schedule)
    result = run_check(config, say)
    for line in summary_lines(result):
        say(line)
    say(f"report: {write_report(args.out, result)}")
    return EXIT_OK


def cmd_keys(args: argparse.Namespace) -> int:
    from rigcast.live.keys import keys_from_args

    return keys_from_args(args)


def cmd_serve(args: argparse.Namespace) -> int:
    """Serve until SIGINT (exit 130, as every command) or SIGTERM (0: a service stopped
    on purpose); a second signal forces the exit at once."""
    import signal
    import threading
    from types import FrameType

    from rigcast.commands.cli_common import say
    from rigcast.errors import EXIT_INTERRUPTED, EXIT_OK, UserError
    from rigcast.live.serve_status import StatusPrinter, startup_lines
    from rigcast.runtime.serve import serve_main
    from rigcast.runtime.serve.server import Server

    if not args.status_every > 0:
        raise UserError(f"--status-every must be > 0, got {args.status_every}", code=2)
    config = serve_main.config_from_args(args)
    server = Server(config)
    got: list[int] = []

    def on_signal(signum: int, frame: FrameType | None) -> None:
        if got:
            server.force_exit = True  # close the sockets without lingering
            raise SystemExit(128 + signum)
        got.append(signum)
        server.request_stop()

    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, on_signal)
        signal.signal(signal.SIGTERM, on_signal)
    server.startup()
    if args.ready_file is not None:
        serve_main.write_ready_file(args.ready_file, server)
    status = None
    if not args.quiet:
        for line in startup_lines(config, server.input_endpoint, server.output_endpoint,
                                  None if server.metrics is None else server.metrics.url):
            say(line)
        if config.curve_secret_key is None:  # the status reader would need keys of its own
            status = StatusPrinter(server.output_endpoint, say, args.status_every)
            status.start()
            say(f"a status line every {args.status_every:g} s (--quiet to silence); Ctrl-C stops")
    try:
        server.run()
    finally:
        if status is not None:
            status.stop()
    return EXIT_INTERRUPTED if got and got[0] == signal.SIGINT else EXIT_OK


def cmd_send(args: argparse.Namespace) -> int:
    from rigcast.live.send import send_from_args

    return send_from_args(args)


def cmd_watch(args: argparse.Namespace) -> int:
    """The view until --duration (0) or Ctrl-C (KeyboardInterrupt: 130 from the caller)."""
    from rigcast.live.watch import watch_from_args

    return watch_from_args(args)


def cmd_record(args: argparse.Namespace) -> int:
    from rigcast.live.record import record_from_args

    if args.to == "":
        args.to = None
    return record_from_args(args)


def cmd_osc(args: argparse.Namespace) -> int:
    from rigcast.live.osc_out import osc_from_args

    return osc_from_args(args)

"""The ``rigcast`` command line: argument parsing, one library call per subcommand.

Nothing here computes anything. Heavy modules are imported inside the subcommand that needs them,
so ``rigcast serve --help`` never loads torch.
"""

from __future__ import annotations

import argparse
import logging
import sys
import textwrap
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import NoReturn

from rigcast import __version__
from rigcast.errors import EXIT_OK, EXIT_USAGE, run_guarded

log = logging.getLogger(__name__)

DEFAULT_INPUT = "tcp://127.0.0.1:5570"
DEFAULT_OUTPUT = "tcp://127.0.0.1:5571"
_CUT_MIN_FRAMES = 10_000  # takes this long solve with the subset fit error's cut forward graph
_DEFAULT_FPS = 60.0  # rigcast.takes.DEFAULT_FPS (kept equal by tests/test_takes.py), not imported

_DESCRIPTION = """\
rigcast turns dense mesh streams (4D capture, generative models) into a character rig's animator
controls: live on a CPU over ZeroMQ, or in batch over whole takes.

Start with `rigcast demo`: it builds the demo bundle, serves it, streams a take and writes a report.
"""

_EPILOG = """\
typical session:
  rigcast build demo:face -o face.rcb          # rig -> bundle (sample, train, export, check)
  rigcast inspect face.rcb                     # what is in it
  rigcast serve --bundle face.rcb              # live server on loopback
  rigcast send take.npz --fps 60 --loop        # stream a take to it
  rigcast watch                                # live telemetry in the terminal
  rigcast record -o live.csv --duration 10     # save the published controls
  rigcast solve face.rcb take.npz -o take.gltf # the whole take offline

exit codes: 0 success; 1 the work failed (missing or corrupt file, a take or server made for
another rig, a port in use, no answer); 2 usage (bad arguments, config or rig spec); 130 Ctrl-C.
Every error is one line on stderr: `rigcast: error: <what is wrong> — <what to do>`.
"""


class _Formatter(argparse.RawDescriptionHelpFormatter):
    """Keep the hand-wrapped examples; show a default where there is one worth showing."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help or ""
        default = action.default
        quiet = default is None or default is False or default == argparse.SUPPRESS
        if "default" in text or quiet or not action.option_strings:
            return text
        return f"{text} (default: %(default)s)"


Handler = Callable[[argparse.Namespace], int]


class _Parser(argparse.ArgumentParser):
    """argparse with the CLI's one error line instead of a usage block:
    ``rigcast: error: solve: <what argparse found> — run `rigcast solve --help` for the usage``."""

    def error(self, message: str) -> NoReturn:
        where = self.prog.removeprefix("rigcast").strip()
        what = f"{where}: {message}" if where else message
        self.exit(EXIT_USAGE, f"rigcast: error: {' '.join(what.split())} — run "
                              f"`{self.prog} --help` for the usage\n")


def _wrap(text: str) -> str:
    """Fill prose paragraphs to 78 columns; keep indented blocks (lists, examples) as written."""
    paragraphs = text.split("\n\n")
    return "\n\n".join(p if p.startswith(" ") or "\n " in p else textwrap.fill(p, 78)
                       for p in paragraphs)


def _sub(subs: argparse._SubParsersAction, name: str, summary: str, description: str,
         examples: str, handler: Handler, *, show_defaults: bool = True) -> argparse.ArgumentParser:
    formatter = _Formatter if show_defaults else argparse.RawDescriptionHelpFormatter
    p = subs.add_parser(name, help=summary, description=_wrap(description),
                        epilog="examples:\n" + examples, formatter_class=formatter)
    p.set_defaults(handler=handler)
    return p


def _add_build(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "build", "rig source -> bundle (sample, train, export, check)",
        "Sample a rig as a black box, train the forward approximator and the inverse network, "
        "export both to ONNX in one bundle, check them and print the quality figures.\n\n"
        "Rig sources:\n"
        "  demo:face | demo:face-linear | demo:arm   built-in demo rigs\n"
        "  gltf:PATH                                 glTF 2.0 morph targets and/or skin joints\n"
        "  py:MODULE:FUNCTION                        a Python callable, with --schema\n"
        "  proc:COMMAND                              an external process (NPY over stdin/stdout)\n"
        "  npz:PATH                                  a dataset someone else sampled\n"
        "  zoo:SEED                                  a seeded test rig from the rig zoo",
        "  rigcast build demo:face -o face.rcb\n"
        "  rigcast build gltf:hero.glb --bounds hero_joints.json -o hero.rcb\n"
        "  rigcast build py:myrigs.crab:evaluate --schema crab_schema.json -o crab.rcb\n"
        "  rigcast build 'proc:mayabatch -script sample_rig.py' --schema s.json -o m.rcb\n"
        "  rigcast build demo:arm --samples 300 --steps 100 -o arm.rcb   # a tiny, quick build\n"
        "  rigcast build demo:face --take take.npz -o take.rcb   # per-take: fit this take's frames\n",
        _cmd_build,
    )
    p.add_argument("rig", help="rig source spec (see above)")
    p.add_argument("-o", "--out", type=Path, default=None,
                   help="bundle path to write (default: <rig name>.rcb)")
    p.add_argument("--schema", type=Path, help="control schema JSON (py: and proc: sources)")
    p.add_argument("--bounds", type=Path, help="joint rotation bounds JSON (glTF skins)")
    p.add_argument("--samples", type=int, help="rig samples to draw (default: the build's own)")
    p.add_argument("--steps", type=int,
                   help="inverse-network training steps (default: the build's)")
    p.add_argument("--epochs", type=int,
                   help="forward-model training epochs (default: the build's)")
    p.add_argument("--report", type=Path, default=None,
                   help="also write a build report (Markdown + loss curve) into this folder")
    p.add_argument("--workers", type=int, help="local processes that evaluate the rig")
    p.add_argument("--scheduler", help="dask.distributed scheduler address, to sample on a cluster")
    p.add_argument("--seed", type=int, help="random seed")
    p.add_argument("--cache", type=Path, default=None,
                   help="cache folder: reuse a bundle whose inputs are unchanged, resume sampling")
    p.add_argument("--take", type=Path, default=None,
                   help="per-take mode: build (or reuse from the cache) the general bundle, then "
                        "fine-tune its inverse on this take's own frames, self-supervised "
                        "(.npy/.npz, OBJ frames or glTF, as `rigcast solve` reads them); for "
                        "offline work on a known take")
    p.add_argument("--take-steps", type=int, default=None,
                   help="fine-tuning steps in per-take mode (default: the build's)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")


def _add_serve(subs: argparse._SubParsersAction) -> None:
    from rigcast.runtime import serve_main

    p = _sub(
        subs, "serve", "serve bundles live over ZeroMQ",
        "Serve one or more bundles: mesh frames in on a ROUTER socket, controls, telemetry and "
        "events out on a PUB socket (docs/protocol.md). Binds to loopback unless --allow-remote "
        "is given; put a remote-facing server on a closed stage network only.",
        "  rigcast serve --bundle face.rcb                 # stream id 'face'\n"
        "  rigcast serve --bundle actor1=face.rcb --bundle actor2=arm.rcb\n"
        "  rigcast serve --bundle face.rcb --input tcp://127.0.0.1:6000 "
        "--output tcp://127.0.0.1:6001\n"
        "  rigcast serve --config stage.toml\n",
        _cmd_serve,
        show_defaults=False,  # the server's flags state their defaults themselves
    )
    serve_main.add_serve_arguments(p)


def _add_endpoints(p: argparse.ArgumentParser, *, to_help: str, from_help: str,
                   stream_help: str) -> None:
    """--to, --from and --stream: where a client finds the server, and which stream."""
    p.add_argument("--to", default=DEFAULT_INPUT, metavar="ENDPOINT", help=to_help)
    p.add_argument("--from", dest="source", default=DEFAULT_OUTPUT, metavar="ENDPOINT",
                   help=from_help)
    p.add_argument("--stream", default=None, help=stream_help)
    p.add_argument("--server-key", type=Path, default=None, metavar="FILE.key",
                   help="the server's public key (CurveZMQ; from `rigcast keys`)")
    p.add_argument("--client-key", type=Path, default=None, metavar="FILE.key_secret",
                   help="this client's secret key, whose public half the server authorises")


def _add_keys(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "keys", "make a CurveZMQ key pair for a server or a client",
        "Write FOLDER/NAME.key (the public key, to share) and FOLDER/NAME.key_secret (the secret "
        "key, readable by you only). A server on a stage network needs a pair of its own and a "
        "folder of its clients' public keys; each client needs a pair and the server's public key.",
        "  rigcast keys keys --name server\n"
        "  rigcast keys keys/clients --name capture\n",
        _cmd_keys,
    )
    p.add_argument("folder", type=Path, help="folder to write the two files in")
    p.add_argument("--name", required=True, help="file name of the pair, e.g. server or capture")


def _add_limits(p: argparse.ArgumentParser, *, frames: bool = True) -> None:
    """--duration (and --frames): when a client stops."""
    p.add_argument("--duration", type=float, default=None, help="stop after this many seconds")
    if frames:
        p.add_argument("--frames", type=int, default=None, help="stop after this many frames")


_FIRST_STREAM = "stream (actor) id (default: the first the server publishes)"
_SCHEMA_TO = "the server's input endpoint, asked for the control names"


def _add_send(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "send", "stream a take to a server, with stage rehearsal options",
        "Stream a take to a running server at a frame rate. Before sending it asks the server for "
        "its schema and stops if the take's vertex count is not the bundle's. The rehearsal "
        "options spoil the take on purpose, to see how a stage setup copes.",
        "  rigcast send take.npz\n"
        "  rigcast send frames/ --fps 30 --loop --duration 60\n"
        "  rigcast send take.npz --head-motion --noise 0.002 --drop-rate 0.05 \\\n"
        "      --corrupt-rate 0.01\n",
        _cmd_send,
    )
    p.add_argument("take", type=Path, help="take: .npy/.npz, a folder of .obj, or .gltf/.glb")
    _add_endpoints(p, to_help="the server's input endpoint",
                   from_help="the server's output endpoint, to learn the stream id when not given",
                   stream_help=_FIRST_STREAM)
    p.add_argument("--fps", type=float, default=None,
                   help=f"frame rate (default: the take's own, else {_DEFAULT_FPS:g}, said when "
                        "assumed)")
    p.add_argument("--loop", action="store_true", help="start over at the end of the take")
    _add_limits(p)
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


def _add_watch(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "watch", "live telemetry view in the terminal",
        "Subscribe to a server's telemetry and show it live: per-stage latency p50, p95 and p99 "
        "(p50 and p99 with --plain), input fps, drops and rejects by reason, fit error with "
        "off-manifold frames highlighted, and the most active controls as bars. Ctrl-C ends it.",
        "  rigcast watch\n"
        "  rigcast watch --from tcp://127.0.0.1:6001 --stream actor2\n"
        "  rigcast watch --once          # one snapshot, then exit (scripts, CI)\n"
        "  rigcast watch --duration 30   # watch for 30 s\n",
        _cmd_watch,
    )
    _add_endpoints(p, to_help=_SCHEMA_TO, from_help="the server's output (PUB) endpoint",
                   stream_help="show only this stream (default: all)")
    p.add_argument("--once", action="store_true",
                   help="print one snapshot after telemetry arrives, then exit")
    _add_limits(p, frames=False)
    p.add_argument("--top", type=int, default=8,
                   help="how many of the most active controls to show")
    p.add_argument("--timeout", type=float, default=10.0,
                   help="with --once: seconds to wait for the first telemetry")
    p.add_argument("--plain", action="store_true", help="plain text lines instead of the live view")


def _add_record(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "record", "save the published controls of a stream to CSV or JSON",
        "Subscribe to a server's controls and write the frames of one stream to a file "
        "(.csv or .json, by extension), until --duration, --frames or Ctrl-C.",
        "  rigcast record -o live.csv --duration 10\n"
        "  rigcast record -o actor2.json --stream actor2 --frames 600\n",
        _cmd_record,
    )
    p.add_argument("-o", "--out", type=Path, required=True, help="output file, .csv or .json")
    _add_endpoints(p, to_help=_SCHEMA_TO, from_help="the server's output (PUB) endpoint",
                   stream_help=_FIRST_STREAM)
    _add_limits(p)
    p.add_argument("--timeout", type=float, default=5.0,
                   help="seconds to wait for the schema reply")


def _add_solve(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "solve", "solve a whole take offline -> CSV, JSON, glTF or USD",
        "Solve every frame of a take in batches with onnxruntime, as fast as the CPU allows, and "
        "write the controls. Takes: .npy/.npz (frames x V x 3), a folder of .obj files (one per "
        "frame), or a .gltf/.glb with morph-weight or skinned animation. Outputs by extension: "
        ".csv or .json (controls, per-frame fit error and flags, head pose), .gltf/.glb or "
        ".usda/.usdc/.usd (the rig and its animation: morph targets for blendshape controls; "
        "with --rig, a skinned rig's joints; the head pose on the root). The flagged frame "
        "ranges are printed.\n\nFilters: none; causal (the live server's One Euro filter); "
        "smooth (zero-phase: the filter run forwards and backwards, no lag, offline only).",
        "  rigcast solve face.rcb take.npz -o take.csv\n"
        "  rigcast solve face.rcb frames/ --fps 24 -o take.json --filter smooth\n"
        "  rigcast solve face.rcb capture.glb -o solved.glb --filter causal\n"
        "  rigcast solve arm.rcb take.npz -o take.usda --rig demo:arm\n",
        _cmd_solve,
    )
    p.add_argument("bundle", type=Path, help="bundle file")
    p.add_argument("take", type=Path, help="take: .npy/.npz, a folder of .obj, or .gltf/.glb")
    p.add_argument("-o", "--out", type=Path, required=True,
                   help=".csv, .json, .gltf, .glb, .usda, .usdc, .usd, or .blend (a keyed copy of "
                        "the rig's .blend, with --rig blend:PATH)")
    p.add_argument("--rig", default=None, metavar="SPEC",
                   help="the bundle's rig (as given to `rigcast build`): glTF and USD outputs of "
                        "a skinned rig then animate its joints")
    p.add_argument("--bounds", type=Path, default=None,
                   help="the joint bounds the bundle was built with (glTF rigs, with --rig)")
    p.add_argument("--filter", choices=("none", "causal", "smooth"), default="none",
                   help="temporal filter")
    p.add_argument("--fps", type=float, default=None,
                   help=f"frame rate of the take (default: the take's own, else {_DEFAULT_FPS:g}, "
                        "said when assumed)")
    p.add_argument("--stabilise", action=argparse.BooleanOptionalAction, default=None,
                   help="remove rigid head motion (default: only when the bundle's rig has a "
                        "rigid region, as its build measured)")
    from rigcast.runtime.config import filter_defaults

    min_cutoff, beta, _ = filter_defaults()
    p.add_argument("--min-cutoff", type=float, default=min_cutoff,
                   help="One Euro minimum cutoff, Hz (as `rigcast serve`)")
    p.add_argument("--beta", type=float, default=beta,
                   help="One Euro speed coefficient per unit of each control's range "
                        "(as `rigcast serve`)")
    p.add_argument("--smooth-hz", type=float, default=3.0,
                   help="cutoff of the zero-phase smoother (--filter smooth), Hz")
    p.add_argument("--fit-error", choices=("subset", "full", "off"), default="subset",
                   help="fit error and off-manifold flags: on the bundle's input and stable "
                        "vertices plus a fixed sample of the others (fast), on every vertex, "
                        "or not at all")
    p.add_argument("--batch-size", type=int, default=1024,
                   help="frames per onnxruntime call")


def _add_osc(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "osc", "relay a stream's solved controls to OSC listeners",
        "Subscribe to a server's controls for one stream and send each solved frame as one OSC "
        "1.0 bundle over UDP, time-tagged with the server's publish time: one message per "
        "control (<prefix>/<stream>/<control>, float) and <prefix>/<stream>/frame (frame "
        "number, flag bits). Characters OSC addresses may not hold become '_'. Needs the "
        "`osc` extra (python-osc).",
        "  rigcast osc                                   # to 127.0.0.1:9000\n"
        "  rigcast osc --osc 127.0.0.1:7000 --prefix /tamsin --stream actor2\n",
        _cmd_osc,
    )
    p.add_argument("--osc", default="127.0.0.1:9000", metavar="HOST:PORT",
                   help="where the OSC listener is")
    p.add_argument("--prefix", default="/rigcast", help="OSC address prefix")
    _add_endpoints(p, to_help=_SCHEMA_TO, from_help="the server's output (PUB) endpoint",
                   stream_help=_FIRST_STREAM)
    _add_limits(p)
    p.add_argument("--timeout", type=float, default=5.0,
                   help="seconds to wait for the schema reply")


def _add_inspect(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "inspect", "show a bundle's schema, sizes, training figures and fingerprint",
        "Load and validate a bundle and print what it holds.",
        "  rigcast inspect face.rcb\n  rigcast inspect face.rcb --json | jq .training\n",
        _cmd_inspect,
    )
    p.add_argument("bundle", type=Path, help="bundle file")
    p.add_argument("--json", action="store_true", help="print the manifest as JSON")


def _add_demo(subs: argparse._SubParsersAction) -> None:
    p = _sub(
        subs, "demo", "the whole thing in one go, no input needed",
        "Build the demo face bundle (cached: reused while its inputs are unchanged), start a "
        "server on free loopback ports, stream an invented take with head motion, noise and a few "
        "corrupt frames at 60 fps, show the live telemetry, print a summary and write a report "
        "with plots.",
        "  rigcast demo\n"
        "  rigcast demo --seconds 20 --report my-report/\n"
        "  rigcast demo --quick          # a small build and a short take (a minute or less)\n",
        _cmd_demo,
    )
    p.add_argument("--quick", action="store_true", help="small build and short take")
    p.add_argument("--seconds", type=float, default=None, help="take length (default 12, quick 4)")
    p.add_argument("--fps", type=float, default=60.0, help="frame rate of the take")
    p.add_argument("--cache", type=Path, default=None,
                   help="bundle cache (default ~/.cache/rigcast, or ./.rigcast-cache)")
    p.add_argument("--report", type=Path, default=Path("rigcast-demo-report"),
                   help="report folder")
    p.add_argument("--plain", action="store_true", help="plain progress lines, no live view")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="rigcast", description=_DESCRIPTION, epilog=_EPILOG,
                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"rigcast {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="more log output (-vv for debug)")
    subs = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for add in (_add_demo, _add_build, _add_inspect, _add_serve, _add_send, _add_watch,
                _add_record, _add_solve, _add_keys, _add_osc):
        add(subs)
    return parser


def _cmd_build(args: argparse.Namespace) -> int:
    from dataclasses import replace

    from rigcast.export.build import BuildConfig, build_bundle
    from rigcast.export.rig_loader import load_rig
    from rigcast.report import build_summary, write_build_report
    from rigcast.watch import build_progress

    rig = load_rig(args.rig, schema=args.schema, bounds=args.bounds)
    config = BuildConfig(workers=args.workers, scheduler=args.scheduler)
    if args.samples is not None:
        config = replace(config, samples=args.samples)
    if args.seed is not None:
        config = replace(config, seed=args.seed)
    if args.steps is not None:
        config = replace(config, inverse=replace(config.inverse, steps=args.steps))
    if args.epochs is not None:
        config = replace(config, forward=replace(config.forward, epochs=args.epochs))
    out = args.out if args.out is not None else Path(f"{rig.name}.rcb")
    frames = None
    if args.take is not None:
        from rigcast.takes import read_take

        frames = read_take(args.take).vertices
        config = replace(config, mode="take")
        if args.take_steps is not None:
            config = replace(config, take=replace(config.take, steps=args.take_steps))
    try:
        with build_progress(not args.quiet and sys.stderr.isatty()) as progress:
            result = build_bundle(rig, out, config, cache_dir=args.cache, progress=progress,
                                  frames=frames)
    finally:
        rig.close()
    for line in build_summary(result):
        _say(line)
    if args.report is not None:
        _say(f"report: {write_build_report(args.report, result)}")
    return EXIT_OK


def _cmd_keys(args: argparse.Namespace) -> int:
    from rigcast.keys import keys_from_args

    return keys_from_args(args)


def _cmd_serve(args: argparse.Namespace) -> int:
    from rigcast.runtime import serve_main

    return int(serve_main.run(serve_main.config_from_args(args), ready_file=args.ready_file))


def _cmd_send(args: argparse.Namespace) -> int:
    from rigcast.send import send_from_args

    return send_from_args(args)


def _cmd_watch(args: argparse.Namespace) -> int:
    from rigcast.watch import watch_from_args

    return watch_from_args(args)


def _cmd_record(args: argparse.Namespace) -> int:
    from rigcast.record import record_from_args

    return record_from_args(args)


def _cmd_solve(args: argparse.Namespace) -> int:
    import numpy as np

    from rigcast.animation_out import write_controls
    from rigcast.errors import MismatchError
    from rigcast.forward_subset import slice_forward_graph
    from rigcast.runtime.batch import BatchSolver, FilterKind, SolveOptions, filter_params
    from rigcast.runtime.bundle import load_bundle
    from rigcast.solve_out import flag_lines, frame_quality, head_pose, output_form
    from rigcast.takes import read_take

    bundle = load_bundle(args.bundle)
    take = read_take(args.take, fps=args.fps)
    if take.vertices.shape[1] != bundle.vertex_count:
        raise MismatchError(
            f"take {args.take} has {take.vertices.shape[1]} vertices but bundle {args.bundle} "
            f"was built for a rig of {bundle.vertex_count}",
            "solve it with the bundle built for this take's rig, or rebuild the bundle from it",
        )
    # Cutting the forward graph needs `import onnx` (a second or two); it pays off on long takes.
    cutter = slice_forward_graph if take.vertices.shape[0] >= _CUT_MIN_FRAMES else None
    solver = BatchSolver(bundle, subset_graph=cutter)
    params = filter_params(bundle, args.min_cutoff, args.beta)
    kinds: dict[str, FilterKind] = {"none": "none", "causal": "causal", "smooth": "zero_phase"}
    options = SolveOptions(stabilise=args.stabilise, filter=kinds[args.filter],
                           params=params,
                           smooth_hz=args.smooth_hz, fit_error=args.fit_error,
                           batch_size=args.batch_size)
    basis, skeleton = output_form(bundle, args.out, solver.forward, args.rig, args.bounds)
    result = solver.solve(take.vertices, take.times_s, options)
    quality = frame_quality(bundle, result, take.times_s)
    head = head_pose(bundle, take.vertices, stabilise=bool((result.align_rms > 0).any()))
    if args.out.suffix.lower() == ".blend":
        from rigcast.solve_out import write_blend_solve

        write_blend_solve(args.out, bundle, args.rig, args.bounds, result.controls, take.times_s,
                          take.fps, head)
    else:
        write_controls(args.out, bundle.schema, result.controls, take.times_s, fps=take.fps,
                       basis=basis, skeleton=skeleton, quality=quality, head=head)
    if result.fit_error == "off":
        fit = "fit error off"
    else:
        fit = (f"fit error ({result.fit_error}, {result.fit_vertices} of "
               f"{bundle.vertex_count} vertices) RMS mean {float(np.nanmean(result.fit_rms)):.5f}, "
               f"{int(result.off_manifold.sum())} off-manifold frames")
    _say(f"solved {result.controls.shape[0]} frames at {take.fps_note} in {result.seconds:.3f} s "
         f"({result.frames_per_second:,.0f} frames/s); {fit}; wrote {args.out}")
    for line in flag_lines(quality):
        _say(line)
    return EXIT_OK


def _cmd_osc(args: argparse.Namespace) -> int:
    from rigcast.osc_out import osc_from_args

    return osc_from_args(args)


def _cmd_inspect(args: argparse.Namespace) -> int:
    from rigcast.report import inspect_bundle

    _say(inspect_bundle(args.bundle, as_json=args.json))
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from rigcast.demo import demo_from_args

    return demo_from_args(args)


def _say(text: str) -> None:
    sys.stdout.write(text + "\n")
    sys.stdout.flush()


def _setup_logging(verbosity: int) -> None:
    level = logging.WARNING if verbosity == 0 else logging.INFO if verbosity == 1 else logging.DEBUG
    if verbosity == 0:
        # torch's advisory UserWarnings during training say nothing a user can act on.
        warnings.filterwarnings("ignore", category=UserWarning, module=r"(torch|rigcast\.export)")
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_OK
    _setup_logging(args.verbose)
    handler: Handler = args.handler
    return run_guarded(lambda: handler(args))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

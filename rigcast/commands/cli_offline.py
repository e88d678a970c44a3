"""The offline subcommands' parsers and handlers: build, inspect, solve (one take or a batch),
demo. Each handler makes one library call; heavy modules are imported inside it."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from rigcast.commands.cli_common import DEFAULT_FPS, Subparsers, say, sub
from rigcast.errors import EXIT_OK, UserError

if TYPE_CHECKING:
    from rigcast.solving.solve_take import FilterChoice, SolveSettings


def add_build(subs: Subparsers) -> None:
    p = sub(
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
        cmd_build,
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


def add_solve(subs: Subparsers) -> None:
    p = sub(
        subs, "solve", "solve takes offline -> CSV, JSON, glTF or USD (one, or a batch)",
        "Solve every frame of a take in batches with onnxruntime, as fast as the CPU allows, and "
        "write the controls. Takes: .npy/.npz (frames x V x 3), a folder of .obj files (one per "
        "frame), or a .gltf/.glb with morph-weight or skinned animation. Outputs by extension: "
        ".csv or .json (controls, per-frame fit error and flags, head pose), .gltf/.glb or "
        ".usda/.usdc/.usd (the rig and its animation: morph targets for blendshape controls; "
        "with --rig, a skinned rig's joints; the head pose on the root). The flagged frame "
        "ranges are printed.\n\nFilters: none; causal (the live server's One Euro filter); "
        "smooth (zero-phase: the filter run forwards and backwards, no lag, offline only).\n\n"
        "Batches: give several takes, a folder of takes, a glob or a list file (.txt/.list, "
        "one take per line) and an output folder; each take becomes FOLDER/<name>.<format>. "
        "Takes solve in parallel in local processes (--workers) or on a dask.distributed "
        "scheduler (--scheduler); takes already solved with the same bundle and settings are "
        "skipped, so an interrupted batch resumes; FOLDER/summary.csv and summary.md list "
        "every take's frames, fps, mean fit error, off-manifold ranges and time.",
        "  rigcast solve face.rcb take.npz -o take.csv\n"
        "  rigcast solve face.rcb frames/ --fps 24 -o take.json --filter smooth\n"
        "  rigcast solve face.rcb capture.glb -o solved.glb --filter causal\n"
        "  rigcast solve arm.rcb take.npz -o take.usda --rig demo:arm\n"
        "  rigcast solve face.rcb day1/ -o solved/ --workers 4          # a folder of takes\n"
        "  rigcast solve face.rcb 'day1/*.npz' -o solved/ --format glb\n"
        "  rigcast solve face.rcb takes.txt -o solved/ --scheduler tcp://127.0.0.1:8786\n",
        cmd_solve,
    )
    p.add_argument("bundle", type=Path, help="bundle file")
    p.add_argument("take", nargs="+",
                   help="take: .npy/.npz, a folder of .obj, or .gltf/.glb; or, for a batch, "
                        "several takes, a folder of takes, a glob, or a .txt/.list file")
    p.add_argument("-o", "--out", type=Path, required=True,
                   help=".csv, .json, .gltf, .glb, .usda, .usdc, .usd, or .blend (a keyed copy of "
                        "the rig's .blend, with --rig blend:PATH); for a batch, a folder")
    p.add_argument("--format", default="csv",
                   choices=("csv", "json", "gltf", "glb", "usda", "usdc", "usd"),
                   help="output format of each take in a batch")
    p.add_argument("--workers", type=int, default=2,
                   help="batch: local processes solving takes in parallel (0: in this process)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="batch: a dask.distributed scheduler (tcp://HOST:PORT) to solve on")
    p.add_argument("--quiet", action="store_true", help="batch: no progress bar or per-take lines")
    p.add_argument("--rig", default=None, metavar="SPEC",
                   help="the bundle's rig (as given to `rigcast build`): glTF and USD outputs of "
                        "a skinned rig then animate its joints")
    p.add_argument("--bounds", type=Path, default=None,
                   help="the joint bounds the bundle was built with (glTF rigs, with --rig)")
    p.add_argument("--filter", choices=("none", "causal", "smooth"), default=None,
                   help="temporal filter (default: causal, the server's, with --config; else "
                        "none)")
    p.add_argument("--fps", type=float, default=None,
                   help=f"frame rate of the take (default: the take's own, else {DEFAULT_FPS:g}, "
                        "said when assumed)")
    from rigcast.runtime.serve.serve_main import DeprecatedAlias, add_stream_arguments

    add_stream_arguments(p)  # --config, --stream and serve's per-stream flags
    p.add_argument("--smooth-hz", type=float, default=3.0,
                   help="cutoff of the zero-phase smoother (--filter smooth), Hz")
    scopes = ("full", "subset", "off")
    p.add_argument("--fit-error-scope", choices=scopes, default="full",
                   help="which vertices the fit error and off-manifold flags read: every vertex "
                        "(as the live server), the bundle's input and stable vertices plus a "
                        "fixed sample of the others (faster, but blind to a bulge elsewhere), or "
                        "none (no fit error)")
    p.add_argument("--fit-error", dest="fit_error_scope", action=DeprecatedAlias,
                   new="--fit-error-scope", choices=scopes, help=argparse.SUPPRESS)
    p.add_argument("--batch-size", type=int, default=1024,
                   help="frames per chunk: each chunk is stabilised, solved and fitted as one "
                        "job (one onnxruntime call per stage); the chunks run on --threads")
    p.add_argument("--threads", type=int, default=None,
                   help="chunks solved at once, each on one core (default: every core this "
                        "process may use; a batch of takes in parallel workers gives each 1); "
                        "the result is the same bit for bit whatever the count")


def add_inspect(subs: Subparsers) -> None:
    p = sub(
        subs, "inspect", "show a bundle's schema, sizes, training figures and fingerprint",
        "Load and validate a bundle and print what it holds.",
        "  rigcast inspect face.rcb\n  rigcast inspect face.rcb --json | jq .training\n",
        cmd_inspect,
    )
    p.add_argument("bundle", type=Path, help="bundle file")
    p.add_argument("--json", action="store_true", help="print the manifest as JSON")


def add_demo(subs: Subparsers) -> None:
    p = sub(
        subs, "demo", "the whole thing in one go, no input needed",
        "Build the demo face bundle (cached: reused while its inputs are unchanged), start a "
        "server on free loopback ports, stream an invented take with head motion, noise and a few "
        "corrupt frames at 60 fps, show the live telemetry, print a summary and write a report "
        "with plots.",
        "  rigcast demo\n"
        "  rigcast demo --seconds 20 --report my-report/\n"
        "  rigcast demo --quick          # a small build and a short take (a minute or less)\n",
        cmd_demo,
    )
    p.add_argument("--quick", action="store_true", help="small build and short take")
    p.add_argument("--seconds", type=float, default=None, help="take length (default 12, quick 4)")
    p.add_argument("--fps", type=float, default=60.0, help="frame rate of the take")
    p.add_argument("--cache", type=Path, default=None,
                   help="bundle cache (default ~/.cache/rigcast, or ./.rigcast-cache)")
    p.add_argument("--report", type=Path, default=Path("rigcast-demo-report"),
                   help="report folder")
    p.add_argument("--plain", action="store_true", help="plain progress lines, no live view")


def cmd_build(args: argparse.Namespace) -> int:
    from dataclasses import replace

    from rigcast.commands.report import build_summary, write_build_report
    from rigcast.export.bundling.build import BuildConfig, build_bundle
    from rigcast.export.rigs.rig_loader import load_rig
    from rigcast.live.watch import build_progress

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
        from rigcast.readers.takes import read_take

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
        say(line)
    if args.report is not None:
        say(f"report: {write_build_report(args.report, result)}")
    return EXIT_OK


def _solve_settings(args: argparse.Namespace) -> SolveSettings:
    from rigcast.runtime.serve.serve_main import stream_config_from_args
    from rigcast.solving.solve_take import SolveSettings

    kind: FilterChoice = args.filter or ("causal" if args.config is not None else "none")
    stream = stream_config_from_args(args)
    if stream.on_off_manifold != "pass":
        say(f"on_off_manifold={stream.on_off_manifold} is for live streams; a solve keeps every "
            "frame's controls and lists the off-manifold ranges in its summary")
    return SolveSettings(filter=kind, fps=args.fps, stream=stream,
                         smooth_hz=args.smooth_hz,
                         fit_error_scope=args.fit_error_scope, batch_size=args.batch_size,
                         threads=args.threads, rig=args.rig,
                         bounds=args.bounds)


def cmd_solve(args: argparse.Namespace) -> int:
    from rigcast.solving.solve_take import solve_one
    from rigcast.solving.take_batch import is_batch

    settings = _solve_settings(args)
    if is_batch(args.take):
        return _solve_batch(args, settings)
    solved = solve_one(args.bundle, Path(args.take[0]), args.out, settings)
    for line in solved.lines:
        say(line)
    return EXIT_OK


def _solve_batch(args: argparse.Namespace, settings: SolveSettings) -> int:
    from rigcast.solving.solve_take import TakeRow
    from rigcast.solving.take_batch import find_takes, solve_takes

    if args.out.suffix and not args.out.is_dir():
        raise UserError(f"{args.out}: a batch of takes writes into a folder, not one file",
                        "give an output folder with -o, and the format with --format", code=2)
    takes = find_takes(args.take)
    show_lines = not args.quiet

    def progress(row: TakeRow, done: int, total: int) -> None:
        if not show_lines:
            return
        what = {"solved": f"{row.frames} frames in {row.seconds:.2f} s",
                "skipped": "solved before, skipped",
                "failed": row.error}.get(row.status, row.status)
        say(f"[{done}/{total}] {Path(row.take).name}: {what}")

    result = solve_takes(args.bundle, takes, args.out, suffix=f".{args.format}",
                         settings=settings, workers=args.workers, scheduler=args.scheduler,
                         progress=progress)
    say(f"{len(result.rows) - result.failed} of {len(result.rows)} takes solved into "
        f"{args.out}; summary: {result.summary_csv}, {result.summary_md}")
    if result.failed:
        raise UserError(f"{result.failed} of {len(result.rows)} takes failed (see "
                        f"{result.summary_md})", "fix those takes and run the same command "
                        "again: finished takes are skipped")
    return EXIT_OK


def cmd_inspect(args: argparse.Namespace) -> int:
    from rigcast.commands.report import inspect_bundle

    say(inspect_bundle(args.bundle, as_json=args.json))
    return EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    from rigcast.commands.demo import demo_from_args

    return demo_from_args(args)

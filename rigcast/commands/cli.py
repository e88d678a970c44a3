"""The ``rigcast`` command line: argument parsing, one library call per subcommand.

Nothing here computes anything: the subcommands' parsers and handlers live in
``rigcast.commands.cli_offline`` (build, inspect, solve, demo) and ``rigcast.commands.cli_live`` (serve, send,
watch, record, osc, keys, latency-check). Heavy modules are imported inside the subcommand that
needs them, so ``rigcast serve --help`` never loads torch.

Ctrl-C: every command exits 130; a second Ctrl-C while the first one's cleanup runs exits at
once, with one line and no traceback.
"""

from __future__ import annotations

import argparse
import logging
import os
import signal
import sys
import threading
import warnings
from collections.abc import Sequence
from types import FrameType

from rigcast import __version__
from rigcast.commands.cli_common import DEFAULT_FPS, DEFAULT_INPUT, DEFAULT_OUTPUT, Handler, Parser
from rigcast.errors import EXIT_INTERRUPTED, EXIT_OK, run_guarded

log = logging.getLogger(__name__)

__all__ = ["DEFAULT_INPUT", "DEFAULT_OUTPUT", "build_parser", "main"]
_DEFAULT_FPS = DEFAULT_FPS  # rigcast.readers.takes.DEFAULT_FPS (kept equal by tests), not imported

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


def build_parser() -> argparse.ArgumentParser:
    from rigcast.commands import cli_live, cli_offline

    parser = Parser(prog="rigcast", description=_DESCRIPTION, epilog=_EPILOG,
                    formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"rigcast {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="more log output (-vv for debug)")
    subs = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=Parser)
    for add in (cli_offline.add_demo, cli_offline.add_build, cli_offline.add_inspect,
                cli_live.add_serve, cli_live.add_send, cli_live.add_watch, cli_live.add_record,
                cli_offline.add_solve, cli_live.add_keys, cli_live.add_osc,
                cli_live.add_latency_check):
        add(subs)
    return parser


def _setup_logging(verbosity: int) -> None:
    level = logging.WARNING if verbosity == 0 else logging.INFO if verbosity == 1 else logging.DEBUG
    if verbosity == 0:
        # torch's advisory UserWarnings during training say nothing a user can act on.
        warnings.filterwarnings("ignore", category=UserWarning, module=r"(torch|rigcast\.export)")
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")


def _interrupt(signum: int, frame: FrameType | None) -> None:
    """First Ctrl-C: raise KeyboardInterrupt (cleanup runs, the command exits 130); from then
    on, while the command cleans up, a Ctrl-C ends the process at once with 130, so a stuck
    cleanup never needs a third press and no traceback is printed."""
    signal.signal(signal.SIGINT, _force_exit)
    raise KeyboardInterrupt


def _force_exit(signum: int, frame: FrameType | None) -> None:
    os.write(2, b"rigcast: interrupted again, exiting now\n")
    os._exit(EXIT_INTERRUPTED)


def main(argv: Sequence[str] | None = None) -> int:
    """Parse, then run the subcommand: its return value is the exit code.

    SIGINT (main thread only: tests call ``main`` from others) is ``_interrupt`` from the first
    line, so a Ctrl-C while the subcommand's modules load is 130 too. After an interrupted
    command SIGINT is ignored for the few tenths of a second the interpreter takes to exit:
    Python's finalisation resets a Python-level handler to the default, under which another
    Ctrl-C would kill the process by the signal (status -2, not 130), but it leaves an ignored
    signal ignored (CPython's signal module, _PySignal_Fini). Otherwise the previous handler is
    put back."""
    in_main = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGINT, _interrupt) if in_main else None
    code: int | None = None
    try:
        try:
            parser = build_parser()
            args = parser.parse_args(argv)
        except KeyboardInterrupt:
            sys.stderr.write("rigcast: interrupted\n")
            code = EXIT_INTERRUPTED
            return code
        if args.command is None:
            parser.print_help()
            code = EXIT_OK
            return code
        _setup_logging(args.verbose)
        handler: Handler = args.handler
        code = run_guarded(lambda: handler(args))
        return code
    finally:
        if in_main:
            signal.signal(signal.SIGINT, signal.SIG_IGN if code == EXIT_INTERRUPTED
                          else previous if previous is not None else signal.default_int_handler)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

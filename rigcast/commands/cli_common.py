"""What every `rigcast` subcommand's parser shares: the help formatter, the one-line usage
error, the subcommand helper, and the options several commands take (endpoints, limits)."""

from __future__ import annotations

import argparse
import sys
import textwrap
from collections.abc import Callable
from pathlib import Path
from typing import NoReturn

from rigcast.errors import EXIT_USAGE

DEFAULT_INPUT = "tcp://127.0.0.1:5570"
DEFAULT_OUTPUT = "tcp://127.0.0.1:5571"
DEFAULT_FPS = 60.0  # rigcast.readers.takes.DEFAULT_FPS (kept equal by tests/test_takes.py), not imported
FIRST_STREAM = "stream (actor) id (default: the first the server publishes)"
SCHEMA_TO = "the server's input endpoint, asked for the control names"

Handler = Callable[[argparse.Namespace], int]
Subparsers = argparse._SubParsersAction


class Formatter(argparse.RawDescriptionHelpFormatter):
    """Keep the hand-wrapped examples; show a default where there is one worth showing."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help or ""
        default = action.default
        quiet = default is None or default is False or default == argparse.SUPPRESS
        if "default" in text or quiet or not action.option_strings:
            return text
        return f"{text} (default: %(default)s)"


class Parser(argparse.ArgumentParser):
    """argparse with the CLI's one error line instead of a usage block:
    ``rigcast: error: solve: <what argparse found> — run `rigcast solve --help` for the usage``."""

    def error(self, message: str) -> NoReturn:
        where = self.prog.removeprefix("rigcast").strip()
        what = f"{where}: {message}" if where else message
        self.exit(EXIT_USAGE, f"rigcast: error: {' '.join(what.split())} — run "
                              f"`{self.prog} --help` for the usage\n")


def wrap(text: str) -> str:
    """Fill prose paragraphs to 78 columns; keep indented blocks (lists, examples) as written."""
    paragraphs = text.split("\n\n")
    return "\n\n".join(p if p.startswith(" ") or "\n " in p else textwrap.fill(p, 78)
                       for p in paragraphs)


def sub(subs: Subparsers, name: str, summary: str, description: str, examples: str,
        handler: Handler, *, show_defaults: bool = True) -> argparse.ArgumentParser:
    """Add subcommand ``name`` with its help, examples and handler."""
    formatter = Formatter if show_defaults else argparse.RawDescriptionHelpFormatter
    p = subs.add_parser(name, help=summary, description=wrap(description),
                        epilog="examples:\n" + examples, formatter_class=formatter)
    p.set_defaults(handler=handler)
    return p


def add_endpoints(p: argparse.ArgumentParser, *, to_help: str, from_help: str,
                  stream_help: str, to_default: str | None = DEFAULT_INPUT,
                  many_streams: bool = False) -> None:
    """--to, --from and --stream: where a client finds the server, and which stream (or, with
    ``many_streams``, streams: --stream repeated)."""
    p.add_argument("--to", default=to_default, metavar="ENDPOINT", help=to_help)
    p.add_argument("--from", dest="source", default=DEFAULT_OUTPUT, metavar="ENDPOINT",
                   help=from_help)
    p.add_argument("--stream", default=None, help=stream_help,
                   action="append" if many_streams else "store")
    p.add_argument("--server-key", type=Path, default=None, metavar="FILE.key",
                   help="the server's public key (CurveZMQ; from `rigcast keys`)")
    p.add_argument("--client-key", type=Path, default=None, metavar="FILE.key_secret",
                   help="this client's secret key, whose public half the server authorises")


def add_limits(p: argparse.ArgumentParser, *, frames: bool = True) -> None:
    """--duration (and --frames): when a client stops."""
    p.add_argument("--duration", type=float, default=None, help="stop after this many seconds")
    if frames:
        p.add_argument("--frames", type=int, default=None, help="stop after this many frames")


def say(text: str) -> None:
    """One line to stdout, flushed (the CLI's output; library code logs instead)."""
    sys.stdout.write(text + "\n")
    sys.stdout.flush()

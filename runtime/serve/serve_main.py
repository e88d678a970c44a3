"""Command-line pieces of ``rigcast serve``: flags derived from the config dataclasses, and run().

The flags are not listed here: every field of ServerConfig and StreamConfig that carries a
``help`` in its metadata becomes one (``fit_error_schedule`` -> ``--fit-error-schedule``); the
StreamConfig ones
apply to every stream. The CLI mounts them with::

    add_serve_arguments(subparser)
    config = config_from_args(args)
    return run(config, ready_file=args.ready_file)

``python -m rigcast.runtime.serve.serve_main ...`` runs the same thing without the rest of the CLI.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import sys
import typing
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Literal, get_args, get_origin

from rigcast.runtime.errors import RigcastError
from rigcast.runtime.serve.config import (
    ConfigError,
    FitErrorSchedule,
    ServerConfig,
    StreamConfig,
    flag_fields,
    load_config,
)
from rigcast.runtime.serve.server import Server

log = logging.getLogger(__name__)

_SERVER_PREFIX = "server__"
_STREAM_PREFIX = "stream__"


def _flag_type(hint: Any) -> tuple[Any, dict[str, Any]]:
    """(base type, extra argparse kwargs) for a field's type hint."""
    args = [a for a in get_args(hint) if a is not type(None)]
    if get_origin(hint) is Literal:
        return str, {"choices": list(get_args(hint))}
    if args and get_origin(hint) is not None:
        return _flag_type(args[0])
    return hint, {}


def _add_fields(group: argparse._ArgumentGroup, cls: type, prefix: str, *,
                live: bool = True) -> None:
    """One flag per field with a ``help``; ``live`` False leaves out the live-only ones."""
    hints = typing.get_type_hints(cls)
    for f in flag_fields(cls):
        if f.metadata.get("live") and not live:
            continue
        flag = "--" + f.name.replace("_", "-")
        base, extra = _flag_type(hints[f.name])
        dest = prefix + f.name
        help_text = f"{f.metadata['help']} (default: {f.default})"
        if base is bool:
            group.add_argument(flag, dest=dest, action=argparse.BooleanOptionalAction,
                               default=None, help=help_text)
        else:
            group.add_argument(flag, dest=dest, type=base, default=None, help=help_text,
                               metavar=f.name.upper(), **extra)


class DeprecatedAlias(argparse.Action):
    """An old spelling of a flag: stores into the new flag's ``dest`` and logs one line
    naming the new spelling. ``new`` is that spelling."""

    def __init__(self, option_strings: Sequence[str], dest: str, new: str = "",
                 **kwargs: Any) -> None:
        self.new = new
        super().__init__(option_strings, dest, **kwargs)

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace,
                 values: Any, option_string: str | None = None) -> None:
        log.warning("%s is now %s (the old spelling still works for now)", option_string,
                    self.new)
        setattr(namespace, self.dest, values)


def add_serve_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the ``serve`` options to ``parser``."""
    parser.add_argument("--config", type=Path, default=None, metavar="FILE.toml",
                        help="TOML config file; flags override its values")
    parser.add_argument("--bundle", action="append", default=[], metavar="[STREAM=]PATH",
                        help="serve a bundle; repeat for several streams. Without STREAM= the "
                             "stream id is the file name without its extension")
    parser.add_argument("--ready-file", type=Path, default=None, metavar="FILE.json",
                        help="once bound, write the real endpoints and pid here as JSON "
                             "(useful with port '*')")
    _add_fields(parser.add_argument_group("server"), ServerConfig, _SERVER_PREFIX)
    parser.add_argument("--fit-error", dest=_SERVER_PREFIX + "fit_error_schedule",
                        action=DeprecatedAlias, new="--fit-error-schedule",
                        choices=get_args(FitErrorSchedule), help=argparse.SUPPRESS)
    _add_fields(parser.add_argument_group("per-stream (applies to every stream)"),
                StreamConfig, _STREAM_PREFIX)


def add_stream_arguments(parser: argparse.ArgumentParser) -> None:
    """The per-stream options of ``serve`` (the StreamConfig flags) and ``--config``/``--stream``,
    for ``rigcast solve``: a take is solved with the settings a stream is served with."""
    parser.add_argument("--config", type=Path, default=None, metavar="FILE.toml",
                        help="a `rigcast serve` TOML config: solve with the settings of one of "
                             "its streams (filter, per-group filters, gap, stabilisation); "
                             "flags override them")
    parser.add_argument("--stream", default=None, metavar="ID",
                        help="which stream of --config (default: the first)")
    _add_fields(parser.add_argument_group("per-stream settings (as `rigcast serve`)"),
                StreamConfig, _STREAM_PREFIX, live=False)


def stream_config_from_args(args: argparse.Namespace) -> StreamConfig:
    """The StreamConfig of ``add_stream_arguments``' options: the stream ``--stream`` (or the
    first) of ``--config`` when given, with the flags on top; ConfigError on bad values."""
    every = {name[len(_STREAM_PREFIX):]: value for name, value in vars(args).items()
             if name.startswith(_STREAM_PREFIX) and value is not None}
    if args.config is None:
        if args.stream is not None:
            raise ConfigError("--stream names a stream of --config; give --config too")
        return load_config(None, {"streams": {"take": {"bundle": "unused", **every}}}).streams[0]
    config = load_config(args.config, {"stream_overrides": every})
    if args.stream is None:
        return config.streams[0]
    found = config.stream(args.stream)
    if found is None:
        raise ConfigError(f"--stream {args.stream!r}: {args.config} has streams "
                          f"{[s.stream for s in config.streams]}")
    return found


def parse_bundle_arg(text: str) -> tuple[str, Path]:
    """``STREAM=PATH`` or ``PATH`` -> (stream id, absolute path)."""
    stream, sep, path = text.partition("=")
    if not sep:
        path, stream = text, Path(text).stem
    if not stream or not path:
        raise ConfigError(f"--bundle {text!r}: expected PATH or STREAM=PATH")
    return stream, Path(path).resolve()


def config_from_args(args: argparse.Namespace) -> ServerConfig:
    """One ServerConfig from the TOML file (if any) and the flags; ConfigError on bad values."""
    top = {name[len(_SERVER_PREFIX):]: value for name, value in vars(args).items()
           if name.startswith(_SERVER_PREFIX) and value is not None}
    every = {name[len(_STREAM_PREFIX):]: value for name, value in vars(args).items()
             if name.startswith(_STREAM_PREFIX) and value is not None}
    streams: dict[str, dict[str, Any]] = {}
    for text in args.bundle:
        stream, path = parse_bundle_arg(text)
        if stream in streams:
            raise ConfigError(f"--bundle: stream {stream!r} given twice")
        streams[stream] = {"bundle": str(path)}
    return load_config(args.config, {**top, "streams": streams, "stream_overrides": every})


def write_ready_file(path: Path, server: Server) -> None:
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(json.dumps({"input": server.input_endpoint, "output": server.output_endpoint,
                               "pid": os.getpid(), "streams": sorted(server.streams),
                               "metrics": None if server.metrics is None else server.metrics.url}))
    tmp.replace(path)


def run(config: ServerConfig, *, ready_file: Path | None = None) -> int:
    """Serve until SIGINT/SIGTERM; returns the exit code (0 on a clean stop).

    Raises BundleError, ConfigError or sockets.BindError at startup; the caller turns them into
    a message.
    """
    server = Server(config)
    server.install_signal_handlers()
    server.startup()
    if ready_file is not None:
        write_ready_file(ready_file, server)
    server.run()
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m rigcast.runtime.serve.serve_main",
                                     description="Serve rigcast bundles over ZeroMQ.")
    add_serve_arguments(parser)
    parser.add_argument("--log-level", default="INFO", choices=["DEBUG", "INFO", "WARNING"])
    args = parser.parse_args(argv)
    logging.basicConfig(level=args.log_level, format="%(asctime)s %(name)s %(message)s")
    try:
        return run(config_from_args(args), ready_file=args.ready_file)
    except RigcastError as exc:  # one line and the error's own exit code, as in `rigcast serve`
        advice = f" — {exc.advice}" if exc.advice else ""
        sys.stderr.write(f"rigcast: error: serve: {exc}{advice}\n")
        return exc.exit_code


if __name__ == "__main__":
    sys.exit(main())

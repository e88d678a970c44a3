"""Server config: TOML + overrides, named errors, the loopback rule, and flags derived once."""

from __future__ import annotations

import argparse
import logging
from pathlib import Path

import pytest
import zmq
from rigcast.runtime.serve.config import (
    ConfigError,
    ServerConfig,
    StreamConfig,
    flag_fields,
    is_loopback,
    load_config,
)
from rigcast.runtime.serve.serve_main import add_serve_arguments, config_from_args
from rigcast.runtime.serve.server import Server

TOML = """
input = "tcp://127.0.0.1:6001"
fit_error_schedule = "every_n"
fit_error_every = 5

[streams.actor1]
bundle = "face.rcb"
beta = 0.25
stabilise = false

[streams.actor1.groups.brow]
min_cutoff = 0.5
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "serve.toml"
    path.write_text(text)
    return path


def test_toml_is_read_with_relative_paths_and_group_overrides(tmp_path: Path) -> None:
    cfg = load_config(write(tmp_path, TOML))
    assert cfg.input == "tcp://127.0.0.1:6001"
    assert cfg.output == "tcp://127.0.0.1:5571"  # default kept
    assert (cfg.fit_error_schedule, cfg.fit_error_every) == ("every_n", 5)
    (s,) = cfg.streams
    assert s.bundle == tmp_path / "face.rcb"
    assert (s.beta, s.stabilise, s.min_cutoff) == (0.25, False, 1.0)
    (g,) = s.groups
    assert (g.group, g.min_cutoff, g.beta, g.d_cutoff) == ("brow", 0.5, 0.25, 1.0)


def test_overrides_win_over_the_file(tmp_path: Path) -> None:
    cfg = load_config(write(tmp_path, TOML), {"telemetry_hz": 30.0, "fit_error_schedule": "off",
                                              "stream_overrides": {"beta": 0.9},
                                              "streams": {"b": {"bundle": "/abs/b.rcb"}}})
    assert (cfg.telemetry_hz, cfg.fit_error_schedule) == (30.0, "off")
    assert [s.stream for s in cfg.streams] == ["actor1", "b"]
    assert all(s.beta == 0.9 for s in cfg.streams)
    assert cfg.stream("b") is not None and cfg.stream("b").bundle == Path("/abs/b.rcb")


@pytest.mark.parametrize(
    ("text", "words"),
    [
        ("colour = 1\n[streams.a]\nbundle='x'", "unknown config key colour"),
        ("[streams.a]\nbundle='x'\nbeat = 1", "unknown config key streams.a.beat"),
        ("[streams.a]\nbundle='x'\n[streams.a.groups.g]\nmin_cut = 1", "groups.g.min_cut"),
        ("[streams.a]\nbundle='x'\nbeta = 'high'", "streams.a.beta must be a number"),
        ("[streams.a]\nbundle='x'\nmin_cutoff = -1", "streams.a.min_cutoff must be a positive"),
        ("threads = 0\n[streams.a]\nbundle='x'", "threads must be at least 1"),
        ("fit_error_schedule = 'sometimes'\n[streams.a]\nbundle='x'",
         "fit_error_schedule must be one of"),
        ("allow_remote = 'yes'\n[streams.a]\nbundle='x'", "allow_remote must be true or false"),
        ("[streams.a]\nbeta = 1.0", "streams.a.bundle is missing"),
        ("telemetry_hz = 5", "no streams configured"),
        ("input = 'udp://x'\n[streams.a]\nbundle='x'", "input: transport 'udp'"),
        ("output = 'localhost'\n[streams.a]\nbundle='x'", "output must be a ZeroMQ endpoint"),
        ("[streams.a\nbundle='x'", "not valid TOML"),
    ],
)
def test_bad_config_raises_naming_the_key(tmp_path: Path, text: str, words: str) -> None:
    with pytest.raises(ConfigError, match=words):
        load_config(write(tmp_path, text))


def test_missing_file_is_a_config_error(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="does not exist"):
        load_config(tmp_path / "nope.toml")


@pytest.mark.parametrize(
    ("endpoint", "local"),
    [("tcp://127.0.0.1:5570", True), ("tcp://localhost:1", True), ("tcp://[::1]:1", True),
     ("tcp://127.3.4.5:*", True), ("ipc:///tmp/rigcast", True), ("inproc://x", True),
     ("tcp://0.0.0.0:5570", False), ("tcp://*:5570", False), ("tcp://192.168.1.20:5570", False),
     ("tcp://eth0:5570", False)],
)
def test_loopback_detection(endpoint: str, local: bool) -> None:
    assert is_loopback(endpoint) is local


def test_non_loopback_needs_allow_remote_and_then_logs_a_caution(
        tiny_bundle: Path, caplog: pytest.LogCaptureFixture) -> None:
    streams = {"streams": {"a": {"bundle": str(tiny_bundle)}}}
    with pytest.raises(ConfigError, match="allow_remote"):
        load_config(None, {**streams, "output": "tcp://0.0.0.0:*"})
    with pytest.raises(ConfigError, match="insecure-no-auth"):  # and CURVE, or the loud flag
        load_config(None, {**streams, "output": "tcp://0.0.0.0:*", "allow_remote": True})
    cfg = load_config(None, {**streams, "input": "tcp://127.0.0.1:*", "output": "tcp://0.0.0.0:*",
                             "allow_remote": True, "insecure_no_auth": True, "linger_ms": 0})
    ctx = zmq.Context()
    server = Server(cfg, ctx=ctx)
    with caplog.at_level(logging.WARNING, logger="rigcast.runtime.serve.server"):
        server.startup()
    server.shutdown()
    ctx.term()
    cautions = [r.getMessage() for r in caplog.records if r.levelno == logging.WARNING]
    assert any("INSECURE" in m and "reachable from the network" in m for m in cautions), cautions


def test_every_flag_field_is_a_cli_flag_and_reaches_the_config(tmp_path: Path) -> None:
    parser = argparse.ArgumentParser()
    add_serve_arguments(parser)
    options = {a.dest: a for a in parser._actions}
    for cls, prefix in ((ServerConfig, "server__"), (StreamConfig, "stream__")):
        for f in flag_fields(cls):
            assert prefix + f.name in options, f.name
    args = parser.parse_args(["--config", str(write(tmp_path, TOML)), "--bundle",
                              "b=other.rcb", "--bundle", "/x/face2.rcb", "--fit-error-schedule",
                              "after_publish", "--telemetry-hz", "4", "--beta", "0.1",
                              "--no-stabilise", "--threads", "2"])
    cfg = config_from_args(args)
    assert (cfg.fit_error_schedule, cfg.telemetry_hz, cfg.threads) == ("after_publish", 4.0, 2)
    assert [s.stream for s in cfg.streams] == ["actor1", "b", "face2"]
    assert cfg.stream("b").bundle == (Path.cwd() / "other.rcb")
    assert all(s.beta == 0.1 and not s.stabilise for s in cfg.streams)


def test_bad_flag_value_is_refused_by_the_parser() -> None:
    parser = argparse.ArgumentParser()
    add_serve_arguments(parser)
    with pytest.raises(SystemExit):
        parser.parse_args(["--fit-error-schedule", "sometimes"])


def test_the_old_fit_error_spellings_still_work_with_a_line_saying_so(
        tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    """serve's fit_error (when) is fit_error_schedule and solve's --fit-error (which vertices) is
    --fit-error-scope: one name per concept (issue 16); the old spellings are kept for now."""
    old_toml = TOML.replace("fit_error_schedule", "fit_error")
    with caplog.at_level("WARNING"):
        cfg = load_config(write(tmp_path, old_toml))
    assert cfg.fit_error_schedule == "every_n" == cfg.fit_error
    assert "config key fit_error is now fit_error_schedule" in caplog.text
    with pytest.raises(ConfigError, match="fit_error and fit_error_schedule are the same"):
        load_config(write(tmp_path, old_toml), {"fit_error_schedule": "off"})
    serve = argparse.ArgumentParser()
    add_serve_arguments(serve)
    caplog.clear()
    with caplog.at_level("WARNING"):
        args = serve.parse_args(["--fit-error", "off"])
    assert args.server__fit_error_schedule == "off"
    assert "--fit-error is now --fit-error-schedule" in caplog.text
    with pytest.raises(SystemExit):
        serve.parse_args(["--fit-error", "sometimes"])
    from rigcast.commands.cli import build_parser

    parser = build_parser()
    caplog.clear()
    with caplog.at_level("WARNING"):
        solve = parser.parse_args(["solve", "b.rcb", "t.npz", "-o", "o.csv", "--fit-error", "full"])
    assert solve.fit_error_scope == "full"
    assert "--fit-error is now --fit-error-scope" in caplog.text
    assert parser.parse_args(["solve", "b.rcb", "t.npz", "-o", "o.csv"]).fit_error_scope == "full"

"""Checks of config values, each raising the one ConfigError that names the key: endpoints
(loopback or not), the metrics endpoint, numbers, and a TOML value against a field's type hint.
runtime/serve/config.py defines the configs and re-exports what others import from there."""

from __future__ import annotations

import ipaddress
import math
import types
import typing
from pathlib import Path
from typing import Any, Literal, get_args, get_origin
from urllib.parse import urlsplit

from rigcast.runtime.errors import EXIT_USAGE, RigcastError


class ConfigError(RigcastError, ValueError):
    """A config value is missing, unknown, or bad; the message names the key."""

    advice = "fix that setting; `rigcast serve --help` lists them all"
    exit_code = EXIT_USAGE


def is_loopback(endpoint: str) -> bool:
    """True when a ZeroMQ endpoint cannot be reached from another machine."""
    scheme = endpoint.split("://", 1)[0]
    if scheme in ("ipc", "inproc"):
        return True
    host = urlsplit(endpoint).hostname or ""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False  # "*", an interface name, or a host name: reachable as far as we can tell


def check_endpoint(endpoint: str, key: str, allow_remote: bool) -> None:
    if not isinstance(endpoint, str) or "://" not in endpoint:
        raise ConfigError(f"{key} must be a ZeroMQ endpoint like tcp://127.0.0.1:5570, "
                          f"got {endpoint!r}")
    scheme = endpoint.split("://", 1)[0]
    if scheme not in ("tcp", "ipc", "inproc"):
        raise ConfigError(f"{key}: transport {scheme!r} is not supported (tcp, ipc, inproc)")
    if not is_loopback(endpoint) and not allow_remote:
        raise ConfigError(
            f"{key} {endpoint} is not a loopback address; the server would be reachable from the "
            "network. Pass allow_remote (--allow-remote) to do this on a closed stage network"
        )


def check_metrics(host: str, port: int, allow_remote: bool, insecure_no_auth: bool) -> None:
    """The metrics endpoint binds as the sockets do: loopback, or a closed network on purpose
    (allow_remote), and without authentication only when said so (insecure_no_auth)."""
    if not 0 <= port <= 65535:
        raise ConfigError(f"metrics_port must be 0..65535, got {port}")
    if not host or "/" in host:
        raise ConfigError(f"metrics_host must be a host address like 127.0.0.1, got {host!r}")
    if is_loopback(f"tcp://[{host}]:{port}" if ":" in host else f"tcp://{host}:{port}"):
        return
    if not allow_remote:
        raise ConfigError(f"metrics_host {host} is not a loopback address; pass allow_remote "
                          "(--allow-remote) to expose metrics on a closed stage network")
    if not insecure_no_auth:
        raise ConfigError(f"metrics_host {host}: the metrics endpoint is plain HTTP without "
                          "authentication; pass --insecure-no-auth to accept that, or keep it "
                          "on 127.0.0.1 and scrape through an SSH tunnel")


def positive(value: float, key: str) -> None:
    if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
        raise ConfigError(f"{key} must be a positive number, got {value!r}")


def non_negative(value: float, key: str) -> None:
    if not (isinstance(value, int | float) and math.isfinite(value) and value >= 0):
        raise ConfigError(f"{key} must be a number >= 0, got {value!r}")


def coerce(value: Any, hint: Any, key: str) -> Any:
    """Check a TOML value against a field's type hint and convert it (str -> Path, int -> float)."""
    origin = get_origin(hint)
    if origin in (typing.Union, types.UnionType):
        options = get_args(hint)
        if value is None and type(None) in options:
            return None
        inner = [o for o in options if o is not type(None)]
        return coerce(value, inner[0], key)
    if origin is Literal:
        if value not in get_args(hint):
            raise ConfigError(f"{key} must be one of {list(get_args(hint))}, got {value!r}")
        return value
    if hint is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{key} must be true or false, got {value!r}")
        return value
    if hint is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{key} must be an integer, got {value!r}")
        return value
    if hint is float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ConfigError(f"{key} must be a number, got {value!r}")
        return float(value)
    if hint is str:
        if not isinstance(value, str):
            raise ConfigError(f"{key} must be a string, got {value!r}")
        return value
    if hint is Path:
        if not isinstance(value, str | Path):
            raise ConfigError(f"{key} must be a path, got {value!r}")
        return Path(value)
    raise ConfigError(f"{key}: unsupported config type {hint!r}")  # pragma: no cover

"""The server's configuration: typed, frozen dataclasses defined once, loaded from TOML + overrides.

A config object only stores values; :func:`load_config` turns a TOML file (``tomllib``) and a
mapping of overrides (from command-line flags) into one, and every check lives in the dataclasses'
``__post_init__``. Each field that has a ``help`` in its metadata is also a command-line flag
(``runtime/serve/serve_main.py`` derives the flags from these fields, so the option list exists once).

TOML layout::

    input = "tcp://127.0.0.1:5570"
    output = "tcp://127.0.0.1:5571"
    fit_error_schedule = "after_publish" # or "every_n" / "off"

    [streams.actor1]
    bundle = "face.rcb"                  # relative paths are relative to the TOML file
    min_cutoff = 1.0
    beta = 10.0                          # per unit of each control's range

    [streams.actor1.groups.brow]         # per-group One Euro overrides
    min_cutoff = 0.5

Unknown streams are rejected with reason ``unknown_stream`` unless ``accept_any_stream`` is set;
then the first frame of a new stream id creates that stream with the settings and bundle of the
first configured stream (own filter state), up to ``max_streams`` streams in all.
"""

from __future__ import annotations

import logging
import tomllib
import typing
from collections.abc import Mapping
from dataclasses import MISSING, dataclass, field, fields, replace
from pathlib import Path
from typing import Any, Literal, get_args

from rigcast.runtime.messaging.protocol import MAX_STREAM_BYTES
from rigcast.runtime.serve.config_checks import ConfigError as ConfigError  # re-exported
from rigcast.runtime.serve.config_checks import check_endpoint, check_metrics, coerce, non_negative, positive
from rigcast.runtime.serve.config_checks import is_loopback as is_loopback  # re-exported

log = logging.getLogger(__name__)

# When the server computes the fit error (after every publish, on every Nth frame, never):
# fit_error_schedule, --fit-error-schedule. Which vertices a solve reads for it is another
# concept: the fit error's scope (batch.FitErrorScope, `rigcast solve --fit-error-scope`).
FitErrorSchedule = Literal["after_publish", "every_n", "off"]
# Which mesh of each processed frame the server publishes on msh.<stream>, if any.
MeshPublishing = Literal["off", "raw", "stabilised"]
# What a live stream publishes while its frames are off-manifold (the flag is set in every case):
# the solved controls, the last good controls, or controls easing towards them.
OffManifoldAction = Literal["pass", "hold", "ease"]


def _flag(help_text: str, default: Any, *, live: bool = False) -> Any:
    """A field that is also a command-line flag; ``live``: a live stream's only (not a solve's)."""
    return field(default=default, metadata={"help": help_text, "live": live})


@dataclass(frozen=True)
class GroupFilter:
    """One Euro parameters for the controls of one schema group."""

    group: str
    min_cutoff: float
    beta: float
    d_cutoff: float


@dataclass(frozen=True)
class StreamConfig:
    """One stream (actor): its bundle, its filter and its stabilisation.

    The one options dataclass of the solve's per-stream settings: ``rigcast serve`` holds one per
    stream, ``rigcast solve`` one for the take (``batch.SolveOptions.stream``, read from the same
    TOML file with ``--config``). A solve needs neither ``stream`` nor ``bundle``; the server's
    loader requires ``bundle``.
    """

    stream: str = "take"
    bundle: Path = Path()
    # One Euro defaults are a starting point of ours, measured on the demo takes (README, "Tuning
    # the filter"); tune them with the procedure given there. d_cutoff = 1 Hz follows Casiez et al. 2012.
    # beta is per unit of each control's range, so it means the same for weights and angles.
    min_cutoff: float = _flag("One Euro minimum cutoff in Hz (lower = smoother when slow)", 1.0)
    beta: float = _flag("One Euro speed coefficient per unit of each control's range "
                        "(higher = less lag when fast)", 10.0)
    d_cutoff: float = _flag("One Euro cutoff for the derivative, in Hz", 1.0)
    passthrough: bool = _flag("publish the solved controls unfiltered (still clamped)", False)
    gap_ms: float = _flag("reset the filter after this long without frames, in ms", 250.0)
    stabilise: bool | None = _flag(
        "remove rigid head motion using the bundle's stable vertices; default: only when the "
        "build found a rigid region on the rig (rigcast inspect shows it)", None)
    stabilise_scale: bool = _flag("also remove uniform scale when stabilising (Umeyama)", False)
    realign: int = _flag(
        "stabilised solves: fit each frame's rigid motion again on every vertex against its "
        "solved mesh and solve again, this many times (sensor noise on the stable vertices "
        "turns the first fit; each pass costs a forward pass and a second solve per frame)", 1)
    off_manifold_threshold: float | None = _flag(
        "a fixed fit RMS (mesh units) above which a frame is off-manifold; default: the "
        "adaptive rule (running median + 6 MAD of the worst-vertex error)", None
    )
    on_off_manifold: OffManifoldAction = _flag(  # noqa: RUF009
        "live: what to publish while frames are off-manifold (flag set in every case): pass "
        "(the solved controls), hold (the last good controls), ease (towards them)", "pass",
        live=True)
    off_manifold_ease_ms: float = _flag(
        "live, with on_off_manifold=ease: time constant of the ease towards the last good "
        "controls, in ms", 100.0, live=True)
    groups: tuple[GroupFilter, ...] = ()

    def __post_init__(self) -> None:
        where = f"streams.{self.stream}"
        if not self.stream or not isinstance(self.stream, str):
            raise ConfigError(f"stream id must be a non-empty string, got {self.stream!r}")
        if len(self.stream.encode()) > MAX_STREAM_BYTES:
            raise ConfigError(f"{where}: stream id longer than {MAX_STREAM_BYTES} bytes (UTF-8)")
        if self.on_off_manifold not in get_args(OffManifoldAction):
            raise ConfigError(f"{where}.on_off_manifold must be one of "
                              f"{get_args(OffManifoldAction)}, got {self.on_off_manifold!r}")
        for name in ("min_cutoff", "d_cutoff", "gap_ms", "off_manifold_ease_ms"):
            positive(getattr(self, name), f"{where}.{name}")
        non_negative(self.beta, f"{where}.beta")
        if self.off_manifold_threshold is not None:
            positive(self.off_manifold_threshold, f"{where}.off_manifold_threshold")
        if (isinstance(self.realign, bool) or not isinstance(self.realign, int)
                or not 0 <= self.realign <= 5):
            raise ConfigError(f"{where}.realign must be an integer in 0..5, got "
                              f"{self.realign!r}")
        for g in self.groups:
            positive(g.min_cutoff, f"{where}.groups.{g.group}.min_cutoff")
            positive(g.d_cutoff, f"{where}.groups.{g.group}.d_cutoff")
            non_negative(g.beta, f"{where}.groups.{g.group}.beta")


def filter_defaults() -> tuple[float, float, float]:
    """(min_cutoff, beta, d_cutoff): StreamConfig's One Euro defaults, the one place they live,
    so that batch solves, the CLI and the server can never disagree."""
    cfg = StreamConfig()
    return cfg.min_cutoff, cfg.beta, cfg.d_cutoff


@dataclass(frozen=True)
class ServerConfig:
    """Everything ``rigcast serve`` needs; see the module docstring for the TOML layout."""

    streams: tuple[StreamConfig, ...]
    input: str = _flag("endpoint of the ROUTER socket that receives mesh frames",
                       "tcp://127.0.0.1:5570")
    output: str = _flag("endpoint of the PUB socket for controls, telemetry and events",
                        "tcp://127.0.0.1:5571")
    allow_remote: bool = _flag("allow binding a non-loopback address (closed stage network only)",
                               False)
    accept_any_stream: bool = _flag(
        "serve unconfigured stream ids with the first stream's bundle and settings", False
    )
    max_streams: int = _flag("most streams one server holds", 16)
    threads: int = _flag("onnxruntime intra-op threads per session", 1)
    fit_error_schedule: FitErrorSchedule = _flag(  # noqa: RUF009
        "when to compute the fit error: after_publish, every_n, off",
        "after_publish")
    fit_error_every: int = _flag("with fit_error_schedule=every_n, compute it on every Nth frame",
                                 10)
    fit_error_max_share: float = _flag(
        "largest share of the server's time each stream's fit error may take (the streams "
        "take turns); frames past it are skipped (counted), and fits run only while no input "
        "waits, so they never slow the frames", 0.25)
    off_manifold_factor: float = _flag(
        "floor of the adaptive off-manifold rule = this x the bundle's training fit error", 3.0
    )
    telemetry_hz: float = _flag("telemetry messages per second per stream", 10.0)
    publish_meshes: MeshPublishing = _flag(  # noqa: RUF009
        "also publish each processed frame's mesh on msh.<stream> for `rigcast record "
        "--meshes`: off, raw (as received) or stabilised (moved into the neutral's frame)", "off")
    metrics_port: int | None = _flag(
        "serve Prometheus metrics over HTTP on this port (0: any free port); needs the metrics "
        "extra (pip install 'rigcast[metrics]')", None)
    metrics_host: str = _flag(
        "address of the metrics endpoint; a non-loopback one needs --allow-remote and, being "
        "plain HTTP, --insecure-no-auth", "127.0.0.1")
    window: int = _flag("sliding window for latency percentiles, in frames", 1000)
    max_message_bytes: int = _flag("largest accepted mesh payload, in bytes", 16 * 1024 * 1024)
    busy_poll_us: int = _flag(
        "after each frame, poll the input without sleeping for this many microseconds "
        "(yielding the CPU between polls), then block; 0 = always block", 0)
    # --- security (runtime/trust/security.py, runtime/trust/ownership.py, runtime/trust/reload.py) ---
    curve_secret_key: Path | None = _flag(  # noqa: RUF009
        "the server's secret key file (from `rigcast keys`): CurveZMQ on both sockets", None)
    authorized_keys: Path | None = _flag(  # noqa: RUF009
        "folder of the public key files (*.key) of the clients allowed to connect", None)
    insecure_no_auth: bool = _flag(
        "INSECURE: bind a non-loopback address without CURVE; anyone on the network can send "
        "frames, read every stream and ask for reloads", False)
    handshake_timeout_ms: int = _flag("close a connection whose ZeroMQ handshake takes longer", 2000)
    max_connections: int = _flag("most connections per socket; later handshakes are refused", 256)
    owner_timeout_s: float = _flag(
        "a stream's sender keeps it while it sends; another peer may claim it after this long "
        "without frames", 2.0)
    stream_idle_s: float = _flag(
        "a stream made by accept_any_stream is removed after this long without frames", 60.0)
    max_clock_step_s: float = _flag(
        "refuse a frame whose t_send_ns moved this much more or less than the server's clock "
        "since the sender's session began (bad_timestamp)", 10.0)
    reload_dirs: str = _flag(
        "folders reloads may load bundles from, separated by the OS path separator "
        "(default: the folders of the bundles served)", "")
    reload_max_file_bytes: int = _flag("largest bundle file a reload opens", 256 * 1024 * 1024)
    reload_max_unpacked_bytes: int = _flag(
        "largest total unpacked size of a reloaded bundle, checked before inflating", 512 * 1024 * 1024)
    reload_min_interval_s: float = _flag("least time between two reloads of one stream", 2.0)
    max_header_bytes: int = 4096
    max_drain: int = 32
    input_hwm: int = 32
    output_hwm: int = 1000
    linger_ms: int = 200

    def __post_init__(self) -> None:
        if not self.streams:
            raise ConfigError("no streams configured: give at least one bundle (streams.<id>)")
        ids = [s.stream for s in self.streams]
        dupes = sorted({s for s in ids if ids.count(s) > 1})
        if dupes:
            raise ConfigError(f"stream ids configured twice: {dupes}")
        for name in ("input", "output"):
            check_endpoint(getattr(self, name), name, self.allow_remote)
            if (not is_loopback(getattr(self, name)) and self.curve_secret_key is None
                    and not self.insecure_no_auth):
                raise ConfigError(
                    f"{name} {getattr(self, name)} is reachable from the network and CURVE is "
                    "off: give curve_secret_key and authorized_keys (--curve-secret-key, "
                    "--authorized-keys; make keys with `rigcast keys`), or pass "
                    "--insecure-no-auth to accept every peer")
        if self.metrics_port is not None:
            check_metrics(self.metrics_host, self.metrics_port, self.allow_remote,
                           self.insecure_no_auth)
        if (self.curve_secret_key is None) != (self.authorized_keys is None):
            raise ConfigError("curve_secret_key and authorized_keys go together (CURVE needs the "
                              "server's secret key and the folder of allowed client keys)")
        if self.input == self.output and not self.input.endswith(":*"):
            raise ConfigError(f"input and output endpoints are the same ({self.input})")
        if self.fit_error_schedule not in get_args(FitErrorSchedule):
            raise ConfigError(f"fit_error_schedule must be one of {get_args(FitErrorSchedule)}, "
                              f"got {self.fit_error_schedule!r}")
        if self.publish_meshes not in get_args(MeshPublishing):
            raise ConfigError(f"publish_meshes must be one of {get_args(MeshPublishing)}, "
                              f"got {self.publish_meshes!r}")
        holding = [s.stream for s in self.streams if s.on_off_manifold != "pass"]
        if holding and self.fit_error_schedule == "off":
            raise ConfigError(f"streams {holding} hold off-manifold frames, but "
                              "fit_error_schedule is off, so no frame is ever found off-manifold")
        for name in ("threads", "fit_error_every", "window", "max_message_bytes",
                     "max_header_bytes", "max_drain", "input_hwm", "output_hwm", "max_streams",
                     "handshake_timeout_ms", "max_connections", "reload_max_file_bytes",
                     "reload_max_unpacked_bytes"):
            value = getattr(self, name)
            if value < 1:
                raise ConfigError(f"{name} must be at least 1, got {value}")
        if not 0 <= self.busy_poll_us <= 1_000_000:
            raise ConfigError(f"busy_poll_us must be 0..1000000, got {self.busy_poll_us}")
        if self.linger_ms < 0:
            raise ConfigError(f"linger_ms must be >= 0, got {self.linger_ms}")
        positive(self.telemetry_hz, "telemetry_hz")
        positive(self.fit_error_max_share, "fit_error_max_share")
        if self.fit_error_max_share > 1.0:
            raise ConfigError(f"fit_error_max_share must be at most 1, "
                              f"got {self.fit_error_max_share}")
        positive(self.off_manifold_factor, "off_manifold_factor")
        for name in ("owner_timeout_s", "stream_idle_s", "max_clock_step_s"):
            positive(getattr(self, name), name)
        non_negative(self.reload_min_interval_s, "reload_min_interval_s")

    @property
    def fit_error(self) -> FitErrorSchedule:
        """Deprecated name of ``fit_error_schedule``."""
        return self.fit_error_schedule

    def stream(self, stream_id: str) -> StreamConfig | None:
        for s in self.streams:
            if s.stream == stream_id:
                return s
        return None


def flag_fields(cls: type) -> list[Any]:
    """The dataclass fields of ``cls`` that are also command-line flags."""
    return [f for f in fields(cls) if "help" in f.metadata]


def _fields_from(cls: type, data: Mapping[str, Any], where: str, skip: set[str]) -> dict[str, Any]:
    hints = typing.get_type_hints(cls)
    known = {f.name for f in fields(cls)} - skip
    unknown = sorted(set(data) - known)
    if unknown:
        prefix = f"{where}." if where else ""
        raise ConfigError(f"unknown config key {prefix}{unknown[0]} "
                          f"(known: {', '.join(sorted(known))})")
    out = {}
    for name, value in data.items():
        key = f"{where}.{name}" if where else name
        out[name] = coerce(value, hints[name], key)
    return out


def _stream_from(stream_id: str, data: Mapping[str, Any], base_dir: Path | None) -> StreamConfig:
    where = f"streams.{stream_id}"
    if not isinstance(data, Mapping):
        raise ConfigError(f"{where} must be a table")
    data = dict(data)
    groups_raw = data.pop("groups", {})
    values = _fields_from(StreamConfig, data, where, skip={"stream", "groups"})
    if "bundle" not in values:
        raise ConfigError(f"{where}.bundle is missing")
    bundle = values["bundle"]
    if base_dir is not None and not bundle.is_absolute():
        values["bundle"] = base_dir / bundle
    groups = []
    if not isinstance(groups_raw, Mapping):
        raise ConfigError(f"{where}.groups must be a table")
    for gname, gdata in groups_raw.items():
        gwhere = f"{where}.groups.{gname}"
        if not isinstance(gdata, Mapping):
            raise ConfigError(f"{gwhere} must be a table")
        gvals = _fields_from(GroupFilter, gdata, gwhere, skip={"group"})
        defaults = {k: values.get(k, _default(StreamConfig, k))
                    for k in ("min_cutoff", "beta", "d_cutoff")}
        groups.append(GroupFilter(group=str(gname), **{**defaults, **gvals}))
    return StreamConfig(stream=stream_id, groups=tuple(groups), **values)


def _default(cls: type, name: str) -> Any:
    for f in fields(cls):
        if f.name == name:
            return f.default if f.default is not MISSING else None
    raise KeyError(name)  # pragma: no cover


def load_config(path: Path | None, overrides: Mapping[str, Any] | None = None) -> ServerConfig:
    """Build a ServerConfig from a TOML file (or none) and overrides.

    ``overrides`` holds top-level ServerConfig keys, plus ``streams`` ({id: {key: value}}, merged
    into the file's streams, adding new ones; give absolute bundle paths there, since relative
    ones resolve against the TOML file's folder) and ``stream_overrides`` ({key: value} applied to
    every stream, e.g. the filter flags). Raises ConfigError naming the bad key.
    """
    data: dict[str, Any] = {}
    base_dir: Path | None = None
    if path is not None:
        path = Path(path)
        try:
            with path.open("rb") as fh:
                data = tomllib.load(fh)
        except FileNotFoundError:
            raise ConfigError(f"config file {path} does not exist") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"config file {path} is not valid TOML: {exc}") from None
        base_dir = path.parent
    overrides = dict(overrides or {})
    streams_raw: dict[str, dict[str, Any]] = {}
    file_streams = data.pop("streams", {})
    if not isinstance(file_streams, Mapping):
        raise ConfigError("streams must be a table of [streams.<id>] tables")
    for sid, sdata in file_streams.items():
        if not isinstance(sdata, Mapping):
            raise ConfigError(f"streams.{sid} must be a table")
        streams_raw[str(sid)] = dict(sdata)
    for sid, sdata in dict(overrides.pop("streams", {}) or {}).items():
        streams_raw.setdefault(str(sid), {}).update(sdata)
    every = dict(overrides.pop("stream_overrides", {}) or {})
    top = {**data, **{k: v for k, v in overrides.items() if v is not None}}
    _renamed(top, "fit_error", "fit_error_schedule")
    values = _fields_from(ServerConfig, top, "", skip={"streams"})
    streams = []
    for sid, sdata in streams_raw.items():
        merged = {**sdata, **{k: v for k, v in every.items() if v is not None}}
        streams.append(_stream_from(sid, merged, base_dir))
    return ServerConfig(streams=tuple(streams), **values)


def _renamed(values: dict[str, Any], old: str, new: str) -> None:
    """Move a value given under a key's old name to its new one, with one line saying so."""
    if values.get(old) is None:
        values.pop(old, None)
        return
    if values.get(new) is not None:
        raise ConfigError(f"{old} and {new} are the same setting ({old} is its old name); "
                          f"give {new} only")
    log.warning("config key %s is now %s (the old name still works for now)", old, new)
    values[new] = values.pop(old)


def with_stream(config: ServerConfig, stream: StreamConfig) -> ServerConfig:
    """A copy of ``config`` with ``stream`` added (or replacing the stream of the same id)."""
    kept = tuple(s for s in config.streams if s.stream != stream.stream)
    return replace(config, streams=(*kept, stream))

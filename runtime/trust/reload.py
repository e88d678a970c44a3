"""Reload policy: which bundle files a ``reload`` request may open, and what is checked before
anything in them is inflated or handed to onnxruntime.

- A request names a bundle by a path relative to an allowed folder (or an absolute path inside
  one); the allowed folders are configured (``reload_dirs``) or, by default, the folders of the
  bundles the server was started with. Links are resolved before the check.
- The file may be at most ``reload_max_file_bytes``; the ZIP central directory's declared sizes
  (of the bundle and of the ``arrays.npz`` inside it) may add up to at most
  ``reload_max_unpacked_bytes``, checked before any member is inflated. Python's zipfile never
  returns more than a member's declared size, so the declared sizes bound the memory.
- ONNX external data is refused: every tensor in both graphs (initializers, sparse
  initializers, tensor attributes of nodes, nested subgraphs, functions) is checked for
  ``data_location = EXTERNAL`` or ``external_data`` entries, by walking the protobuf wire format
  (the ONNX IR, onnx.proto, field numbers below), before a session is created. onnxruntime
  would otherwise read the files those entries name, relative to its working folder.
- Each stream takes at most one reload per ``reload_min_interval_s``.
- Messages that go back on the wire name the bundle as the client asked for it and never the
  server's folders; "does not exist", "not a file" and "not a ZIP" all read alike.
"""

from __future__ import annotations

import io
import logging
import math
import os
import queue
import re
import threading
import time
import zipfile
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

from rigcast.runtime.bundle import BundleError
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.messaging import protocol
from rigcast.runtime.schema import SchemaError
from rigcast.runtime.serve.config import ServerConfig
from rigcast.runtime.solve.pipeline import StreamModel, StreamState, check_compatible, load_stream_model

log = logging.getLogger(__name__)

_ABS_PATH = re.compile(r"(?:[A-Za-z]:)?[/\\][^\s'\"]*[/\\]([^/\\\s'\"]+)")


class ReloadRefused(RigcastError, ValueError):
    """A reload is refused; the message is safe to send to the client."""

    advice = "reload a bundle from one of the server's allowed folders"


def allowed_folders(config: ServerConfig) -> tuple[Path, ...]:
    """The folders reloads may read, resolved (configured, else the served bundles' folders)."""
    if config.reload_dirs:
        dirs = [Path(d) for d in config.reload_dirs.split(os.pathsep) if d]
    else:
        dirs = [s.bundle.parent for s in config.streams]
    out: list[Path] = []
    for d in dirs:
        r = d.resolve()
        if r not in out:
            out.append(r)
    return tuple(out)


def redact(text: str) -> str:
    """``text`` with every absolute path cut to its last component."""
    return _ABS_PATH.sub(r"\1", text)


def resolve_request(name: str, folders: Sequence[Path]) -> Path:
    """The file a reload request names, inside an allowed folder; ReloadRefused otherwise."""
    shown = redact(name)[:120]
    refusal = ReloadRefused(f"no bundle {shown!r} in the folders this server reloads from")
    if "\x00" in name:
        raise refusal
    asked = Path(name)
    candidates = [asked] if asked.is_absolute() else [d / asked for d in folders]
    for candidate in candidates:
        try:
            real = candidate.resolve()
        except (OSError, RuntimeError):
            continue
        if any(real.is_relative_to(d) for d in folders) and real.is_file():
            return real
    raise refusal


def check_archive(path: Path, *, max_file_bytes: int, max_unpacked_bytes: int) -> None:
    """Size caps from the ZIP directory (outer archive and arrays.npz) and no ONNX external data;
    ReloadRefused naming what is wrong, never the folder."""
    name = path.name
    try:
        size = path.stat().st_size
    except OSError:
        raise ReloadRefused(f"bundle {name!r} cannot be read") from None
    if size > max_file_bytes:
        raise ReloadRefused(f"bundle {name!r} is {size} bytes, over the limit of {max_file_bytes}")
    try:
        with zipfile.ZipFile(path) as zf:
            total = _declared(zf.infolist(), name, max_unpacked_bytes)
            members = {i.filename: i for i in zf.infolist()}
            npz = members.get("arrays.npz")
            if npz is not None:
                inner = zf.read(npz)  # bounded: its declared size passed the cap above
                with zipfile.ZipFile(io.BytesIO(inner)) as nz:
                    _declared(nz.infolist(), f"{name}/arrays.npz", max_unpacked_bytes - total)
            for graph in ("inverse.onnx", "forward.onnx"):
                if graph in members:
                    where = external_data_tensor(zf.read(members[graph]))
                    if where is not None:
                        raise ReloadRefused(f"bundle {name!r}: {graph} stores tensor {where!r} "
                                            "as external data, which a server does not load")
    except ReloadRefused:
        raise
    except (zipfile.BadZipFile, zipfile.LargeZipFile, OSError, EOFError, RuntimeError,
            ValueError, NotImplementedError) as exc:
        log.info("reload of %s refused: %s", path, exc)
        raise ReloadRefused(f"bundle {name!r} is not a readable rigcast bundle") from None


def check_served(path: Path, config: ServerConfig) -> None:
    """The same checks for a bundle the server starts with; BundleError naming the file."""
    try:
        check_archive(path, max_file_bytes=config.reload_max_file_bytes,
                      max_unpacked_bytes=config.reload_max_unpacked_bytes)
    except ReloadRefused as exc:
        raise BundleError(f"bundle {path}: {exc}") from None


def _declared(infos: list[zipfile.ZipInfo], where: str, budget: int) -> int:
    if len(infos) > 64:
        raise ReloadRefused(f"{where!r} has {len(infos)} members; a bundle has a handful")
    total = sum(max(i.file_size, 0) for i in infos)
    if total > budget:
        raise ReloadRefused(f"{where!r} unpacks to {total} bytes, over the limit")
    return total


# --- ONNX protobuf walk --------------------------------------------------------------------
# Field numbers from onnx.proto (ONNX IR): ModelProto.graph 7, .functions 25; GraphProto.node 1,
# .initializer 5, .sparse_initializer 15; NodeProto.attribute 5; AttributeProto.t 5, .g 6,
# .tensors 10, .graphs 11, .sparse_tensor 22, .sparse_tensors 23; FunctionProto.node 7;
# SparseTensorProto.values 1, .indices 2; TensorProto.name 8, .external_data 13,
# .data_location 14 (EXTERNAL = 1).
_GRAPH, _NODE, _ATTR, _TENSOR, _SPARSE, _FUNCTION = range(6)
_CHILDREN: dict[int, dict[int, int]] = {
    -1: {7: _GRAPH, 25: _FUNCTION},  # ModelProto
    _GRAPH: {1: _NODE, 5: _TENSOR, 15: _SPARSE},
    _NODE: {5: _ATTR},
    _ATTR: {5: _TENSOR, 6: _GRAPH, 10: _TENSOR, 11: _GRAPH, 22: _SPARSE, 23: _SPARSE},
    _FUNCTION: {7: _NODE},
    _SPARSE: {1: _TENSOR, 2: _TENSOR},
}


def _fields(buf: memoryview) -> Iterator[tuple[int, int, int | memoryview]]:
    """(field number, wire type, value) of one protobuf message; ValueError when malformed."""
    pos, end = 0, len(buf)

    def varint() -> int:
        nonlocal pos
        shift = result = 0
        while True:
            if pos >= end or shift > 63:
                raise ValueError("truncated varint")
            b = buf[pos]
            pos += 1
            result |= (b & 0x7F) << shift
            if not b & 0x80:
                return result
            shift += 7

    while pos < end:
        key = varint()
        number, wire = key >> 3, key & 7
        if wire == 0:
            yield number, wire, varint()
        elif wire == 1 or wire == 5:
            pos += 8 if wire == 1 else 4
            if pos > end:
                raise ValueError("truncated fixed field")
        elif wire == 2:
            n = varint()
            if pos + n > end:
                raise ValueError("truncated length-delimited field")
            yield number, wire, buf[pos:pos + n]
            pos += n
        else:
            raise ValueError(f"unsupported wire type {wire}")


def external_data_tensor(model: bytes) -> str | None:
    """The name of the first tensor stored as external data in a serialised ONNX model, or None.
    ValueError when the bytes are not a protobuf message."""
    stack: list[tuple[int, memoryview, int]] = [(-1, memoryview(model), 0)]
    while stack:
        kind, buf, depth = stack.pop()
        if depth > 64:
            raise ValueError("ONNX graph nests too deep")
        if kind == _TENSOR:
            name, external = "", False
            for number, wire, value in _fields(buf):
                if number == 8 and wire == 2 and isinstance(value, memoryview):
                    name = bytes(value).decode("utf-8", "replace")
                elif (number == 13 and wire == 2) or (number == 14 and wire == 0 and value == 1):
                    external = True
            if external:
                return name or "(unnamed)"
            continue
        children = _CHILDREN[kind]
        for number, wire, value in _fields(buf):
            child = children.get(number)
            if child is not None and wire == 2 and isinstance(value, memoryview):
                stack.append((child, value, depth + 1))
    return None


# --- the background reload -------------------------------------------------------------------

def public_model(model: StreamModel) -> StreamModel:
    """The model labelled by its file name only: the label goes into replies and telemetry."""
    return replace(model, label=Path(model.label).name)


class Reloader:
    """Runs reloads on background threads under the policy above; the server collects the
    outcomes between frames with ``results``."""

    def __init__(self, config: ServerConfig) -> None:
        self.config = config
        self.folders = allowed_folders(config)
        self.busy: set[str] = set()
        self._last: dict[str, float] = {}
        self._results: queue.SimpleQueue[tuple[bytes, str, StreamModel | str]] = (
            queue.SimpleQueue())

    def start(self, identity: bytes, stream: str, name: str, old: StreamModel,
              threshold: float | None) -> str | None:
        """Start reloading ``stream`` from the bundle ``name``; a refusal to reply at once, or
        None when the work started."""
        if stream in self.busy:
            return f"a reload of stream {stream!r} is already in progress"
        now = time.monotonic()
        wait = self._last.get(stream, -math.inf) + self.config.reload_min_interval_s - now
        if wait > 0:
            return f"stream {stream!r} was reloaded moments ago; try again in {wait:.1f} s"
        try:
            path = resolve_request(name, self.folders)
        except ReloadRefused as exc:
            return str(exc)
        self._last[stream] = now
        self.busy.add(stream)
        cfg = self.config

        def work() -> None:
            try:
                check_archive(path, max_file_bytes=cfg.reload_max_file_bytes,
                              max_unpacked_bytes=cfg.reload_max_unpacked_bytes)
                model = load_stream_model(path, threads=cfg.threads, threshold=threshold,
                                          factor=cfg.off_manifold_factor)
                check_compatible(old, model)
                self._results.put((identity, stream, public_model(model)))
            except ReloadRefused as exc:
                self._results.put((identity, stream, str(exc)))
            except (BundleError, SchemaError, OSError, ValueError, KeyError) as exc:
                log.info("stream %s: reload of %s refused: %s", stream, path, exc)
                self._results.put((identity, stream, f"bundle {path.name!r} refused: "
                                   f"{redact(str(exc))[:300]}"))
            except Exception as exc:  # the worker must always answer
                # Without an answer the stream would refuse every later reload as in progress.
                log.exception("stream %s: reload of %s failed unexpectedly", stream, path)
                self._results.put((identity, stream, f"bundle {path.name!r} refused: unexpected "
                                   f"{type(exc).__name__}"))

        threading.Thread(target=work, name=f"reload-{stream}", daemon=True).start()
        log.info("stream %s: loading %s in the background", stream, path)
        return None

    def results(self) -> Iterator[tuple[bytes, str, StreamModel | str]]:
        """Finished reloads: (identity, stream, new model or refusal message)."""
        while True:
            try:
                out = self._results.get_nowait()
            except queue.Empty:
                return
            self.busy.discard(out[1])
            yield out

    def finish(self, streams: Mapping[str, StreamState], reply: Callable[[bytes, bytes], None],
               event: Callable[[str, str | None, dict[str, Any]], None]) -> None:
        """Answer every finished reload and swap the accepted models in, between frames."""
        for identity, stream, outcome in self.results():
            state = streams.get(stream)
            if isinstance(outcome, str) or state is None:
                message = outcome if isinstance(outcome, str) else f"stream {stream!r} expired"
                reply(identity, protocol.encode_reload_reply(stream, False, message))
                event("reload", stream, {"ok": False, "message": message})
                continue
            fingerprint = outcome.bundle.fingerprint
            if fingerprint == state.model.bundle.fingerprint:
                # The same models: nothing to swap; the off-manifold detector keeps its state.
                reply(identity, protocol.encode_reload_reply(
                    stream, True, f"stream {stream!r} already serves these models",
                    bundle=outcome.label, fingerprint=fingerprint))
                continue
            state.swap(outcome)
            log.info("stream %s: now serving %s", stream, outcome.label)
            reply(identity, protocol.encode_reload_reply(
                stream, True, f"stream {stream!r} now serves {outcome.label}",
                bundle=outcome.label, fingerprint=fingerprint))
            event("reload", stream, {"ok": True, "bundle": outcome.label,
                                     "fingerprint": fingerprint})

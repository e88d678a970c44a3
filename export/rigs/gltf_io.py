"""Reading glTF 2.0 files: buffers (GLB chunk, external files, data URIs), accessors into numpy
arrays, and the joint/morph bounds file of the glTF rig source.

References: glTF 2.0 specification, sections "URIs", "Buffers and Buffer Views", "Accessors"
(byteStride, normalized integers, sparse storage) and "GLB File Format Specification".
"""

from __future__ import annotations

import base64
import binascii
import json
import logging
from collections.abc import Mapping
from pathlib import Path
from typing import Any
from urllib.parse import unquote, unquote_to_bytes

import numpy as np
from rigcast.export.rigs.rig import RigError

log = logging.getLogger(__name__)

_COMPONENT = {5120: "<i1", 5121: "<u1", 5122: "<i2", 5123: "<u2", 5125: "<u4", 5126: "<f4"}
_NORM_DIVISOR = {5120: 127.0, 5121: 255.0, 5122: 32767.0, 5123: 65535.0}
_WIDTH = {"SCALAR": 1, "VEC2": 2, "VEC3": 3, "VEC4": 4, "MAT2": 4, "MAT3": 9, "MAT4": 16}


def load_bounds_json(source: str | Path | Mapping[str, Any] | None, *keys: str,
                     what: str = "bounds") -> dict[str, Any]:
    """A JSON object from a file path, a JSON string or a mapping, whose top-level keys are
    among ``keys`` (each an object of names); ``{}`` for None. Errors are RigErrors."""
    if source is None:
        return {}
    if isinstance(source, Mapping):
        data: Any = dict(source)
    else:
        text = str(source)
        if text.lstrip().startswith("{"):
            try:
                data = json.loads(text)
            except json.JSONDecodeError as e:
                raise RigError(f"{what} {text!r} are not valid JSON: {e}") from None
        else:
            path = Path(text)
            if not path.is_file():
                raise RigError(f"{what} file {path} does not exist")
            try:
                data = json.loads(path.read_text())
            except json.JSONDecodeError as e:
                raise RigError(f"{what} file {path} is not valid JSON: {e}") from None
    if not isinstance(data, dict) or not set(data) <= set(keys):
        raise RigError(f"{what} must be an object with {' and/or '.join(map(repr, keys))}, "
                       f"got {data!r}")
    for key in keys:
        if key in data and not isinstance(data[key], dict):
            raise RigError(f"{what} {key!r} must be an object of names, got {data[key]!r}")
    return data


def load_bounds(source: str | Path | Mapping[str, Any] | None) -> dict[str, Any]:
    """glTF bounds from a JSON file path, a JSON string, or a mapping (see ``GltfRig``)."""
    return load_bounds_json(source, "joints", "morph", what="glTF bounds")


class GltfReader:
    """Reads accessors of one loaded file into numpy arrays."""

    def __init__(self, gltf: Any, path: Path) -> None:
        self.gltf, self.path = gltf, path
        self._buffers: dict[int, bytes] = {}

    def buffer(self, index: int) -> bytes:
        if index not in self._buffers:
            buf = self.gltf.buffers[index]
            if buf.uri is None:
                blob = self.gltf.binary_blob()
                if blob is None:
                    raise RigError(f"{self.path}: buffer {index} has no uri and no GLB chunk")
                data = bytes(blob)
            elif buf.uri.startswith("data:"):
                data = decode_data_uri(buf.uri, f"{self.path}: buffer {index}")
            else:
                file = self.path.parent / unquote(buf.uri)  # URIs are percent-encoded
                if not file.is_file():
                    raise RigError(f"{self.path}: buffer file {file} does not exist")
                data = file.read_bytes()
            if len(data) < buf.byteLength:
                raise RigError(f"{self.path}: buffer {index} holds {len(data)} bytes, "
                               f"byteLength says {buf.byteLength}")
            self._buffers[index] = data
        return self._buffers[index]

    def _view(self, view_index: int, offset: int, count: int, dtype: str, width: int,
              where: str) -> np.ndarray:
        view = self.gltf.bufferViews[view_index]
        data = self.buffer(view.buffer)
        item = np.dtype(dtype).itemsize
        stride = view.byteStride or item * width
        start = (view.byteOffset or 0) + offset
        end = start + stride * (count - 1) + item * width if count else start
        if end > (view.byteOffset or 0) + view.byteLength or end > len(data):
            raise RigError(f"{self.path}: {where} reads past the end of bufferView {view_index}")
        arr = np.ndarray((count, width), dtype=dtype, buffer=data, offset=start,
                         strides=(stride, item))
        return arr.copy()

    def read(self, index: int, *, normalize_ints: bool = False) -> np.ndarray:
        """Accessor ``index`` as (count, width) float64 (ints as floats, normalised if flagged)."""
        acc = self.gltf.accessors[index]
        where = f"accessor {index}"
        if acc.componentType not in _COMPONENT or acc.type not in _WIDTH:
            raise RigError(f"{self.path}: {where} has unsupported componentType "
                           f"{acc.componentType} / type {acc.type}")
        dtype, width = _COMPONENT[acc.componentType], _WIDTH[acc.type]
        if acc.bufferView is not None:
            out = self._view(acc.bufferView, acc.byteOffset or 0, acc.count, dtype, width, where)
        else:
            out = np.zeros((acc.count, width), dtype=dtype)
        if acc.sparse is not None and acc.sparse.count:
            sp = acc.sparse
            if sp.indices.componentType not in (5121, 5123, 5125):
                raise RigError(f"{self.path}: {where} sparse indices have a bad componentType")
            idx = self._view(sp.indices.bufferView, sp.indices.byteOffset or 0, sp.count,
                             _COMPONENT[sp.indices.componentType], 1, where + " sparse indices")
            vals = self._view(sp.values.bufferView, sp.values.byteOffset or 0, sp.count, dtype,
                              width, where + " sparse values")
            if idx.size and idx.max() >= acc.count:
                raise RigError(f"{self.path}: {where} sparse index {idx.max()} >= count")
            out[idx[:, 0].astype(np.int64)] = vals
        result = out.astype(np.float64)
        if (acc.normalized or normalize_ints) and acc.componentType in _NORM_DIVISOR:
            result = np.maximum(result / _NORM_DIVISOR[acc.componentType], -1.0)
        return result


def decode_data_uri(uri: str, where: str) -> bytes:
    """The bytes of an RFC 2397 data URI, ``data:[<media type>][;base64],<data>``.

    glTF 2.0 (section "URIs") embeds buffers as data URIs with the media type
    ``application/octet-stream`` or ``application/gltf-buffer``; both are read, and so is any
    other type, base64 or percent-encoded. Raises RigError naming ``where`` for a broken URI.
    """
    header, comma, payload = uri.partition(",")
    if not uri.startswith("data:") or not comma:
        raise RigError(f"{where}: data URI has no ',' before its data: {uri[:60]!r}")
    if header.lower().endswith(";base64"):
        try:
            return base64.b64decode("".join(payload.split()), validate=True)
        except (binascii.Error, ValueError) as e:
            raise RigError(f"{where}: data URI is not valid base64 ({e})") from None
    return unquote_to_bytes(payload)

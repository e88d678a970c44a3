"""Bundle round trip, and every kind of wrong or corrupt bundle failing with a named BundleError.

The corrupt bundles are written as real ZIP files. Where a test tampers with an array or the
manifest it also rewrites the member checksums, so that the check under test, not the checksum,
is what catches it.
"""

from __future__ import annotations

import hashlib
import io
import json
import re
import zipfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import TINY, tiny_rig
from rigcast.export.bundling.synthetic_bundle import forward_graph, inverse_graph
from rigcast.runtime.bundle import BundleError, load_bundle, write_bundle
from rigcast.runtime.solve.pipeline import load_stream_model

Blobs = dict[str, Any]


def _read(path: Path) -> Blobs:
    with zipfile.ZipFile(path) as zf:
        blobs: Blobs = {name: zf.read(name) for name in zf.namelist()}
    blobs["manifest.json"] = json.loads(blobs["manifest.json"])
    with np.load(io.BytesIO(blobs["arrays.npz"])) as npz:
        blobs["arrays"] = {k: npz[k] for k in npz.files}
    return blobs


def _write(blobs: Blobs, path: Path, *, fix_checksums: bool = True) -> Path:
    buf = io.BytesIO()
    np.savez(buf, **blobs["arrays"])
    members = {"arrays.npz": buf.getvalue(), "inverse.onnx": blobs["inverse.onnx"],
               "forward.onnx": blobs["forward.onnx"]}
    manifest = dict(blobs["manifest.json"])
    if fix_checksums:
        manifest["members"] = {k: hashlib.sha256(v).hexdigest() for k, v in members.items()}
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("manifest.json", json.dumps(manifest))
        for name, data in members.items():
            if name not in blobs.get("drop", ()):
                zf.writestr(name, data)
    return path


def test_round_trip_keeps_every_array_the_schema_and_the_fingerprint(tiny_bundle: Path,
                                                                     tmp_path: Path) -> None:
    a = load_bundle(tiny_bundle)
    again = write_bundle(tmp_path / "again.rcb", name="tiny", schema=a.schema, neutral=a.neutral,
                         faces=a.faces, stable_indices=a.stable_indices,
                         input_indices=a.input_indices, inverse_onnx=a.inverse_onnx,
                         forward_onnx=a.forward_onnx,
                         extra={k: a.manifest[k] for k in ("training", "synthetic")})
    b = load_bundle(again)
    assert b.schema == a.schema and b.fingerprint == a.fingerprint
    for name in ("neutral", "faces", "stable_indices", "input_indices"):
        np.testing.assert_array_equal(getattr(b, name), getattr(a, name))
        assert not getattr(b, name).flags.writeable
    assert b.manifest["training"] == a.manifest["training"]


def _set(key: str, value: Any) -> Callable[[Blobs], None]:
    def edit(blobs: Blobs) -> None:
        blobs["manifest.json"][key] = value
    return edit


def _array(name: str, change: Callable[[np.ndarray], np.ndarray]) -> Callable[[Blobs], None]:
    def edit(blobs: Blobs) -> None:
        blobs["arrays"][name] = change(blobs["arrays"][name])
    return edit


def _nan_neutral(a: np.ndarray) -> np.ndarray:
    a = a.copy()
    a[5, 1] = np.nan
    return a


def _collinear_stable(blobs: Blobs) -> None:
    neutral = blobs["arrays"]["neutral"].copy()
    stable = blobs["arrays"]["stable_indices"]
    neutral[stable] = np.linspace(0, 1, len(stable))[:, None] * np.array([1.0, 2.0, 0.5])
    blobs["arrays"]["neutral"] = neutral


CORRUPTIONS: list[tuple[str, Callable[[Blobs], None], str]] = [
    ("format tag", _set("format", "something-else"), "not a rigcast bundle"),
    ("format version", _set("format_version", 99), "format version 99 is not supported"),
    ("control count", _set("control_count", 3), "manifest says 3 controls"),
    ("vertex count", _set("vertex_count", 7), "manifest says 7 vertices"),
    ("face count", _set("face_count", 1), "face_count 1"),
    ("fingerprint type", _set("fingerprint", "abc"), "'fingerprint' must be an object"),
    ("schema", _set("schema", {"controls": [{"name": "x", "min": 1, "max": 0}]}),
     "bad control schema"),
    ("NaN neutral", _array("neutral", _nan_neutral), "neutral mesh has NaN or Inf"),
    ("neutral shape", _array("neutral", lambda a: a[:, :2]), "neutral mesh must be (V, 3)"),
    ("string neutral", _array("neutral", lambda a: a.astype(str)), "neutral must hold numbers"),
    ("faces shape", _array("faces", lambda a: np.concatenate([a, a[:, :1]], axis=1)),
     "faces must be (F, 3) triangles"),
    ("faces range", _array("faces", lambda a: a + 10_000), "faces index outside"),
    ("float indices", _array("input_indices", lambda a: a.astype(np.float64) + 0.5),
     "input_indices must hold integers"),
    ("stable range", _array("stable_indices", lambda a: np.append(a[:-1], 10_000)),
     "stable_indices index outside"),
    ("stable repeats", _array("stable_indices", lambda a: np.append(a[:-1], a[0])),
     "stable_indices has repeated entries"),
    ("collinear stable", _collinear_stable, "coincident or collinear"),
]


@pytest.mark.parametrize(("edit", "words"), [c[1:] for c in CORRUPTIONS],
                         ids=[c[0] for c in CORRUPTIONS])
def test_a_wrong_bundle_fails_with_a_named_error(tiny_bundle: Path, tmp_path: Path,
                                                 edit: Callable[[Blobs], None], words: str) -> None:
    blobs = _read(tiny_bundle)
    edit(blobs)
    path = _write(blobs, tmp_path / "bad.rcb")
    with pytest.raises(BundleError, match=re.escape(words)) as info:
        load_bundle(path)
    assert str(path) in str(info.value)


def test_tampered_model_bytes_fail_the_checksum(tiny_bundle: Path, tmp_path: Path) -> None:
    blobs = _read(tiny_bundle)
    graph = bytearray(blobs["inverse.onnx"])
    graph[len(graph) // 2] ^= 0xFF
    blobs["inverse.onnx"] = bytes(graph)
    path = _write(blobs, tmp_path / "tampered.rcb", fix_checksums=False)
    with pytest.raises(BundleError, match=r"inverse.onnx is corrupt \(checksum mismatch\)"):
        load_bundle(path)


def test_missing_member_and_truncated_file(tiny_bundle: Path, tmp_path: Path) -> None:
    blobs = _read(tiny_bundle)
    blobs["drop"] = ("forward.onnx",)
    with pytest.raises(BundleError, match=re.escape("is missing forward.onnx")):
        load_bundle(_write(blobs, tmp_path / "short.rcb"))
    cut = tmp_path / "cut.rcb"
    cut.write_bytes(tiny_bundle.read_bytes()[: tiny_bundle.stat().st_size // 2])
    with pytest.raises(BundleError, match=re.escape(str(cut))):
        load_bundle(cut)


def test_a_forward_graph_of_another_rig_is_refused_at_open(tmp_path: Path) -> None:
    """Same sizes, so every shape check passes; only the rest pose tells the graphs apart."""
    rig = tiny_rig(TINY)
    moved = rig.neutral * np.float32(1.3) + np.float32(0.2)
    path = write_bundle(tmp_path / "mixed.rcb", name="mixed", schema=rig.schema, neutral=moved,
                        faces=rig.faces, stable_indices=rig.stable_indices,
                        input_indices=rig.input_indices, inverse_onnx=inverse_graph(rig),
                        forward_onnx=forward_graph(rig))
    with pytest.raises(BundleError, match="belongs to another rig"):
        load_stream_model(path, threads=1, threshold=None, factor=3.0)
    # The same graphs with their own neutral open fine.
    good = write_bundle(tmp_path / "good.rcb", name="good", schema=rig.schema, neutral=rig.neutral,
                        faces=rig.faces, stable_indices=rig.stable_indices,
                        input_indices=rig.input_indices, inverse_onnx=inverse_graph(rig),
                        forward_onnx=forward_graph(rig))
    assert load_stream_model(good, threads=1, threshold=None, factor=3.0).vertex_count == len(moved)


def _rewrite_arrays(src: Path, dst: Path, change: Callable[[dict[str, np.ndarray]], None]) -> Path:
    """Copy a bundle with its arrays.npz edited and its checksum made right again."""
    with zipfile.ZipFile(src) as zf:
        blobs = {name: zf.read(name) for name in zf.namelist()}
    with np.load(io.BytesIO(blobs["arrays.npz"])) as npz:
        arrays = {k: npz[k] for k in npz.files}
    change(arrays)
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    blobs["arrays.npz"] = buf.getvalue()
    manifest = json.loads(blobs["manifest.json"])
    manifest["members"]["arrays.npz"] = hashlib.sha256(blobs["arrays.npz"]).hexdigest()
    blobs["manifest.json"] = json.dumps(manifest).encode()
    with zipfile.ZipFile(dst, "w") as zf:
        for name, data in blobs.items():
            zf.writestr(name, data)
    return dst


REST_CORRUPTIONS: list[tuple[str, Callable[[dict[str, np.ndarray]], None], str]] = [
    ("rest without offset", lambda a: a.pop("refine_rest_offset"), "come together"),
    ("rest index range", lambda a: a.update(refine_rest_indices=a["refine_rest_indices"] + 10**6),
     "refine_rest_indices out of range"),
    ("rest basis shape", lambda a: a.update(refine_rest_basis=a["refine_rest_basis"][:, :-1]),
     "refine_rest_basis must be finite"),
    ("rest basis NaN", lambda a: a.update(refine_rest_basis=a["refine_rest_basis"] * np.nan),
     "refine_rest_basis must be finite"),
]


def test_the_rest_of_the_mesh_round_trips_and_bad_rest_arrays_are_refused(tmp_path: Path) -> None:
    from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle

    path = build_synthetic_bundle(tmp_path / "m.rcb", refine="projected", seed=3)
    b = load_bundle(path)
    assert b.refine_projection is not None
    rest = b.refine_projection.rest
    assert rest is not None and rest.basis.shape == (8, 3 * rest.indices.size)
    refined = set(b.refine_projection.indices.tolist()) | set(b.stable_indices.tolist())
    assert not refined & set(rest.indices.tolist())  # the rest is what neither reads
    assert not rest.basis.flags.writeable
    for label, change, words in REST_CORRUPTIONS:
        bad = _rewrite_arrays(path, tmp_path / f"{label}.rcb", change)
        with pytest.raises(BundleError, match=re.escape(words)):
            load_bundle(bad)

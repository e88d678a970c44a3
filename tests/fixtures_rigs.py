"""Helpers that write tiny glTF 2.0 files with pygltflib, for rig and take tests.

``write_gltf`` packs every array into one buffer (embedded for .glb, a data URI or a side .bin
for .gltf). Other test modules may import it.
"""

from __future__ import annotations

import base64
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pygltflib

_CTYPE = {np.dtype("<f4"): 5126, np.dtype("<u1"): 5121, np.dtype("<u2"): 5123,
          np.dtype("<u4"): 5125, np.dtype("<i2"): 5122}
_TYPE = {1: "SCALAR", 2: "VEC2", 3: "VEC3", 4: "VEC4", 16: "MAT4"}


@dataclass
class NodeSpec:
    """A node: TRS (or a column-major ``matrix``), children by index, optional mesh/skin."""

    name: str
    translation: Sequence[float] | None = None
    rotation: Sequence[float] | None = None  # quaternion x, y, z, w
    scale: Sequence[float] | None = None
    matrix: Sequence[float] | None = None
    children: list[int] = field(default_factory=list)
    mesh: int | None = None
    skin: int | None = None


@dataclass
class _Packer:
    blob: bytearray = field(default_factory=bytearray)
    views: list[pygltflib.BufferView] = field(default_factory=list)
    accessors: list[pygltflib.Accessor] = field(default_factory=list)

    def view(self, data: np.ndarray, stride: int | None = None) -> int:
        while len(self.blob) % 4:
            self.blob.append(0)
        raw = np.ascontiguousarray(data).tobytes()
        self.views.append(pygltflib.BufferView(buffer=0, byteOffset=len(self.blob),
                                               byteLength=len(raw), byteStride=stride))
        self.blob.extend(raw)
        return len(self.views) - 1

    def accessor(self, data: np.ndarray, *, normalized: bool = False, minmax: bool = False,
                 stride_pad: int = 0) -> int:
        """Add ``data`` (N, W) as an accessor; ``stride_pad`` extra bytes per element are
        interleaved as padding so the view has a byteStride."""
        data = np.asarray(data)
        n, w = data.shape
        if stride_pad:
            row = data.dtype.itemsize * w
            padded = np.zeros((n, row + stride_pad), dtype=np.uint8)
            padded[:, :row] = data.view(np.uint8).reshape(n, row)
            view = self.view(padded, stride=row + stride_pad)
        else:
            view = self.view(data)
        acc = pygltflib.Accessor(bufferView=view, componentType=_CTYPE[data.dtype], count=n,
                                 type=_TYPE[w], normalized=normalized or None)
        if minmax:
            acc.min = data.min(axis=0).astype(float).tolist()
            acc.max = data.max(axis=0).astype(float).tolist()
        self.accessors.append(acc)
        return len(self.accessors) - 1

    def sparse_accessor(self, dense: np.ndarray) -> int:
        """A VEC3 float accessor with no bufferView: zeros plus sparse non-zero rows."""
        rows = np.flatnonzero(np.any(dense != 0, axis=1)).astype(np.uint16)
        idx_view = self.view(rows)
        val_view = self.view(dense[rows].astype("<f4"))
        sparse = pygltflib.Sparse(
            count=len(rows),
            indices=pygltflib.AccessorSparseIndices(bufferView=idx_view, componentType=5123),
            values=pygltflib.AccessorSparseValues(bufferView=val_view),
        )
        self.accessors.append(pygltflib.Accessor(componentType=5126, count=len(dense),
                                                 type="VEC3", sparse=sparse))
        return len(self.accessors) - 1


def write_gltf(
    path: Path,
    positions: np.ndarray,
    faces: np.ndarray,
    *,
    targets: Sequence[np.ndarray] = (),
    target_names: Sequence[str] | None = None,
    mesh_weights: Sequence[float] | None = None,
    nodes: Sequence[NodeSpec] | None = None,
    skin_joints: Sequence[int] | None = None,
    joints: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    inverse_bind: np.ndarray | None = None,
    joints_1: np.ndarray | None = None,
    weights_1: np.ndarray | None = None,
    sparse_targets: bool = False,
    position_stride_pad: int = 0,
    external_bin: bool = False,
    mesh_name: str = "body",
) -> Path:
    """Write a one-mesh glTF (``.gltf`` or ``.glb`` by suffix) and return its path.

    positions: (V, 3); faces: (F, 3); targets: T arrays (V, 3); joints: (V, 4) integer array
    (its dtype, uint8 or uint16, is kept); weights: (V, 4) float32 or normalized uint8/uint16;
    inverse_bind: (J, 4, 4) row-major (written column-major). ``nodes`` default to one node
    holding the mesh; a node with ``mesh=0`` and ``skin=0`` holds a skinned mesh.
    """
    path = Path(path)
    pk = _Packer()
    attrs = pygltflib.Attributes(
        POSITION=pk.accessor(np.asarray(positions, "<f4"), minmax=True,
                             stride_pad=position_stride_pad))
    if joints is not None and weights is not None:
        attrs.JOINTS_0 = pk.accessor(np.asarray(joints))
        w = np.asarray(weights)
        attrs.WEIGHTS_0 = pk.accessor(w, normalized=w.dtype != np.float32)
    if joints_1 is not None and weights_1 is not None:  # a second set of four influences
        attrs.JOINTS_1 = pk.accessor(np.asarray(joints_1))
        attrs.WEIGHTS_1 = pk.accessor(np.asarray(weights_1, "<f4"))
    tgt = []
    for t in targets:
        t = np.asarray(t, "<f4")
        acc = pk.sparse_accessor(t) if sparse_targets else pk.accessor(t, minmax=True)
        tgt.append({"POSITION": acc})
    indices = pk.accessor(np.asarray(faces, "<u2").reshape(-1, 1))
    prim = pygltflib.Primitive(attributes=attrs, indices=indices, targets=tgt or None, mode=4)
    mesh = pygltflib.Mesh(name=mesh_name, primitives=[prim],
                          weights=list(mesh_weights) if mesh_weights is not None else None)
    if target_names is not None:
        mesh.extras = {"targetNames": list(target_names)}
    skins = []
    if skin_joints is not None:
        ibm = None
        if inverse_bind is not None:
            col = np.asarray(inverse_bind, "<f4").transpose(0, 2, 1).reshape(-1, 16)
            ibm = pk.accessor(col)
        skins.append(pygltflib.Skin(joints=list(skin_joints), inverseBindMatrices=ibm))
    node_specs = list(nodes) if nodes is not None else [NodeSpec("body", mesh=0)]
    gl_nodes = [
        pygltflib.Node(name=n.name, translation=list(n.translation) if n.translation else None,
                       rotation=list(n.rotation) if n.rotation else None,
                       scale=list(n.scale) if n.scale else None,
                       matrix=list(n.matrix) if n.matrix else None,
                       children=list(n.children), mesh=n.mesh, skin=n.skin)
        for n in node_specs
    ]
    child = {c for n in node_specs for c in n.children}
    roots = [i for i in range(len(node_specs)) if i not in child]
    gltf = pygltflib.GLTF2(
        asset=pygltflib.Asset(version="2.0"), scene=0, scenes=[pygltflib.Scene(nodes=roots)],
        nodes=gl_nodes, meshes=[mesh], skins=skins, accessors=pk.accessors,
        bufferViews=pk.views,
    )
    blob = bytes(pk.blob)
    if path.suffix == ".glb":
        gltf.buffers = [pygltflib.Buffer(byteLength=len(blob))]
        gltf.set_binary_blob(blob)
        gltf.save_binary(str(path))
    else:
        if external_bin:
            bin_path = path.with_suffix(".bin")
            bin_path.write_bytes(blob)
            uri = bin_path.name
        else:
            uri = "data:application/octet-stream;base64," + base64.b64encode(blob).decode()
        gltf.buffers = [pygltflib.Buffer(byteLength=len(blob), uri=uri)]
        gltf.save_json(str(path))
    return path


TRIANGLE = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
TRIANGLE_FACES = np.array([[0, 1, 2]])


def morph_triangle(path: Path, **kw: object) -> Path:
    """A triangle with two morph targets "lift" and "spread" (the hand-computed test case)."""
    t0 = np.array([[0.0, 0.0, 1.0], [0.0, 0.0, 0.0], [0.0, 0.0, 2.0]])
    t1 = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, -2.0, 0.0]])
    return write_gltf(path, TRIANGLE, TRIANGLE_FACES, targets=[t0, t1],
                      target_names=["lift", "spread"], **kw)  # type: ignore[arg-type]


def two_joint_strip(path: Path, *, mesh_translation: Sequence[float] | None = None,
                    **kw: object) -> Path:
    """A 4-vertex strip skinned to a root joint "Root" at the origin and a child "Tip" at
    (0, 1, 0): vertices (0,0,0) and (1,0,0) on Root, (0,2,0) on Tip, (1,1,0) half-half."""
    positions = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 2.0, 0.0], [1.0, 1.0, 0.0]])
    faces = np.array([[0, 1, 3], [0, 3, 2]])
    joints = np.array([[0, 0, 0, 0], [0, 0, 0, 0], [1, 0, 0, 0], [0, 1, 0, 0]], dtype=np.uint8)
    weights = np.array([[1, 0, 0, 0], [1, 0, 0, 0], [1, 0, 0, 0], [0.5, 0.5, 0, 0]], "<f4")
    ibm = np.stack([np.eye(4), np.eye(4)])
    ibm[1, 1, 3] = -1.0  # inverse of the Tip's rest global transform T(0, 1, 0)
    nodes = [
        NodeSpec("Root", children=[1]),
        NodeSpec("Tip", translation=(0.0, 1.0, 0.0)),
        NodeSpec("body", translation=mesh_translation, mesh=0, skin=0),
    ]
    options: dict[str, object] = {"joints": joints, "weights": weights}
    options.update(kw)
    return write_gltf(path, positions, faces, nodes=nodes, skin_joints=[0, 1],
                      inverse_bind=ibm, **options)  # type: ignore[arg-type]

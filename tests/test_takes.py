"""Take readers on real files: NPY, NPZ, OBJ sequences (natural order, vertex-count mismatch),
glTF morph-weight and skinned animation, and the errors a user sees."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from rigcast.readers.takes import TakeError, natural_key, read_take


def _frames(t: int = 5, v: int = 7, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=(t, v, 3)).astype(np.float32)


def test_npy_take_uses_fps(tmp_path: Path) -> None:
    frames = _frames()
    np.save(tmp_path / "take.npy", frames)
    take = read_take(tmp_path / "take.npy", fps=24.0)
    np.testing.assert_array_equal(take.vertices, frames)
    np.testing.assert_allclose(take.times_s, np.arange(5) / 24.0)
    assert take.fps == 24.0 and take.source.endswith("take.npy")


def test_npz_take_with_times(tmp_path: Path) -> None:
    frames = _frames(t=4)
    times = np.array([0.0, 0.01, 0.03, 0.04])
    np.savez(tmp_path / "take.npz", vertices=frames, times=times)
    take = read_take(tmp_path / "take.npz")
    np.testing.assert_array_equal(take.vertices, frames)
    np.testing.assert_array_equal(take.times_s, times)
    assert take.fps == pytest.approx(100.0)  # from the median spacing


def _write_obj(path: Path, verts: np.ndarray) -> None:
    lines = ["# frame", *(f"v {x:.7g} {y:.7g} {z:.7g}" for x, y, z in verts), "f 1 2 3"]
    path.write_text("\n".join(lines) + "\n")


def test_obj_sequence_in_natural_order(tmp_path: Path) -> None:
    frames = _frames(t=12)
    for i, f in enumerate(frames):
        _write_obj(tmp_path / f"face_{i}.obj", f)  # face_10 sorts after face_9 only naturally
    (tmp_path / "notes.txt").write_text("not a frame")
    for source in (tmp_path, str(tmp_path / "face_*.obj")):
        take = read_take(source, fps=60.0)
        np.testing.assert_allclose(take.vertices, frames, rtol=1e-6)
        assert take.frame_count == 12 and take.fps == 60.0


def test_natural_key_orders_numbers_by_value() -> None:
    names = ["f10.obj", "f2.obj", "f1.obj", "F3.obj"]
    assert sorted(names, key=natural_key) == ["f1.obj", "f2.obj", "F3.obj", "f10.obj"]


def test_obj_vertex_count_mismatch_names_the_file(tmp_path: Path) -> None:
    frames = _frames(t=3)
    _write_obj(tmp_path / "s_1.obj", frames[0])
    _write_obj(tmp_path / "s_2.obj", frames[1][:-1])
    _write_obj(tmp_path / "s_3.obj", frames[2][:-2])
    with pytest.raises(TakeError, match=r"s_2\.obj: has 6 vertices, but .*s_1\.obj has 7"):
        read_take(tmp_path)


@pytest.mark.parametrize(
    ("name", "make", "message"),
    [
        ("missing.npy", None, "no such file"),
        ("flat.npy", lambda p: np.save(p, np.zeros((4, 3))), r"\(frames, vertices, 3\)"),
        ("empty.npy", lambda p: np.save(p, np.zeros((0, 5, 3))), "empty"),
        ("nan.npy", lambda p: np.save(p, np.where(np.arange(30).reshape(2, 5, 3) == 17, np.nan,
                                                  0.0)), "frame 1 has NaN"),
        ("novert.npz", lambda p: np.savez(p, points=np.zeros((2, 3, 3))), "no 'vertices'"),
        ("junk.npy", lambda p: p.write_bytes(b"not numpy"), "not a readable NPY"),
        ("take.xyz", lambda p: p.write_text("1 2 3"), "unknown take format"),
        ("bad.obj", lambda p: p.write_text("v 1 2\n"), "needs x y z"),
        ("none.obj", lambda p: p.write_text("f 1 2 3\n"), "no vertices"),
    ],
)
def test_take_errors_name_file_and_problem(tmp_path: Path, name, make, message) -> None:
    path = tmp_path / name
    if make is not None:
        make(path)
    with pytest.raises(TakeError, match=message) as info:
        read_take(path)
    assert name in str(info.value)


def test_bad_times_and_empty_glob(tmp_path: Path) -> None:
    np.savez(tmp_path / "t.npz", vertices=_frames(t=3), times=np.array([0.0, 0.2, 0.1]))
    with pytest.raises(TakeError, match="strictly increasing"):
        read_take(tmp_path / "t.npz")
    with pytest.raises(TakeError, match=r"no \.obj files"):
        read_take(str(tmp_path / "nothing_*.obj"))
    with pytest.raises(TakeError, match="fps"):
        read_take(tmp_path / "t.npz", fps=-1.0)


# --- glTF 2.0 takes -----------------------------------------------------------------------------


class _Pack:
    """Arrays into one buffer, one bufferView and accessor each (glTF 2.0 spec, "Accessors")."""

    def __init__(self) -> None:
        self.blob = bytearray()
        self.views: list = []
        self.accessors: list = []

    def add(self, arr: np.ndarray, kind: str, component: int = 5126) -> int:
        import pygltflib

        data = np.ascontiguousarray(arr).tobytes()
        while len(self.blob) % 4:
            self.blob.append(0)
        self.views.append(pygltflib.BufferView(buffer=0, byteOffset=len(self.blob),
                                               byteLength=len(data)))
        self.blob.extend(data)
        width = {"SCALAR": 1, "VEC3": 3, "VEC4": 4, "MAT4": 16}[kind]
        flat = np.asarray(arr).reshape(-1, width)
        self.accessors.append(pygltflib.Accessor(
            bufferView=len(self.views) - 1, componentType=component, count=flat.shape[0],
            type=kind, min=flat.min(0).tolist() if kind != "MAT4" else None,
            max=flat.max(0).tolist() if kind != "MAT4" else None))
        return len(self.accessors) - 1

    def save(self, gltf, path: Path) -> Path:
        import base64

        import pygltflib

        gltf.accessors, gltf.bufferViews = self.accessors, self.views
        gltf.buffers = [pygltflib.Buffer(
            byteLength=len(self.blob),
            uri="data:application/octet-stream;base64," + base64.b64encode(self.blob).decode())]
        gltf.save(str(path))
        return path


BASE = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [1, 1, 0]], np.float32)
TARGETS = np.array([[[0, 0, 1]] * 4, [[0, 0, 0], [1, 0, 0], [0, 0, 0], [0, 0, 0]],
                    [[0, 0, 0], [0, 0, 0], [0, 2, 0], [0, 0, 0]]], np.float32)


def _morph_gltf(path: Path, interpolation: str) -> Path:
    import pygltflib

    pk = _Pack()
    pos = pk.add(BASE, "VEC3")
    idx = pk.add(np.array([0, 1, 2, 1, 3, 2], np.uint32), "SCALAR", 5125)
    tgts = [{"POSITION": pk.add(t, "VEC3")} for t in TARGETS]
    keys = pk.add(np.array([0.0, 1.0, 2.0], np.float32), "SCALAR")
    weights = np.array([[0, 0, 0], [1, 0.5, 0], [0, 1, 1]], np.float32)
    out = pk.add(weights.reshape(-1), "SCALAR")
    gltf = pygltflib.GLTF2(
        scene=0, scenes=[pygltflib.Scene(nodes=[0])], nodes=[pygltflib.Node(mesh=0)],
        meshes=[pygltflib.Mesh(primitives=[pygltflib.Primitive(
            attributes=pygltflib.Attributes(POSITION=pos), indices=idx, targets=tgts)],
            weights=[0, 0, 0], extras={"targetNames": ["puff", "stretch", "lift"]})],
        animations=[pygltflib.Animation(
            samplers=[pygltflib.AnimationSampler(input=keys, output=out,
                                                 interpolation=interpolation)],
            channels=[pygltflib.AnimationChannel(
                sampler=0, target=pygltflib.AnimationChannelTarget(node=0, path="weights"))])])
    return pk.save(gltf, path)


def test_gltf_morph_weight_animation(tmp_path: Path) -> None:
    take = read_take(_morph_gltf(tmp_path / "morph.gltf", "LINEAR"), fps=4.0)
    assert take.frame_count == 9  # 0 .. 2 s at 4 fps
    np.testing.assert_allclose(take.times_s, np.arange(9) / 4.0)
    # t = 0.5 s: weights halfway between keys 0 and 1 = (0.5, 0.25, 0) (spec: LINEAR is lerp);
    # morphed = base + sum_i w_i target_i (spec 3.7.2.2).
    expected = BASE + 0.5 * TARGETS[0] + 0.25 * TARGETS[1]
    np.testing.assert_allclose(take.vertices[2], expected, atol=1e-6)
    # t = 1.5 s: (0.5, 0.75, 0.5)
    expected = BASE + 0.5 * TARGETS[0] + 0.75 * TARGETS[1] + 0.5 * TARGETS[2]
    np.testing.assert_allclose(take.vertices[6], expected, atol=1e-6)


def test_gltf_step_interpolation_holds_keys(tmp_path: Path) -> None:
    take = read_take(_morph_gltf(tmp_path / "step.gltf", "STEP"), fps=4.0)
    np.testing.assert_allclose(take.vertices[3], BASE, atol=1e-6)  # t=0.75 holds key 0
    np.testing.assert_allclose(take.vertices[4], BASE + TARGETS[0] + 0.5 * TARGETS[1], atol=1e-6)


def _skinned_gltf(path: Path) -> Path:
    import pygltflib

    pk = _Pack()
    verts = np.array([[0.5, 0, 0], [2, 0, 0], [1.5, 0.5, 0]], np.float32)
    pos = pk.add(verts, "VEC3")
    idx = pk.add(np.array([0, 1, 2], np.uint32), "SCALAR", 5125)
    joints = pk.add(np.array([[0, 0, 0, 0], [1, 0, 0, 0], [0, 1, 0, 0]], np.uint16), "VEC4", 5123)
    wts = pk.add(np.array([[1, 0, 0, 0], [1, 0, 0, 0], [0.5, 0.5, 0, 0]], np.float32), "VEC4")
    # inverse bind matrices = inverse of each joint's global rest transform (column-major)
    ibm1 = np.eye(4, dtype=np.float32)
    ibm1[3, 0] = -1.0  # column-major translation (-1, 0, 0)
    ibm = pk.add(np.stack([np.eye(4, dtype=np.float32), ibm1]), "MAT4")
    keys = pk.add(np.array([0.0, 1.0], np.float32), "SCALAR")
    h = np.sqrt(0.5)
    rots = pk.add(np.array([[0, 0, 0, 1], [0, 0, h, h]], np.float32), "VEC4")  # 0 -> 90 deg about z
    gltf = pygltflib.GLTF2(
        scene=0, scenes=[pygltflib.Scene(nodes=[0, 1])],
        nodes=[pygltflib.Node(mesh=0, skin=0, name="body"),
               pygltflib.Node(name="root", children=[2]),
               pygltflib.Node(name="tip", translation=[1.0, 0.0, 0.0])],
        skins=[pygltflib.Skin(joints=[1, 2], inverseBindMatrices=ibm)],
        meshes=[pygltflib.Mesh(primitives=[pygltflib.Primitive(
            attributes=pygltflib.Attributes(POSITION=pos, JOINTS_0=joints, WEIGHTS_0=wts),
            indices=idx)])],
        animations=[pygltflib.Animation(
            samplers=[pygltflib.AnimationSampler(input=keys, output=rots, interpolation="LINEAR")],
            channels=[pygltflib.AnimationChannel(
                sampler=0, target=pygltflib.AnimationChannelTarget(node=2, path="rotation"))])])
    return pk.save(gltf, path)


def test_gltf_skinned_rotation_animation(tmp_path: Path) -> None:
    take = read_take(_skinned_gltf(tmp_path / "arm.gltf"), fps=2.0)
    assert take.frame_count == 3
    # t = 0.5 s: slerp halfway from 0 to 90 degrees about z is 45 degrees (spec, Appendix C).
    # The tip joint sits at (1, 0, 0); a vertex bound to it at (2, 0, 0) rotates about it.
    c = np.sqrt(0.5)
    np.testing.assert_allclose(take.vertices[1, 0], [0.5, 0, 0], atol=1e-6)
    np.testing.assert_allclose(take.vertices[1, 1], [1 + c, c, 0], atol=1e-5)
    # the half/half vertex (1.5, 0.5, 0): 0.5 * itself + 0.5 * rotated about the tip
    rotated = np.array([1 + c * 0.5 - c * 0.5, c * 0.5 + c * 0.5, 0])
    np.testing.assert_allclose(take.vertices[1, 2], 0.5 * np.array([1.5, 0.5, 0]) + 0.5 * rotated,
                               atol=1e-5)
    # t = 1 s: 90 degrees
    np.testing.assert_allclose(take.vertices[2, 1], [1, 1, 0], atol=1e-5)


def test_gltf_without_animation_is_refused(tmp_path: Path) -> None:
    path = _morph_gltf(tmp_path / "m.gltf", "LINEAR")
    import json

    doc = json.loads(path.read_text())
    del doc["animations"]
    path.write_text(json.dumps(doc))
    with pytest.raises(TakeError, match=r"m\.gltf: glTF file has no animation"):
        read_take(path)


def test_slerp_and_cubic_against_spec_formulas() -> None:
    from rigcast.readers.gltf_take import sample_channel, slerp

    q0 = np.array([[0.0, 0, 0, 1]])
    q1 = np.array([[0.0, 0, -np.sqrt(0.5), -np.sqrt(0.5)]])  # same as +90 deg, other hemisphere
    q = slerp(q0, q1, np.array([0.5]))
    np.testing.assert_allclose(np.abs(q), [[0, 0, np.sin(np.pi / 8), np.cos(np.pi / 8)]],
                               atol=1e-12)
    # CUBICSPLINE with zero tangents is the smoothstep 3s^2 - 2s^3 between the values.
    vals = np.array([[0.0], [0.0], [0.0], [0.0], [2.0], [0.0]])  # (a0, v0, b0), (a1, v1, b1)
    got = sample_channel(np.array([0.0, 1.0]), vals, np.array([0.25]), "CUBICSPLINE")
    assert got[0, 0] == pytest.approx(2.0 * (3 * 0.25**2 - 2 * 0.25**3))


def test_npy_and_npz_mixed_up_or_truncated_are_named(tmp_path: Path) -> None:
    verts = np.zeros((3, 4, 3), np.float32)
    as_npy = tmp_path / "take.npy"
    np.savez(tmp_path / "real.npz", vertices=verts)
    (tmp_path / "real.npz").rename(as_npy)
    with pytest.raises(TakeError, match="is an NPZ archive, not an NPY array"):
        read_take(as_npy)
    as_npz = tmp_path / "take.npz"
    np.save(tmp_path / "real.npy", verts)
    (tmp_path / "real.npy").rename(as_npz)
    with pytest.raises(TakeError, match="is an NPY array, not an NPZ archive"):
        read_take(as_npz)
    cut = tmp_path / "cut.npz"
    np.savez(cut, vertices=verts)
    cut.write_bytes(cut.read_bytes()[:40])
    with pytest.raises(TakeError, match="not a readable NPZ archive"):
        read_take(cut)
    novert = tmp_path / "novert.npz"
    np.savez(novert, points=verts)
    with pytest.raises(TakeError, match="NPZ has no 'vertices'") as info:
        read_take(novert)
    assert "not a readable" not in str(info.value)
    texts = tmp_path / "texts.npz"
    np.savez(texts, vertices=verts, times=np.array(["a", "b", "c"]))
    with pytest.raises(TakeError, match="times must be numbers"):
        read_take(texts)

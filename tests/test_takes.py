"""Take readers on real files: NPY, NPZ, OBJ sequences (natural order, vertex-count mismatch),
glTF morph-weight and skinned animation, and the errors a user sees."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from rigcast.takes import TakeError, natural_key, read_take


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

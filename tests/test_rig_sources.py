"""Python-callable, external-process and dataset rigs, and ``load_rig``, on real files and real
subprocesses."""

from __future__ import annotations

import importlib.util
import json
import pickle
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from rigcast.export.rigs.callable_rig import CallableRig
from rigcast.export.rigs.dataset_rig import DatasetRig, write_dataset_npz
from rigcast.export.rigs.demo_rigs import tamsin_lantern_arm
from rigcast.export.rigs.process_rig import ProcessRig
from rigcast.export.rigs.rig import RigError
from rigcast.export.rigs.rig_loader import load_rig

from tests.fixtures_rigs import morph_triangle

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples"
CALLABLE = f"{EXAMPLES / 'rig_callable.py'}:pennant"
CALLABLE_SCHEMA = EXAMPLES / "rig_callable_schema.json"
PROCESS = [sys.executable, str(EXAMPLES / "rig_process.py")]
PROCESS_SCHEMA = EXAMPLES / "rig_process_schema.json"

# A process that speaks the hello and then misbehaves in the way its argument names.
BAD_PROCESS = textwrap.dedent(
    """
    import io, sys, time
    import numpy as np

    def frame(a):
        b = io.BytesIO(); np.lib.format.write_array(b, a); sys.stdout.buffer.write(b.getvalue())
        sys.stdout.buffer.flush()

    mode = sys.argv[1]
    if mode == "no-hello":
        sys.stderr.write("licence server unreachable\\n"); sys.exit(3)
    frame(np.zeros((4, 3), np.float32)); frame(np.zeros((0, 3), np.int32))
    sys.stdin.buffer.read(1)
    if mode == "crash":
        sys.stderr.write("scene file is corrupt\\n"); sys.stderr.flush(); sys.exit(7)
    if mode == "garbage":
        sys.stdout.buffer.write(b"hello from a chatty plugin\\n" * 20); sys.stdout.buffer.flush()
        time.sleep(30)
    if mode == "wrong-shape":
        frame(np.zeros((1, 5, 3), np.float32)); time.sleep(30)
    if mode == "hang":
        time.sleep(30)
    """
)


def _load_example_module() -> object:
    spec = importlib.util.spec_from_file_location("pennant_ref", EXAMPLES / "rig_callable.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


# --- Python callable -------------------------------------------------------------------------


def test_callable_rig_matches_the_function() -> None:
    rig = CallableRig(CALLABLE, CALLABLE_SCHEMA)
    ref = _load_example_module().pennant  # type: ignore[attr-defined]
    assert rig.schema.names == ("flutter", "droop", "gust")
    assert rig.faces.shape == (24, 3)
    np.testing.assert_allclose(rig.neutral, ref(np.zeros((1, 3)))[0], atol=1e-7)
    poses = np.array([[1.0, 0.0, 0.0], [0.5, 1.0, -1.0]])
    np.testing.assert_allclose(rig.evaluate(poses), ref(poses), atol=1e-6)
    back = pickle.loads(pickle.dumps(rig))
    np.testing.assert_array_equal(back.evaluate(poses), rig.evaluate(poses))


def test_callable_rig_errors_name_the_spec(tmp_path: Path) -> None:
    with pytest.raises(RigError, match=r"no_such_module_xyz:f"):
        CallableRig("no_such_module_xyz:f", CALLABLE_SCHEMA)
    with pytest.raises(RigError, match="has no function 'nope'"):
        CallableRig(f"{EXAMPLES / 'rig_callable.py'}:nope", CALLABLE_SCHEMA)
    with pytest.raises(RigError, match=r"missing\.json"):
        CallableRig(CALLABLE, tmp_path / "missing.json")
    bad = tmp_path / "bad_rig.py"
    bad.write_text(textwrap.dedent(
        """
        import numpy as np
        def flat(c):
            return np.zeros((len(c), 4, 3))
        def short(c):
            return np.zeros((1, 4, 3))
        def boom(c):
            raise ValueError("no licence")
        """
    ))
    no_faces = {"controls": json.loads(CALLABLE_SCHEMA.read_text())["controls"]}
    rig = CallableRig(f"{bad}:short", no_faces)  # fine for one pose
    with pytest.raises(RigError, match=r"bad_rig\.py:short.*\(1, 4, 3\)"):
        rig.evaluate(np.zeros((2, 3)))
    with pytest.raises(RigError, match="no licence"):
        CallableRig(f"{bad}:boom", CALLABLE_SCHEMA)
    with pytest.raises(RigError, match="faces index vertex 19"):
        CallableRig(f"{bad}:flat", CALLABLE_SCHEMA)  # the schema's faces need 20 vertices


# --- external process ------------------------------------------------------------------------


def test_process_rig_round_trip_and_pickle() -> None:
    rig = ProcessRig(PROCESS, PROCESS_SCHEMA)
    try:
        assert rig.vertex_count == 24 and rig.faces.shape == (32, 3)
        poses = np.array([[0.0, 0.0], [20.0, 0.1], [-20.0, -0.2]])
        got = rig.evaluate(poses)
        # tilt about x then lift: the rest vertex (0.3, 0, 0) stays at x, moves by the bob
        np.testing.assert_allclose(got[1, 0], [0.3, 0.1, 0.0], atol=1e-6)
        top = rig.neutral[-8]  # a vertex of the top ring, at y = 0.6
        t = np.radians(20.0)
        want = [top[0], np.cos(t) * top[1] - np.sin(t) * top[2] + 0.1,
                np.sin(t) * top[1] + np.cos(t) * top[2]]
        np.testing.assert_allclose(got[1, -8], want, atol=1e-6)
        big = np.random.default_rng(0).uniform([-20, -0.2], [20, 0.2], (3000, 2))
        np.testing.assert_array_equal(rig.evaluate(big)[:3], rig.evaluate(big[:3]))
        copy = pickle.loads(pickle.dumps(rig))
        try:
            np.testing.assert_array_equal(copy.evaluate(poses), got)  # its own process
        finally:
            copy.close()
    finally:
        rig.close()
        rig.close()  # safe twice


def _bad(tmp_path: Path, mode: str) -> list[str]:
    script = tmp_path / "bad_proc.py"
    script.write_text(BAD_PROCESS)
    return [sys.executable, str(script), mode]


def test_process_without_hello_reports_stderr(tmp_path: Path) -> None:
    with pytest.raises(RigError, match=r"exit code 3.*licence server unreachable"):
        ProcessRig(_bad(tmp_path, "no-hello"), PROCESS_SCHEMA)


@pytest.mark.parametrize(
    ("mode", "message"),
    [
        ("crash", r"exit code 7.*scene file is corrupt"),
        ("garbage", r"not an NPY frame"),
        ("wrong-shape", r"\(1, 5, 3\), expected float \(2, 4, 3\)"),
        ("hang", r"timed out"),
    ],
)
def test_process_failures_are_rig_errors(tmp_path: Path, mode: str, message: str) -> None:
    rig = ProcessRig(_bad(tmp_path, mode), PROCESS_SCHEMA, timeout=2.0)
    try:
        with pytest.raises(RigError, match=message):
            rig.evaluate(np.zeros((2, 2)))
    finally:
        rig.close()


def test_process_that_cannot_start(tmp_path: Path) -> None:
    with pytest.raises(RigError, match="cannot start"):
        ProcessRig([str(tmp_path / "no-such-program")], PROCESS_SCHEMA)


# --- dataset ---------------------------------------------------------------------------------


def _arm_dataset(tmp_path: Path, with_rest: bool) -> tuple[Path, np.ndarray, np.ndarray]:
    arm = tamsin_lantern_arm()
    rng = np.random.default_rng(1)
    lo, hi = arm.schema.lower.astype(np.float64), arm.schema.upper.astype(np.float64)
    controls = lo + (hi - lo) * rng.random((6, arm.control_count))
    if with_rest:
        controls[2] = arm.schema.defaults
    vertices = arm.evaluate(controls)
    path = write_dataset_npz(tmp_path / "arm.npz", controls, vertices, arm.schema.to_dict(),
                             faces=arm.faces)
    return path, controls, vertices


def test_dataset_rig_rows_and_neutral(tmp_path: Path) -> None:
    path, controls, vertices = _arm_dataset(tmp_path, with_rest=True)
    rig = DatasetRig(path)
    c, v = rig.samples()
    np.testing.assert_array_equal(c, controls)
    np.testing.assert_array_equal(v, vertices)
    np.testing.assert_array_equal(rig.neutral, vertices[2])  # the row at the defaults
    np.testing.assert_array_equal(rig.evaluate(controls[[4, 0]]), vertices[[4, 0]])
    with pytest.raises(RigError, match="no sample at controls"):
        rig.evaluate(controls[:1] + 1e-3)
    back = pickle.loads(pickle.dumps(rig))
    np.testing.assert_array_equal(back.evaluate(controls[:2]), vertices[:2])


def test_dataset_rig_neutral_falls_back_to_mean(tmp_path: Path) -> None:
    path, _, vertices = _arm_dataset(tmp_path, with_rest=False)
    np.testing.assert_allclose(DatasetRig(path).neutral, vertices.mean(axis=0), atol=1e-6)


def test_dataset_rig_side_schema_and_errors(tmp_path: Path) -> None:
    arm = tamsin_lantern_arm()
    np.savez(tmp_path / "plain.npz", controls=np.zeros((2, 12)), vertices=np.zeros((2, 5, 3)))
    with pytest.raises(RigError, match="schema"):
        DatasetRig(tmp_path / "plain.npz")
    side = tmp_path / "schema.json"
    side.write_text(json.dumps(arm.schema.to_dict()))
    assert DatasetRig(tmp_path / "plain.npz", schema=side).schema == arm.schema
    np.savez(tmp_path / "short.npz", controls=np.zeros((2, 3)), vertices=np.zeros((2, 5, 3)))
    with pytest.raises(RigError, match="12 controls"):
        DatasetRig(tmp_path / "short.npz", schema=side)
    with pytest.raises(RigError, match=r"gone\.npz"):
        DatasetRig(tmp_path / "gone.npz")


# --- load_rig --------------------------------------------------------------------------------


def test_load_rig_every_form(tmp_path: Path) -> None:
    assert load_rig("demo:face-linear").linear
    assert load_rig("demo:arm").control_count == 12
    tri = morph_triangle(tmp_path / "tri.glb")
    assert load_rig(str(tri)).schema.names == ("lift", "spread")
    assert load_rig(f"gltf:{tri}#body").vertex_count == 3
    assert load_rig(f"py:{CALLABLE}", schema=str(CALLABLE_SCHEMA)).control_count == 3
    proc = load_rig(f"proc:{sys.executable} {EXAMPLES / 'rig_process.py'}",
                    schema=str(PROCESS_SCHEMA))
    try:
        assert proc.vertex_count == 24
    finally:
        proc.close()
    path, _, _ = _arm_dataset(tmp_path, with_rest=True)
    assert load_rig(str(path)).control_count == 12
    assert load_rig(f"npz:{path}").vertex_count == tamsin_lantern_arm().vertex_count


def test_load_rig_errors(tmp_path: Path) -> None:
    with pytest.raises(RigError, match=r"accepted forms: demo:face.*proc:COMMAND LINE"):
        load_rig("maya:scene.mb")
    with pytest.raises(RigError, match="'torso'"):
        load_rig("demo:torso")
    with pytest.raises(RigError, match=r"missing\.glb"):
        load_rig(str(tmp_path / "missing.glb"))
    with pytest.raises(RigError, match=r"missing\.npz"):
        load_rig(f"npz:{tmp_path / 'missing.npz'}")
    with pytest.raises(RigError, match="needs a schema"):
        load_rig(f"py:{CALLABLE}")
    with pytest.raises(RigError, match="empty command"):
        load_rig("proc:  ", schema=str(PROCESS_SCHEMA))

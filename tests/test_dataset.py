"""The chunked dataset: writing, resuming, verifying, and the three executors."""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pytest
from rigcast.export.data.dataset import (
    Dataset,
    DatasetError,
    dataset_from_arrays,
    load_dataset,
    sample_dataset,
)
from rigcast.export.data.executor import ExecutorError, SerialExecutor, make_executor
from rigcast.export.data.sampling import SamplingConfig, sample_chunk
from rigcast.export.rigs.rig import Rig, RigError
from rigcast.runtime.schema import Control, ControlSchema

PROBE_ROWS = 4  # Rig.fingerprint() evaluates 4 probe poses; chunk sizes below avoid 4 rows

SCHEMA = ControlSchema((
    Control("cheek_l", 0.0, 1.0, 0.0, group="cheek", pair="cheek_r"),
    Control("cheek_r", 0.0, 1.0, 0.0, group="cheek", pair="cheek_l"),
    Control("nose_tilt", -1.0, 1.0, 0.0),
    Control("chin_out", -0.5, 2.0, 0.0),
))


class CountingRig(Rig):
    """A small linear rig that appends the size of every batch it evaluates to a file.

    The file, not memory, counts calls, because evaluation may run in another process.
    """

    name = "counting"
    linear = True

    def __init__(self, log_path: Path | None = None, basis_seed: int = 0, vertices: int = 6):
        self.schema = SCHEMA
        self.neutral = (np.arange(vertices * 3, dtype=np.float32).reshape(vertices, 3) / 10)
        self.faces = np.array([[0, 1, 2], [3, 4, 5]], dtype=np.int32)
        self.basis = np.random.default_rng(basis_seed).normal(size=(len(SCHEMA), vertices, 3))
        self.log_path = None if log_path is None else str(log_path)

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        if self.log_path is not None:
            with open(self.log_path, "a") as f:
                f.write(f"{controls.shape[0]}\n")
        # out[b, v, k] = neutral[v, k] + sum_c controls[b, c] * basis[c, v, k]
        return self.neutral + np.einsum("bc,cvk->bvk", controls, self.basis)


class ArrayRig(Rig):
    """A rig that is a dataset sampled elsewhere: it carries arrays and cannot evaluate."""

    name = "arrays"

    def __init__(self, controls: np.ndarray, vertices: np.ndarray, neutral: np.ndarray):
        self.schema = SCHEMA
        self.neutral = neutral
        self.faces = np.array([[0, 1, 2]], dtype=np.int32)
        self.controls, self.vertices = controls, vertices

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        raise RigError("an array rig has no evaluator")


class DyingRig(CountingRig):
    """Evaluates in the parent (for the fingerprint) but kills any worker process it runs in."""

    def __init__(self) -> None:
        super().__init__()
        self.parent_pid = os.getpid()

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        if os.getpid() != self.parent_pid:
            os._exit(3)
        return super()._evaluate(controls)


class Stop(Exception):
    """Raised from the progress callback to interrupt a run."""


def chunk_evaluations(log_path: Path) -> list[int]:
    if not log_path.exists():
        return []
    sizes = [int(s) for s in log_path.read_text().split()]
    return [s for s in sizes if s != PROBE_ROWS]


CONFIG = SamplingConfig(count=50, chunk_size=8, seed=7)  # 6 chunks of 8 and one of 2


def assert_same(a: Dataset, b: Dataset) -> None:
    assert np.array_equal(a.controls, b.controls)
    assert np.array_equal(a.vertices, b.vertices)
    assert np.array_equal(a.neutral, b.neutral)
    assert a.fingerprint == b.fingerprint


@pytest.fixture
def reference(tmp_path: Path) -> Dataset:
    with make_executor(workers=0) as ex:
        return sample_dataset(CountingRig(), tmp_path / "reference", CONFIG, executor=ex)


def test_dataset_holds_the_drawn_controls_and_the_rig_meshes(reference: Dataset):
    rig = CountingRig()
    assert reference.controls.shape == (50, 4) and reference.controls.dtype == np.float32
    assert reference.vertices.shape == (50, 6, 3) and reference.vertices.dtype == np.float32
    assert np.array_equal(reference.controls[8:16], sample_chunk(SCHEMA, CONFIG, 1))
    np.testing.assert_allclose(reference.vertices, rig.evaluate(reference.controls), atol=1e-6)
    np.testing.assert_allclose(reference.offsets, reference.vertices - rig.neutral, atol=1e-6)
    assert not reference.vertices.flags.writeable
    files = sorted(p.name for p in reference.path.iterdir()) if reference.path else []
    assert files == [f"chunk_{i:05d}.npz" for i in range(7)] + ["manifest.json", "neutral.npy"]


def test_interrupted_run_resumes_without_redoing_chunks(tmp_path: Path, reference: Dataset):
    log_path, out = tmp_path / "calls.txt", tmp_path / "run"
    rig = CountingRig(log_path)
    seen: list[tuple[int, int]] = []

    def stop_after_three(done: int, total: int) -> None:
        seen.append((done, total))
        if done >= 3 * CONFIG.chunk_size:
            raise Stop

    with make_executor(workers=0) as ex, pytest.raises(Stop):
        sample_dataset(rig, out, CONFIG, executor=ex, progress=stop_after_three)
    assert chunk_evaluations(log_path) == [8, 8, 8]
    assert seen == [(0, 50), (8, 50), (16, 50), (24, 50)]
    assert not list(out.glob("*.tmp-*"))
    with pytest.raises(DatasetError, match="incomplete"):
        load_dataset(out)

    log_path.unlink()
    seen.clear()
    with make_executor(workers=0) as ex:
        resumed = sample_dataset(
            rig, out, CONFIG, executor=ex, progress=lambda d, t: seen.append((d, t))
        )
    assert chunk_evaluations(log_path) == [8, 8, 8, 2]
    assert seen[0] == (24, 50) and seen[-1] == (50, 50)
    assert_same(resumed, reference)
    assert_same(load_dataset(out), reference)

    log_path.unlink()
    with make_executor(workers=0) as ex:
        sample_dataset(rig, out, CONFIG, executor=ex)
    assert chunk_evaluations(log_path) == []


def test_corrupt_or_unlisted_chunks_are_checked(tmp_path: Path, reference: Dataset):
    assert reference.path is not None
    out, log_path = reference.path, tmp_path / "calls.txt"
    chunk = out / "chunk_00002.npz"
    data = bytearray(chunk.read_bytes())
    data[-40] ^= 0xFF
    chunk.write_bytes(bytes(data))
    with pytest.raises(DatasetError, match="SHA-256"):
        load_dataset(out)
    # A chunk renamed into place just before a crash is on disk but not in the manifest:
    # it is accepted after its contents are checked, not evaluated again.
    manifest = json.loads((out / "manifest.json").read_text())
    manifest["chunks"] = [e for e in manifest["chunks"] if e["index"] != 5]
    manifest["complete"] = False
    (out / "manifest.json").write_text(json.dumps(manifest))
    with make_executor(workers=0) as ex:
        repaired = sample_dataset(CountingRig(log_path), out, CONFIG, executor=ex)
    assert chunk_evaluations(log_path) == [8]
    assert_same(repaired, reference)


def test_a_folder_of_another_run_is_refused(tmp_path: Path, reference: Dataset):
    assert reference.path is not None
    with pytest.raises(DatasetError, match=r"seed: 7 -> 8"):
        other_seed = SamplingConfig(count=50, chunk_size=8, seed=8)
        sample_dataset(CountingRig(), reference.path, other_seed, executor=SerialExecutor())
    with pytest.raises(DatasetError, match="fingerprint"):
        sample_dataset(CountingRig(basis_seed=1), reference.path, CONFIG, executor=SerialExecutor())
    other = sample_dataset(CountingRig(basis_seed=1), tmp_path / "other", CONFIG,
                           executor=SerialExecutor())
    assert other.fingerprint != reference.fingerprint


def test_load_dataset_names_a_missing_or_foreign_folder(tmp_path: Path):
    with pytest.raises(DatasetError, match=r"manifest\.json is missing"):
        load_dataset(tmp_path)
    (tmp_path / "manifest.json").write_text('{"format": "something-else"}')
    with pytest.raises(DatasetError, match="not a rigcast-dataset manifest"):
        load_dataset(tmp_path)


def test_process_pool_gives_the_serial_result(tmp_path: Path, reference: Dataset):
    log_path = tmp_path / "calls.txt"
    with make_executor(workers=2) as ex:
        pooled = sample_dataset(CountingRig(log_path), tmp_path / "pool", CONFIG, executor=ex)
    assert sorted(chunk_evaluations(log_path)) == [2] + [8] * 6
    assert_same(pooled, reference)


def test_a_dead_worker_is_a_named_error(tmp_path: Path):
    with make_executor(workers=1) as ex, pytest.raises(ExecutorError, match="worker process died"):
        sample_dataset(DyingRig(), tmp_path / "dead", CONFIG, executor=ex)


@pytest.mark.timeout(60)
@pytest.mark.parametrize("processes", [False, True])
def test_dask_cluster_gives_the_serial_result(tmp_path: Path, reference: Dataset, processes: bool):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(
        n_workers=1, threads_per_worker=1, processes=processes, dashboard_address=None,
        silence_logs=40,
    ) as cluster, make_executor(scheduler=cluster.scheduler_address) as ex:
        assert not isinstance(ex, SerialExecutor)
        clustered = sample_dataset(CountingRig(), tmp_path / "dask", CONFIG, executor=ex)
    assert_same(clustered, reference)


def test_array_rig_is_written_without_evaluation(tmp_path: Path, reference: Dataset):
    rig = ArrayRig(np.array(reference.controls), np.array(reference.vertices),
                   np.array(reference.neutral))
    config = SamplingConfig(chunk_size=16)
    ds = sample_dataset(rig, tmp_path / "given", config, executor=SerialExecutor())
    assert np.array_equal(ds.controls, reference.controls)
    assert np.array_equal(ds.vertices, reference.vertices)
    direct = dataset_from_arrays(rig.controls, rig.vertices, schema=SCHEMA, neutral=rig.neutral)
    assert ds.fingerprint == direct.fingerprint == load_dataset(tmp_path / "given").fingerprint
    assert len(list((tmp_path / "given").glob("chunk_*.npz"))) == 4


def test_dataset_from_arrays_names_bad_input(reference: Dataset):
    c, v, n = np.array(reference.controls), np.array(reference.vertices), reference.neutral
    c[3, 2] = 1.5
    with pytest.raises(DatasetError, match=r"'nose_tilt' is 1.5 in sample 3"):
        dataset_from_arrays(c, v, schema=SCHEMA, neutral=n)
    with pytest.raises(DatasetError, match="vertices must have shape"):
        dataset_from_arrays(reference.controls, v[:, :5], schema=SCHEMA, neutral=n)
    v[0, 0, 0] = np.nan
    with pytest.raises(DatasetError, match="NaN"):
        dataset_from_arrays(reference.controls, v, schema=SCHEMA, neutral=n)


def test_make_executor_rejects_bad_settings():
    with pytest.raises(ExecutorError, match="workers"), make_executor(workers=-1):
        pass
    with pytest.raises(ExecutorError, match="scheduler"), make_executor(scheduler=""):
        pass


def test_a_malformed_manifest_entry_or_nan_controls_are_dataset_errors(reference: Dataset):
    assert reference.path is not None
    out = reference.path
    manifest = json.loads((out / "manifest.json").read_text())
    entry = manifest["chunks"][1]
    # NaN controls in a chunk whose checksum matches: caught by the contents check.
    chunk = out / entry["file"]
    with np.load(chunk) as z:
        controls, vertices = z["controls"].copy(), z["vertices"]
    controls[0, 0] = np.nan
    np.savez(chunk, controls=controls, vertices=vertices)
    entry["sha256"] = hashlib.sha256(chunk.read_bytes()).hexdigest()
    (out / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(DatasetError, match="controls contain NaN or Inf"):
        load_dataset(out)
    # A chunk entry without its index: resuming names the manifest instead of a KeyError.
    del manifest["chunks"][0]["index"]
    manifest["complete"] = False
    (out / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(DatasetError, match="malformed chunk entry"):
        sample_dataset(CountingRig(), out, CONFIG, executor=SerialExecutor())

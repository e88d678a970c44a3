"""Batches of takes: `rigcast solve BUNDLE TAKES... -o FOLDER`, locally or on a dask cluster.

- ``find_takes`` turns folders, globs and list files into take paths (a folder holding ``.obj``
  files is one OBJ-sequence take; any other folder holds takes: ``.npy``, ``.npz``, ``.gltf``,
  ``.glb`` files and OBJ-sequence subfolders; a ``.txt``/``.list`` file names one take per line,
  relative to itself, ``#`` for comments).
- ``solve_takes`` solves them in parallel: ``workers`` local processes (spawned, so onnxruntime
  starts clean in each), in this process (``workers=0``), or on a dask.distributed scheduler.
  Each take is ``rigcast.solving.solve_take.solve_one``, the single-take solve.
- Resumable: a finished take leaves its output (written under a temporary name, then renamed)
  and a record ``FOLDER/.rigcast-solved/<name>.json`` holding its summary row and a key of what
  it was solved from (the bundle's bytes, the take file's size and time, the settings). A take
  whose record and output exist with the same key is skipped; anything else is solved again.
- ``write_summary`` writes ``summary.csv`` and ``summary.md``: per take, frames, fps, mean fit
  error, off-manifold ranges, time and status.
"""

from __future__ import annotations

import csv
import glob
import hashlib
import json
import logging
import math
import multiprocessing
import os
import signal
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import asdict, dataclass, fields, replace
from pathlib import Path
from typing import Any

from rigcast.errors import EXIT_USAGE, UserError
from rigcast.solving.solve_take import SolveSettings, TakeRow, solve_one

log = logging.getLogger(__name__)

TAKE_SUFFIXES = (".npy", ".npz", ".gltf", ".glb")
LIST_SUFFIXES = (".txt", ".list")
RECORDS = ".rigcast-solved"
SUMMARY_COLUMNS = ("take", "frames", "fps", "fit_rms_mean", "off_manifold", "flagged",
                   "seconds", "status", "out", "error")


class TakeBatchError(UserError):
    """A batch cannot start: no takes found, two takes that would write the same output, a bad
    worker count, or no scheduler; the message names the paths or the value."""

    def __init__(self, what: str) -> None:
        super().__init__(what, "check the takes and options; `rigcast solve --help` lists "
                               "the forms", code=EXIT_USAGE)


@dataclass(frozen=True)
class TakeJob:
    """One take of a batch: where it is, where it goes, and the key that says it is done."""

    bundle: Path
    take: Path
    out: Path
    record: Path
    key: str
    settings: SolveSettings


@dataclass(frozen=True)
class BatchResult:
    """Rows in the order of the takes; the summary files written."""

    rows: tuple[TakeRow, ...]
    summary_csv: Path
    summary_md: Path

    @property
    def failed(self) -> int:
        return sum(r.status == "failed" for r in self.rows)


def _has_obj(folder: Path) -> bool:
    return any(f.suffix.lower() == ".obj" for f in folder.iterdir())


def _takes_in(folder: Path) -> list[Path]:
    def is_take(entry: Path) -> bool:
        if entry.is_file():
            return entry.suffix.lower() in TAKE_SUFFIXES
        return entry.is_dir() and not entry.name.startswith(".") and _has_obj(entry)

    return [entry for entry in sorted(folder.iterdir()) if is_take(entry)]


def is_batch(specs: Sequence[str]) -> bool:
    """True when the take arguments name more than one take's worth of input: several
    arguments, a glob, a list file, or a folder that is not itself an OBJ sequence."""
    if len(specs) != 1:
        return True
    spec = specs[0]
    if any(ch in spec for ch in "*?["):
        return True
    p = Path(spec)
    if p.suffix.lower() in LIST_SUFFIXES:
        return True
    return p.is_dir() and not _has_obj(p)


def find_takes(specs: Iterable[str]) -> list[Path]:
    """Folders, globs and list files -> take paths, in the order given, each once."""
    found: list[Path] = []
    for spec in specs:
        if any(ch in spec for ch in "*?["):
            matches = sorted(glob.glob(spec))
            if not matches:
                raise TakeBatchError(f"{spec}: the pattern matches nothing")
            found += [Path(m) for m in matches
                      if Path(m).suffix.lower() in TAKE_SUFFIXES
                      or (Path(m).is_dir() and _has_obj(Path(m)))]
            continue
        p = Path(spec)
        if p.suffix.lower() in LIST_SUFFIXES and p.is_file():
            for line in p.read_text(encoding="utf-8").splitlines():
                line = line.split("#", 1)[0].strip()
                if line:
                    entry = Path(line)
                    found.append(entry if entry.is_absolute() else p.parent / entry)
        elif p.is_dir() and not _has_obj(p):
            found += _takes_in(p)
        else:
            found.append(p)  # one take; read_take names the problem if it is not one
    unique = list(dict.fromkeys(found))
    if not unique:
        raise TakeBatchError(f"no takes found in {', '.join(specs)} (takes are "
                             f"{', '.join(TAKE_SUFFIXES)} files or folders of .obj frames)")
    return unique


def take_name(take: Path) -> str:
    """The output's base name: the file's stem, or the OBJ folder's name."""
    return take.name if take.is_dir() else take.stem


def _file_key(path: Path) -> str:
    if path.is_dir():
        parts = sorted((f.name, f.stat().st_size, f.stat().st_mtime_ns) for f in path.iterdir())
        return repr(parts)
    st = path.stat()
    return f"{st.st_size}:{st.st_mtime_ns}"


def bundle_digest(bundle: Path) -> str:
    """SHA-256 of the bundle's bytes (a rebuilt bundle solves every take again)."""
    h = hashlib.sha256()
    with bundle.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def plan_jobs(bundle: Path, takes: Sequence[Path], out_dir: Path, suffix: str,
              settings: SolveSettings) -> list[TakeJob]:
    """One job per take; TakeBatchError when two takes would write the same output."""
    by_name: dict[str, Path] = {}
    for take in takes:
        name = take_name(take)
        if name in by_name:
            raise TakeBatchError(f"takes {by_name[name]} and {take} would both write "
                                 f"{out_dir / (name + suffix)}; rename one or solve them apart")
        by_name[name] = take
    digest = bundle_digest(bundle)
    jobs = []
    for name, take in by_name.items():
        key_text = json.dumps([digest, str(take.resolve()), _file_key(take) if take.exists()
                               else "missing", repr(settings), suffix])
        jobs.append(TakeJob(bundle, take, out_dir / f"{name}{suffix}",
                            out_dir / RECORDS / f"{name}.json",
                            hashlib.sha256(key_text.encode()).hexdigest(), settings))
    return jobs


def finished_row(job: TakeJob) -> TakeRow | None:
    """The row of an earlier run that solved this job with the same key, or None."""
    if not (job.record.is_file() and job.out.is_file()):
        return None
    try:
        saved = json.loads(job.record.read_text(encoding="utf-8"))
        if saved.get("key") != job.key:
            return None
        row = TakeRow(**{f.name: saved["row"][f.name] for f in fields(TakeRow)})
    except (ValueError, KeyError, TypeError):
        return None  # a damaged record: solve the take again
    return replace(row, status="skipped")


def run_job(job: TakeJob) -> TakeRow:
    """Solve one take and write its record; a take that fails gives a "failed" row, so one
    bad take does not stop a batch of hundreds."""
    from rigcast.errors import explain

    try:
        row = solve_one(job.bundle, job.take, job.out, job.settings).row
    except Exception as exc:  # any failure of one take is that take's, reported in its row
        explained = explain(exc)
        message = explained[0] if explained else f"{type(exc).__name__}: {exc}"
        log.debug("take %s failed", job.take, exc_info=True)
        return TakeRow(str(job.take), str(job.out), 0, math.nan, math.nan, 0, "", 0.0,
                       status="failed", error=message)
    job.record.parent.mkdir(parents=True, exist_ok=True)
    partial = job.record.with_suffix(".partial")
    partial.write_text(json.dumps({"key": job.key, "row": asdict(row)}), encoding="utf-8")
    partial.replace(job.record)
    return row


def solve_takes(bundle: Path, takes: Sequence[Path], out_dir: Path, *, suffix: str = ".csv",
                settings: SolveSettings | None = None, workers: int = 2,
                scheduler: str | None = None,
                progress: Callable[[TakeRow, int, int], None] | None = None) -> BatchResult:
    """Solve every take not solved already into ``out_dir`` and write the summary.

    ``progress(row, done, total)`` is called once per take as it finishes (skipped ones
    first). Ctrl-C stops handing out takes; the ones running finish and are recorded.
    """
    if workers < 0:
        raise TakeBatchError(f"workers must be 0 (in this process) or more, got {workers}")
    settings = settings or SolveSettings()
    if settings.threads is None and (workers > 1 or scheduler is not None):
        settings = replace(settings, threads=1)  # parallel takes, not threads, fill the cores
    out_dir.mkdir(parents=True, exist_ok=True)
    jobs = plan_jobs(bundle, takes, out_dir, suffix, settings)
    rows: list[TakeRow | None] = [finished_row(job) for job in jobs]
    todo = [i for i, row in enumerate(rows) if row is None]
    done = 0
    for row in rows:
        if row is not None:
            done += 1
            if progress is not None:
                progress(row, done, len(jobs))
    log.info("%d takes: %d solved before, %d to solve", len(jobs), done, len(todo))

    def finished(i: int, row: TakeRow) -> None:
        nonlocal done
        rows[i] = row
        done += 1
        if progress is not None:
            progress(row, done, len(jobs))

    try:
        if not todo:
            pass
        elif scheduler is not None:
            _on_dask(scheduler, [jobs[i] for i in todo], todo, finished)
        elif workers == 0:
            for i in todo:
                finished(i, run_job(jobs[i]))
        else:
            context = multiprocessing.get_context("spawn")
            with ProcessPoolExecutor(min(workers, len(todo)), mp_context=context,
                                     initializer=_worker_init, initargs=(os.getpid(),)) as pool:
                try:
                    futures = {pool.submit(run_job, jobs[i]): i for i in todo}
                    for future in as_completed(futures):
                        finished(futures[future], future.result())
                except KeyboardInterrupt:
                    pool.shutdown(wait=True, cancel_futures=True)
                    raise
    finally:
        kept = tuple(r for r in rows if r is not None)
        csv_path, md_path = write_summary(out_dir, kept)
    return BatchResult(kept, csv_path, md_path)


def _worker_init(parent: int) -> None:
    """In each local worker: Ctrl-C is the parent's to handle (a terminal sends SIGINT to the
    whole process group, and a worker's KeyboardInterrupt would print a traceback), and a
    worker whose parent is gone (a forced exit on a second Ctrl-C) exits instead of living on
    as an orphan."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)

    def watch_parent() -> None:
        while os.getppid() == parent:
            time.sleep(0.5)
        os._exit(1)

    threading.Thread(target=watch_parent, name="parent-watch", daemon=True).start()


def _on_dask(scheduler: str, jobs: Sequence[TakeJob], index: Sequence[int],
             finished: Callable[[int, TakeRow], None]) -> None:
    try:
        from distributed import Client
        from distributed import as_completed as dask_completed
    except ImportError:
        raise TakeBatchError("--scheduler needs dask.distributed: pip install "
                             "'rigcast[train]' (or dask[distributed])") from None
    try:
        client = Client(scheduler, timeout=10)
    except OSError as exc:
        raise TakeBatchError(f"cannot reach the dask scheduler at {scheduler} ({exc})") from None
    try:
        futures = client.map(run_job, list(jobs), pure=False)
        where = {f.key: i for f, i in zip(futures, index, strict=True)}
        try:
            for future in dask_completed(futures):
                finished(where[future.key], future.result())
        except KeyboardInterrupt:
            client.cancel(futures)
            raise
    finally:
        client.close()


def _cell(value: Any) -> str:
    if isinstance(value, float):
        return "" if math.isnan(value) else f"{value:.6g}"
    return str(value)


def write_summary(out_dir: Path, rows: Sequence[TakeRow]) -> tuple[Path, Path]:
    """``summary.csv`` and ``summary.md`` in ``out_dir``; returns their paths."""
    csv_path, md_path = out_dir / "summary.csv", out_dir / "summary.md"
    ordered = sorted(rows, key=lambda r: r.take)
    with csv_path.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(SUMMARY_COLUMNS)
        for row in ordered:
            writer.writerow([_cell(getattr(row, c)) for c in SUMMARY_COLUMNS])
    solved = [r for r in ordered if r.status != "failed"]
    frames = sum(r.frames for r in solved)
    lines = [
        "# Batch solve summary",
        "",
        f"{len(solved)} of {len(ordered)} takes solved, {frames} frames; "
        f"{sum(r.status == 'skipped' for r in ordered)} were solved by an earlier run, "
        f"{sum(r.status == 'failed' for r in ordered)} failed.",
        "",
        "| take | frames | fps | mean fit error | off-manifold frames | time (s) | status |",
        "| --- | ---: | ---: | ---: | --- | ---: | --- |",
    ]
    for r in ordered:
        flagged = r.error if r.status == "failed" else (r.flagged or "none")
        lines.append(f"| {Path(r.take).name} | {r.frames} | {_cell(r.fps)} | "
                     f"{_cell(r.fit_rms_mean)} | {flagged.replace('|', '/')} | "
                     f"{r.seconds:.2f} | {r.status} |")
    md_path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return csv_path, md_path

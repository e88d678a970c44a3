"""An external process as a rig: control batches go to its stdin, vertex batches come back on its
stdout, as NPY frames (the numpy ``.npy`` format, one array per message, back to back).

Protocol (docs/rig-sources.md, "External process"):
1. rigcast starts the command. The process writes a hello: two frames, the neutral mesh
   ``(V, 3)`` (any float dtype) and the faces ``(F, 3)`` (any integer dtype; ``(0, 3)`` if none).
2. For each batch rigcast writes controls ``(B, C)`` little-endian float64, and the process
   answers with vertices ``(B, V, 3)`` (any float dtype). One reply per request, in order.
3. rigcast closes stdin when done; the process exits. It is killed if it has not exited 5 s later.
A process that fails writes its reason to stderr and exits non-zero; rigcast reports the tail.
"""

from __future__ import annotations

import collections
import contextlib
import io
import logging
import os
import select
import subprocess
import threading
import time
import weakref
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.rigs.callable_rig import parse_schema, read_schema_file
from rigcast.export.rigs.rig import Rig, RigError

log = logging.getLogger(__name__)

_STDERR_TAIL = 2000  # characters of the process's stderr quoted in errors
_EXIT_GRACE = 5.0


class _Deadline(io.RawIOBase):
    """A readable view of a pipe whose reads fail once ``deadline`` (monotonic) has passed."""

    def __init__(self, fd: int, deadline: float, on_error: Any) -> None:
        self.fd, self.deadline, self.on_error = fd, deadline, on_error

    def readable(self) -> bool:
        return True

    def readinto(self, buf: Any) -> int:
        left = self.deadline - time.monotonic()
        if left <= 0 or not select.select([self.fd], [], [], left)[0]:
            raise self.on_error("timed out waiting for the process's reply")
        data = os.read(self.fd, len(buf))
        if not data:
            raise self.on_error("the process closed its stdout")
        buf[: len(data)] = data
        return len(data)


def _stop(proc: subprocess.Popen[bytes], grace: float = _EXIT_GRACE) -> None:
    """Close stdin, give the process a grace period, then kill it; close every pipe."""
    if proc.stdin is not None and not proc.stdin.closed:
        with contextlib.suppress(OSError):
            proc.stdin.close()
    try:
        proc.wait(timeout=grace)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
    for pipe in (proc.stdout, proc.stderr):
        if pipe is not None and not pipe.closed:
            pipe.close()


class _Session:
    """One running process: the pipes, a stderr drain thread, and framed I/O."""

    def __init__(self, argv: Sequence[str], cwd: str | None, where: str) -> None:
        self.where = where
        try:
            self.proc = subprocess.Popen(list(argv), stdin=subprocess.PIPE,
                                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=cwd)
        except OSError as e:
            raise RigError(f"{where}: cannot start {list(argv)}: {e}") from None
        self.tail: collections.deque[str] = collections.deque(maxlen=64)
        self.drain = threading.Thread(target=self._drain_stderr, daemon=True)
        self.drain.start()
        self._finalizer = weakref.finalize(self, _stop, self.proc)

    def _drain_stderr(self) -> None:
        assert self.proc.stderr is not None
        for line in iter(self.proc.stderr.readline, b""):
            self.tail.append(line.decode(errors="replace"))

    def error(self, problem: str) -> RigError:
        code = self.proc.poll()
        if code is None:
            time.sleep(0.05)  # a dying process: let its exit status and stderr arrive
            code = self.proc.poll()
        self.drain.join(timeout=0.5 if code is not None else 0.0)
        status = "still running" if code is None else f"exit code {code}"
        text = "".join(self.tail)[-_STDERR_TAIL:].strip() or "(empty)"
        return RigError(f"{self.where}: {problem} ({status}); stderr tail: {text}")

    def read(self, timeout: float) -> np.ndarray:
        assert self.proc.stdout is not None
        raw = _Deadline(self.proc.stdout.fileno(), time.monotonic() + timeout, self.error)
        try:
            # unbuffered exact reads: nothing past this frame is consumed
            return np.lib.format.read_array(_Exact(raw), allow_pickle=False)
        except RigError:
            raise
        except (ValueError, EOFError, OSError) as e:
            raise self.error(f"the process sent something that is not an NPY frame: {e}") from None

    def write(self, array: np.ndarray, timeout: float) -> None:
        assert self.proc.stdin is not None
        buf = io.BytesIO()
        np.lib.format.write_array(buf, array, allow_pickle=False)
        view = memoryview(buf.getvalue())
        fd = self.proc.stdin.fileno()
        deadline = time.monotonic() + timeout
        try:
            while view:
                left = deadline - time.monotonic()
                if left <= 0 or not select.select([], [fd], [], left)[1]:
                    raise self.error("timed out writing controls to the process")
                n = os.write(fd, view[: 1 << 16])
                view = view[n:]
        except (BrokenPipeError, ConnectionResetError):
            raise self.error("the process closed its stdin") from None

    def close(self, grace: float = _EXIT_GRACE) -> None:
        """Stop the process: ``grace`` seconds to exit after stdin closes, then kill."""
        if self._finalizer.detach() is not None:
            _stop(self.proc, grace)
        self.drain.join(timeout=1.0)


class _Exact:
    """File-like ``read(n)`` that returns exactly n bytes from a raw stream (or fewer at EOF)."""

    def __init__(self, raw: io.RawIOBase) -> None:
        self.raw = raw

    def read(self, n: int = -1) -> bytes:
        out = bytearray()
        while len(out) < n:
            chunk = bytearray(min(n - len(out), 1 << 20))
            got = self.raw.readinto(chunk) or 0
            out += chunk[:got]
        return bytes(out)


def _fail(session: _Session, problem: str) -> RigError:
    err = session.error(problem)
    session.close(grace=0.2)  # it is misbehaving: no long goodbye
    return err


class ProcessRig(Rig):
    """A rig evaluated by an external command (see the module docstring for the protocol).

    The constructor starts the process to read its hello. A pickled copy carries no process and
    starts its own on first use (one per worker); its hello must give the same neutral mesh.
    """

    def __init__(self, argv: Sequence[str], schema: str | Path | Mapping[str, Any], *,
                 timeout: float = 120.0, start_timeout: float = 60.0,
                 cwd: str | None = None) -> None:
        if not argv:
            raise RigError("process rig needs a command")
        self.argv = [str(a) for a in argv]
        self.cwd = cwd
        self.timeout, self.start_timeout = float(timeout), float(start_timeout)
        self.name = f"proc:{Path(self.argv[-1]).name if len(self.argv) > 1 else self.argv[0]}"
        where = f"process rig {self.argv}"
        self.schema, schema_faces = parse_schema(read_schema_file(schema, where), where)
        self._session: _Session | None = None
        neutral, faces = self._start()
        self.neutral = neutral
        self.faces = faces if faces.size or not schema_faces.size else schema_faces

    def __getstate__(self) -> dict[str, Any]:
        state = self.__dict__.copy()
        state["_session"] = None
        return state

    def _start(self) -> tuple[np.ndarray, np.ndarray]:
        session = _Session(self.argv, self.cwd, f"process rig {self.argv}")
        try:
            neutral = session.read(self.start_timeout)
            faces = session.read(self.start_timeout)
        except RigError:
            session.close(grace=0.2)
            raise
        if neutral.ndim != 2 or neutral.shape[1] != 3 or neutral.dtype.kind != "f":
            raise _fail(session, f"hello neutral must be float (V, 3), got {neutral.dtype} "
                                f"{neutral.shape}")
        if faces.ndim != 2 or faces.shape[1] != 3 or faces.dtype.kind not in "iu":
            raise _fail(session, f"hello faces must be integer (F, 3), got {faces.dtype} "
                                f"{faces.shape}")
        if faces.size and (faces.min() < 0 or faces.max() >= len(neutral)):
            raise _fail(session, "hello faces index vertices outside the neutral mesh")
        self._session = session
        log.info("started %s: %d vertices", self.argv, len(neutral))
        return neutral.astype(np.float32), faces.astype(np.int32)

    def _ensure_started(self) -> _Session:
        if self._session is None:
            neutral, _ = self._start()
            if neutral.shape != self.neutral.shape or not np.allclose(neutral, self.neutral,
                                                                      atol=1e-6):
                self.close()
                raise RigError(f"process rig {self.argv}: a restarted process sent a different "
                               "neutral mesh; the rig is not deterministic")
        assert self._session is not None
        return self._session

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        session = self._ensure_started()
        try:
            session.write(np.ascontiguousarray(controls, dtype="<f8"), self.timeout)
            out = session.read(self.timeout)
        except RigError:
            self._session = None  # the stream is out of step; a later call starts afresh
            session.close(grace=0.2)
            raise
        expected = (controls.shape[0], self.vertex_count, 3)
        if out.shape != expected or out.dtype.kind != "f":
            self._session = None
            raise _fail(session, f"reply has {out.dtype} {out.shape}, expected float {expected}")
        return out

    def close(self) -> None:
        if self._session is not None:
            self._session.close()
            self._session = None

"""A minimal external-process rig for rigcast, in plain Python with numpy only.

It speaks the NPY-frame protocol of docs/rig-sources.md ("External process"), the same thing a
DCC batch script would do: write a hello (neutral, faces) to stdout, then answer every control
batch read from stdin with a vertex batch, until stdin closes.

The rig is the bell buoy off Tamsin's lighthouse: an 8-sided drum of 3 rings (24 vertices) with
two controls, ``buoy_tilt`` in degrees [-20, 20] and ``buoy_bob`` in mesh units [-0.2, 0.2]
(schema: examples/rig_process_schema.json). Use it as
``proc:python examples/rig_process.py`` with ``--schema examples/rig_process_schema.json``.
"""

from __future__ import annotations

import io
import sys

import numpy as np

SIDES, RINGS = 8, 3


class _StdinReader:
    """read(n) on stdin returning n bytes (fewer only at end of input), after ``prefix``.

    It is not a real file object, so numpy reads through it instead of around Python's buffer.
    """

    def __init__(self, prefix: bytes) -> None:
        self.prefix = prefix

    def read(self, n: int = -1) -> bytes:
        head, self.prefix = self.prefix[:n], self.prefix[n:]
        return head + sys.stdin.buffer.read(n - len(head)) if n > len(head) else head


def read_frame() -> np.ndarray | None:
    """The next NPY frame from stdin, or None when rigcast has closed stdin."""
    first = sys.stdin.buffer.read(1)
    if not first:
        return None
    return np.lib.format.read_array(_StdinReader(first), allow_pickle=False)


def write_frame(array: np.ndarray) -> None:
    buf = io.BytesIO()
    np.lib.format.write_array(buf, np.ascontiguousarray(array), allow_pickle=False)
    sys.stdout.buffer.write(buf.getvalue())
    sys.stdout.buffer.flush()


def rest_mesh() -> tuple[np.ndarray, np.ndarray]:
    """(24, 3) vertices and (32, 3) faces of the drum's sides."""
    ang = np.linspace(0.0, 2.0 * np.pi, SIDES, endpoint=False)
    heights = np.linspace(0.0, 0.6, RINGS)
    radius = np.array([0.3, 0.35, 0.2])
    rings = zip(heights, radius, strict=True)
    verts = np.array([[r * np.cos(a), h, r * np.sin(a)] for h, r in rings for a in ang])
    faces = []
    for ring in range(RINGS - 1):
        for s in range(SIDES):
            a, b = ring * SIDES + s, ring * SIDES + (s + 1) % SIDES
            faces += [[a, b, b + SIDES], [a, b + SIDES, a + SIDES]]
    return verts, np.array(faces, dtype=np.int32)


def evaluate(rest: np.ndarray, controls: np.ndarray) -> np.ndarray:
    """controls (B, 2) = (tilt degrees, bob) -> (B, 24, 3): tilt about x, then lift along y."""
    tilt = np.radians(controls[:, 0])
    c, s = np.cos(tilt)[:, None], np.sin(tilt)[:, None]
    y, z = rest[None, :, 1], rest[None, :, 2]
    out = np.repeat(rest[None], len(controls), axis=0)
    out[..., 1] = c * y - s * z + controls[:, 1:2]
    out[..., 2] = s * y + c * z
    return out


def main() -> int:
    rest, faces = rest_mesh()
    write_frame(rest.astype(np.float32))  # hello, frame 1: the neutral mesh (V, 3)
    write_frame(faces)                    # hello, frame 2: the faces (F, 3)
    while (controls := read_frame()) is not None:
        if controls.ndim != 2 or controls.shape[1] != 2:
            sys.stderr.write(f"rig_process: expected controls (B, 2), got {controls.shape}\n")
            return 2
        write_frame(evaluate(rest, controls).astype(np.float32))
    return 0


if __name__ == "__main__":
    sys.exit(main())

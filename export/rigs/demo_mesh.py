"""Procedural mesh pieces of the demo rigs: a UV sphere, Gaussian falloff fields of shape terms on
it, and area-weighted vertex normals. Pure numpy functions, shapes in the docstrings."""

from __future__ import annotations

import logging

import numpy as np
from rigcast.export.rigs.demo_face_shapes import Term

log = logging.getLogger(__name__)


def uv_sphere(n_lat: int, n_lon: int) -> tuple[np.ndarray, np.ndarray]:
    """Unit sphere directions (2 + n_lat * n_lon, 3), poles first and last, and faces (F, 3)."""
    theta = np.linspace(0, np.pi, n_lat + 2)[1:-1]
    phi = np.linspace(0, 2 * np.pi, n_lon, endpoint=False)
    th, ph = np.meshgrid(theta, phi, indexing="ij")
    ring = np.stack([np.sin(th) * np.sin(ph), np.cos(th), np.sin(th) * np.cos(ph)], -1)
    dirs = np.concatenate([[[0.0, 1.0, 0.0]], ring.reshape(-1, 3), [[0.0, -1.0, 0.0]]])
    faces = []
    idx = 1 + np.arange(n_lat * n_lon).reshape(n_lat, n_lon)
    nxt = np.roll(idx, -1, axis=1)
    faces.append(np.stack([np.zeros(n_lon, int), nxt[0], idx[0]], -1))
    a, b, c, d = idx[:-1], nxt[:-1], nxt[1:], idx[1:]
    faces.append(np.stack([a, b, c], -1).reshape(-1, 3))
    faces.append(np.stack([a, c, d], -1).reshape(-1, 3))
    last = len(dirs) - 1
    faces.append(np.stack([np.full(n_lon, last), idx[-1], nxt[-1]], -1))
    return dirs, np.concatenate(faces).astype(np.int32)


def center_dir(center: tuple[float, ...]) -> np.ndarray:
    if len(center) == 3:
        c = np.array(center, dtype=np.float64)
    else:
        x, y = center
        c = np.array([x, y, np.sqrt(max(1.0 - x * x - y * y, 0.0))])
    return c / np.linalg.norm(c)


def falloff(dirs: np.ndarray, center: tuple[float, ...], sigma: tuple[float, ...]) -> np.ndarray:
    """dirs: (V, 3) unit directions -> (V,) Gaussian falloff around ``center``."""
    d = (dirs - center_dir(center)) / np.asarray(sigma)
    return np.exp(-0.5 * np.sum(d * d, axis=1))


def shape_field(dirs: np.ndarray, normals: np.ndarray, terms: list[Term]) -> np.ndarray:
    """(V, 3) displacement field: sum of the terms' falloff * (vec + normal * n)."""
    out = np.zeros_like(dirs)
    for t in terms:
        f = falloff(dirs, t.center, t.sigma)[:, None]
        out += f * (np.asarray(t.vec) + t.normal * normals)
    return out


def vertex_normals(verts: np.ndarray, faces: np.ndarray) -> np.ndarray:
    fn = np.cross(verts[faces[:, 1]] - verts[faces[:, 0]], verts[faces[:, 2]] - verts[faces[:, 0]])
    n = np.zeros_like(verts)
    for k in range(3):
        np.add.at(n, faces[:, k], fn)
    return n / np.linalg.norm(n, axis=1, keepdims=True)


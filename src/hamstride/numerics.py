"""Small shared helpers used by several stages: the side names and row-wise vector operations on [..., 3] arrays.

Operations over a last axis of x, y, z are written out by component: numpy reduces or crosses a length-3 last axis
through its general machinery, several times slower on [frame, 3] and [frame, marker, 3] arrays; the arithmetic is
the same (tests compare each with the numpy call it replaces).
"""
from __future__ import annotations

import numpy as np

__all__ = ["SIDES", "all_xyz", "any_xyz", "finite_points", "dot_rows", "norm_rows", "cross_rows", "runs", "runs_1d"]

#: The two sides, in the order every per-side table uses (internal convention: the strings "left" and "right").
SIDES = ("left", "right")


def all_xyz(mask: np.ndarray) -> np.ndarray:
    """``mask.all(axis=-1)`` for a last axis of x, y, z."""
    return mask[..., 0] & mask[..., 1] & mask[..., 2]


def any_xyz(mask: np.ndarray) -> np.ndarray:
    """``mask.any(axis=-1)`` for a last axis of x, y, z (see ``all_xyz``)."""
    return mask[..., 0] | mask[..., 1] | mask[..., 2]


def finite_points(xyz: np.ndarray) -> np.ndarray:
    """Points whose three coordinates are finite: ``np.isfinite(xyz).all(axis=-1)``, faster (see ``all_xyz``)."""
    return all_xyz(np.isfinite(xyz))


def dot_rows(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise dot product of [..., 3] arrays."""
    return a[..., 0] * b[..., 0] + a[..., 1] * b[..., 1] + a[..., 2] * b[..., 2]


def norm_rows(v: np.ndarray) -> np.ndarray:
    """Row-wise Euclidean length of [..., 3] arrays (``np.linalg.norm(v, axis=-1)``)."""
    return np.sqrt(dot_rows(v, v))


def cross_rows(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise cross product of [..., 3] arrays (``np.cross``)."""
    ax, ay, az = a[..., 0], a[..., 1], a[..., 2]
    bx, by, bz = b[..., 0], b[..., 1], b[..., 2]
    return np.stack([ay * bz - az * by, az * bx - ax * bz, ax * by - ay * bx], axis=-1)


def runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Runs of True along axis 0 of a [F, C] mask: (column, start, stop) arrays sorted by column then start."""
    n_frames, n_cols = mask.shape
    padded = np.zeros((n_frames + 2, n_cols), dtype=np.int8)
    padded[1:-1] = mask
    edges = np.diff(padded, axis=0).T  # [C, F+1]
    col_s, start = np.nonzero(edges == 1)
    _, stop = np.nonzero(edges == -1)
    return col_s, start, stop


def runs_1d(mask: np.ndarray) -> np.ndarray:
    """Runs of True in a 1-D mask: [n, 2] array of (start, stop) indices, stop exclusive, in order."""
    padded = np.zeros(np.size(mask) + 2, dtype=np.int8)
    padded[1:-1] = np.asarray(mask, bool)
    return np.flatnonzero(np.diff(padded)).reshape(-1, 2)

"""Co-located patch pairs: the same voxel, in two different controls.

A 2D patch lies in a plane: the voxel axis ``axis`` is held fixed (see
:func:`embed.cohort.plane_axis`) and the patch spans the two other voxel axes, in increasing
order (rows = the lower axis). A 3D patch (``axis=None``) is a cube spanning all three axes. Voxels outside the grid read as zero, which is also what the
dense embedding (:mod:`embed.dense`) sees at the border.

Everything here is numpy; randomness comes only from the ``np.random.Generator`` passed in.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from .errors import ConfigError


@dataclass(frozen=True)
class Pairs:
    """A batch of co-located pairs.

    ``a, b: (N, C, p, p) float32`` (3D: ``(N, C, p, p, p)``); ``centres: (N, 3) int64`` voxel indices;
    ``subject_a, subject_b: (N,) int64`` subject indices into the cohort (always different).
    """

    a: np.ndarray
    b: np.ndarray
    centres: np.ndarray
    subject_a: np.ndarray
    subject_b: np.ndarray


def split_controls(controls: np.ndarray, n_val: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Hold ``n_val`` controls out for validation. Returns ``(train, val)`` sorted index arrays.

    Training needs at least two controls to form a pair, and so does validation.
    """
    controls = np.asarray(controls, dtype=np.int64)
    if n_val < 2 or len(controls) - n_val < 2:
        raise ConfigError(
            f"cohort.val_controls={n_val} with {len(controls)} controls: training and validation each need "
            f"at least 2 controls; set cohort.val_controls between 2 and {len(controls) - 2} or add controls"
        )
    perm = rng.permutation(controls)
    return np.sort(perm[n_val:]), np.sort(perm[:n_val])


def spanned_axes(axis: int | None) -> list[int]:
    """Voxel axes a patch spans: the two other than ``axis`` (2D), or all three (``axis=None``, 3D)."""
    return [i for i in range(3) if i != axis]


def patch_shape(patch_size: int, axis: int | None) -> tuple[int, ...]:
    """``(p, p)`` for a 2D patch, ``(p, p, p)`` for a 3D one (``axis=None``)."""
    return (patch_size,) * len(spanned_axes(axis))


def check_patch_fits(shape: tuple[int, int, int], patch_size: int, axis: int | None) -> None:
    """Raise ConfigError when the patch is larger than the grid along an axis it spans."""
    extent = [shape[i] for i in spanned_axes(axis)]
    if patch_size > min(extent):
        where = "in-plane extent" if axis is not None else "extent"
        raise ConfigError(
            f"patch.size={patch_size} is larger than the grid's {where} {extent} (grid {tuple(shape)}); "
            "choose a smaller patch.size"
        )


def gather_patches(data: np.ndarray, subjects: np.ndarray, centres: np.ndarray, patch_size: int,
                   axis: int | None) -> np.ndarray:
    """Patches of ``data: (S, C, X, Y, Z)`` at ``centres: (N, 3)`` of ``subjects: (N,)``.

    Returns ``(N, C, p, p) float32`` (2D, ``axis`` held fixed) or ``(N, C, p, p, p)`` (3D,
    ``axis=None``); voxels outside the grid are zero. Patches that lie inside the grid are read
    from a sliding-window view of ``data`` (no copy of the volume, one gather); the few that
    cross the border go through :func:`_gather_padded`.
    """
    centres = np.asarray(centres, dtype=np.int64).reshape(-1, 3)
    subjects = np.asarray(subjects, dtype=np.int64).reshape(-1)
    half = patch_size // 2
    span = spanned_axes(axis)
    shape = data.shape[2:]
    inner = np.ones(len(centres), dtype=bool)
    for i in span:
        inner &= (centres[:, i] >= half) & (centres[:, i] < shape[i] - half)
    out = np.empty((len(centres), data.shape[1]) + patch_shape(patch_size, axis), dtype=np.float32)
    if inner.any():
        win = sliding_window_view(data, (patch_size,) * len(span), axis=tuple(i + 2 for i in span))
        c = centres[inner]
        idx = [c[:, i] - (half if i in span else 0) for i in range(3)]
        out[inner] = win[subjects[inner], :, idx[0], idx[1], idx[2]]  # (n, C, p, p[, p])
    if not inner.all():
        out[~inner] = _gather_padded(data, subjects[~inner], centres[~inner], patch_size, axis)
    return out


def _gather_padded(data: np.ndarray, subjects: np.ndarray, centres: np.ndarray, patch_size: int,
                   axis: int | None) -> np.ndarray:
    """:func:`gather_patches` by explicit index arrays, zero outside the grid (any centre)."""
    half = patch_size // 2
    span = spanned_axes(axis)
    full = (len(centres),) + patch_shape(patch_size, axis)
    offsets = np.meshgrid(*[np.arange(patch_size) - half] * len(span), indexing="ij")  # one per spanned axis
    idx = [np.broadcast_to(centres[:, i].reshape((-1,) + (1,) * len(span)), full) for i in range(3)]
    for k, i in enumerate(span):
        idx[i] = idx[i] + offsets[k][None]
    shape = data.shape[2:]
    inside = np.ones(full, dtype=bool)
    for i in span:
        inside &= (idx[i] >= 0) & (idx[i] < shape[i])
        idx[i] = np.clip(idx[i], 0, shape[i] - 1)
    s = np.broadcast_to(subjects.reshape((-1,) + (1,) * len(span)), full)
    out = data[s, :, idx[0], idx[1], idx[2]]  # (N, p, p[, p], C): advanced indices go first
    out = out * inside[..., None]
    return np.ascontiguousarray(np.moveaxis(out, -1, 1), dtype=np.float32)


def sample_pairs(
    data: np.ndarray, pool: np.ndarray, voxels: np.ndarray, n: int, patch_size: int, axis: int | None,
    rng: np.random.Generator,
) -> Pairs:
    """Draw ``n`` co-located pairs.

    Centres are drawn uniformly from ``voxels: (K, 3)`` (the cohort mask's voxels); the two
    subjects of each pair are drawn uniformly from ``pool`` (subject indices, at least 2),
    always two different ones.
    """
    pool = np.asarray(pool, dtype=np.int64)
    assert len(pool) >= 2, "a pair needs two subjects"
    centres = voxels[rng.integers(0, len(voxels), size=n)]
    i = rng.integers(0, len(pool), size=n)
    j = (i + rng.integers(1, len(pool), size=n)) % len(pool)  # j != i
    sa, sb = pool[i], pool[j]
    return Pairs(
        a=gather_patches(data, sa, centres, patch_size, axis),
        b=gather_patches(data, sb, centres, patch_size, axis),
        centres=centres, subject_a=sa, subject_b=sb,
    )


@dataclass(frozen=True)
class RetrievalSet:
    """Patches for the co-location retrieval score.

    ``query: (K, C, p, p)`` (3D: ``(K, C, p, p, p)``) from subject A at K voxels; ``candidates: (K, R, C, p, p)`` from
    subject B at every voxel of the ``(2r + 1)^3`` cube around each of them; ``true_index``: the
    candidate at the query's own voxel; ``centres: (K, 3)``.
    """

    query: np.ndarray
    candidates: np.ndarray
    true_index: int
    centres: np.ndarray


def sample_retrieval(data: np.ndarray, subject_a: int, subject_b: int, voxels: np.ndarray, k: int, patch_size: int,
                     axis: int | None, rng: np.random.Generator, radius: int = 1) -> RetrievalSet:
    """Draw up to ``k`` voxels of ``voxels: (K, 3)`` whose cube of ``radius`` lies in the grid."""
    shape = np.array(data.shape[2:])
    keep = np.all((voxels >= radius) & (voxels < shape - radius), axis=1)
    pool = voxels[keep]
    assert len(pool) > 0, "no voxel with a full neighbourhood"
    centres = pool[rng.choice(len(pool), size=min(k, len(pool)), replace=False)]
    r = np.arange(-radius, radius + 1)
    offsets = np.stack(np.meshgrid(r, r, r, indexing="ij"), axis=-1).reshape(-1, 3)
    cand = (centres[:, None, :] + offsets[None]).reshape(-1, 3)
    n_c = len(offsets)
    query = gather_patches(data, np.full(len(centres), subject_a), centres, patch_size, axis)
    candidates = gather_patches(data, np.full(len(cand), subject_b), cand, patch_size, axis)
    candidates = candidates.reshape(len(centres), n_c, *candidates.shape[1:])
    return RetrievalSet(query, candidates, int(np.flatnonzero((offsets == 0).all(axis=1))[0]), centres)

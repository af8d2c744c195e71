"""Co-located patch pairs: the same voxel, in two different controls.

A 2D patch lies in a plane: the voxel axis ``axis`` is held fixed (see
:func:`embed.cohort.plane_axis`) and the patch spans the two other voxel axes, in increasing
order (rows = the lower axis). Voxels outside the grid read as zero, which is also what the
dense embedding (:mod:`embed.dense`) sees at the border.

Everything here is numpy; randomness comes only from the ``np.random.Generator`` passed in.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import ConfigError


@dataclass(frozen=True)
class Pairs:
    """A batch of co-located pairs.

    ``a, b: (N, C, p, p) float32``; ``centres: (N, 3) int64`` voxel indices;
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


def check_patch_fits(shape: tuple[int, int, int], patch_size: int, axis: int) -> None:
    """Raise ConfigError when the patch is larger than the in-plane extent of the grid."""
    inplane = [shape[i] for i in range(3) if i != axis]
    if patch_size > min(inplane):
        raise ConfigError(
            f"patch.size={patch_size} is larger than the grid's in-plane extent {inplane} (grid {tuple(shape)}); "
            "choose a smaller patch.size"
        )


def gather_patches(data: np.ndarray, subjects: np.ndarray, centres: np.ndarray, patch_size: int, axis: int) -> np.ndarray:
    """Patches of ``data: (S, C, X, Y, Z)`` at ``centres: (N, 3)`` of ``subjects: (N,)``.

    Returns ``(N, C, p, p) float32``; voxels outside the grid are zero.
    """
    half = patch_size // 2
    offsets = np.arange(patch_size) - half
    plane = [i for i in range(3) if i != axis]
    idx = [np.broadcast_to(centres[:, i][:, None, None], (len(centres), patch_size, patch_size)) for i in range(3)]
    full = (len(centres), patch_size, patch_size)
    idx[plane[0]] = np.broadcast_to(centres[:, plane[0]][:, None, None] + offsets[None, :, None], full)
    idx[plane[1]] = np.broadcast_to(centres[:, plane[1]][:, None, None] + offsets[None, None, :], full)
    shape = data.shape[2:]
    inside = np.ones(idx[0].shape, dtype=bool)
    for i in plane:
        inside &= (idx[i] >= 0) & (idx[i] < shape[i])
        idx[i] = np.clip(idx[i], 0, shape[i] - 1)
    s = np.broadcast_to(subjects[:, None, None], idx[0].shape)
    out = data[s, :, idx[0], idx[1], idx[2]]  # (N, p, p, C): advanced indices go first
    out = out * inside[..., None]
    return np.ascontiguousarray(out.transpose(0, 3, 1, 2), dtype=np.float32)


def sample_pairs(
    data: np.ndarray, pool: np.ndarray, voxels: np.ndarray, n: int, patch_size: int, axis: int,
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

"""Per-voxel features the bench compares: learned embeddings and encoder-free baselines.

Each feature set maps a normalised volume ``(C, X, Y, Z)`` to ``(V, D)`` features at the mask's
voxels (C order, as ``np.argwhere(mask)``) and declares its ``reach``: how many voxels away, per
axis, an intensity change can alter a voxel's features. A lesion then only changes features in
its box grown by the reach, and features of a crop grown by the reach once more equal those of the
whole volume there (zero padding outside the grid in both; equal up to float rounding).

Sets:
- ``intensities``: the normalised intensities themselves (D = C, reach 0): no encoder at all.
- ``texture``: hand-made local texture per contrast: intensity, standard deviation in the 3x3x3
  window, gradient magnitude (central differences, ``np.gradient``); D = 3C, reach 1.
- an encoder: its embedding (D = encoder.dim, reach = half the patch in the patch plane, or along
  every axis for 3D patches).
- an encoder + intensities: both concatenated (D = encoder.dim + C), each block scaled by
  :func:`block_scales` so that both weigh the same in a distance (the embedding has many more
  dimensions, on another scale; standardising blocks before concatenating is common practice, no
  source).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy import ndimage

from .dense import Encoder


@dataclass(frozen=True)
class FeatureSet:
    """name; family ('encoder' or 'baseline'); description; dim; reach (rx, ry, rz) voxels;
    compute(volume (C, X, Y, Z) float32, mask (X, Y, Z) bool) -> (V, D) float32."""
    name: str
    family: str
    description: str
    dim: int
    reach: tuple[int, int, int]
    compute: Callable[[np.ndarray, np.ndarray], np.ndarray]
    parts: tuple = ()  # feature sets this one concatenates (their features, side by side), if any


def intensity_features(volume: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """(C, X, Y, Z) -> (V, C) float32: the intensities at the mask's voxels."""
    return np.ascontiguousarray(volume[:, mask].T, dtype=np.float32)


def texture_features(volume: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """(C, X, Y, Z) -> (V, 3C) float32: per contrast intensity, 3x3x3 local sd, gradient magnitude."""
    out = []
    for vol in np.asarray(volume, dtype=np.float64):
        mean = ndimage.uniform_filter(vol, size=3, mode="constant")
        sq = ndimage.uniform_filter(vol * vol, size=3, mode="constant")
        sd = np.sqrt(np.maximum(sq - mean * mean, 0.0))
        grad = np.sqrt(sum(g * g for g in np.gradient(vol)))
        out += [vol[mask], sd[mask], grad[mask]]
    return np.stack(out, axis=1).astype(np.float32)


def encoder_reach(encoder: Encoder) -> tuple[int, int, int]:
    """Half the patch along the two in-plane axes, 0 across the plane (3D patches: every axis)."""
    return tuple(0 if a == encoder.axis else encoder.patch_size // 2 for a in range(3))


def baseline_sets(n_contrasts: int) -> list[FeatureSet]:
    """The encoder-free feature sets scored by the one-class SVM."""
    return [
        FeatureSet("intensities", "baseline", "normalised intensities of every contrast, no encoder",
                   n_contrasts, (0, 0, 0), intensity_features),
        FeatureSet("texture", "baseline", "hand-made texture per contrast: intensity, 3x3x3 sd, gradient magnitude",
                   3 * n_contrasts, (1, 1, 1), texture_features),
    ]


def encoder_sets(name: str, encoder: Encoder, precision: str = "fp32", channels: list[int] | None = None,
                 n_contrasts: int | None = None) -> list[FeatureSet]:
    """An encoder's embedding, and the embedding concatenated with the intensities of all
    ``n_contrasts`` contrasts. ``channels``: the volume's channels the encoder reads, in its order
    (default: all of them), so an encoder of fewer contrasts than the cohort reads its own."""
    chans = list(range(encoder.in_channels)) if channels is None else list(channels)
    n_contrasts = encoder.in_channels if n_contrasts is None else n_contrasts

    def embed(volume, mask):
        v = volume if chans == list(range(volume.shape[0])) else volume[chans]
        return encoder.embed_masked(v, mask, precision=precision, progress=False)

    def concat(volume, mask):
        return np.concatenate([embed(volume, mask), intensity_features(volume, mask)], axis=1)

    reach = encoder_reach(encoder)
    p = encoder.patch_size
    size = (f"{p}x{p}x{p} patches" if encoder.dims == 3
            else f"{p}x{p} {encoder.card.get('patch', {}).get('plane', '')} patches")
    alone = FeatureSet(name, "encoder", f"learned embedding ({encoder.dim} dims, {size})", encoder.dim, reach, embed)
    return [alone, FeatureSet(f"{name}+intensities", "encoder", "learned embedding and the intensities, concatenated",
                              encoder.dim + n_contrasts, reach, concat,
                              parts=(alone, baseline_sets(n_contrasts)[0]))]


def block_scales(fs: FeatureSet, fit: np.ndarray) -> np.ndarray:
    """(D,) float32 column scales for a concatenation ``fs`` (``fs.parts``): each part's columns are
    divided by the square root of that part's total variance (sum over its dimensions of the
    variance over every fit control and voxel), so each block has total variance 1.
    fit: (S, V, D) the fit controls' features of ``fs``."""
    scales, start = [], 0
    for part in fs.parts:
        block = fit[..., start:start + part.dim].reshape(-1, part.dim).astype(np.float64)
        total = float(block.var(axis=0).sum())
        scales += [1.0 / np.sqrt(total) if total > 0 else 1.0] * part.dim
        start += part.dim
    return np.asarray(scales, dtype=np.float32)


def grow(box: tuple, by: tuple[int, int, int], shape: tuple[int, int, int]) -> tuple:
    """Slices ``box`` grown by ``by`` voxels per axis, clipped to the grid ``shape``."""
    return tuple(slice(max(0, b.start - r), min(s, b.stop + r)) for b, r, s in zip(box, by, shape))


def region_features(fs: FeatureSet, volume: np.ndarray, mask: np.ndarray, box: tuple) -> tuple[np.ndarray, np.ndarray]:
    """Features of ``volume`` at the mask voxels whose features a change inside ``box`` can alter.

    Returns (voxels: (n, 3) int64 grid indices in C order, features: (n, D) float32), computed on
    a crop (the box grown twice by the reach) rather than the whole volume."""
    shape = mask.shape
    inner = grow(box, fs.reach, shape)
    outer = grow(inner, fs.reach, shape)
    crop_mask = np.zeros(tuple(s.stop - s.start for s in outer), bool)
    rel = tuple(slice(i.start - o.start, i.stop - o.start) for i, o in zip(inner, outer))
    crop_mask[rel] = mask[inner]
    feats = fs.compute(np.ascontiguousarray(volume[(slice(None), *outer)]), crop_mask)
    voxels = np.argwhere(crop_mask) + np.array([o.start for o in outer])
    return voxels, feats

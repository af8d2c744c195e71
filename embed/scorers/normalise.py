"""Standardised novelty maps from leave-one-out scores of the controls.

A raw novelty score means different things at different voxels: where healthy anatomy varies a
lot, even controls score high. Each control ``s`` is scored by a scorer fitted on the other
``S - 1`` controls (leave-one-out); per voxel, the mean and spread of those ``S`` scores describe
what "healthy" looks like there, and a case's raw score is expressed against them:

    l_s(v)  = score of control s at voxel v, scorer fitted on the controls other than s
    m(v)    = (1/S) * sum_s l_s(v)
    sd(v)   = sqrt( sum_s (l_s(v) - m(v))^2 / (S - 1) )          (sample standard deviation)
    floor   = floor_fraction * median over voxels with sd(v) > 0 of sd(v)
    z(v)    = (score(v) - m(v)) / max(sd(v), floor)

so voxels where the controls' own scores vary a lot count less, and the floor (default a tenth
of the typical spread; a choice of ours, common practice, no source) keeps voxels whose controls
happen to agree closely from turning tiny differences into huge values. With voxel blocks, gather
``m`` and ``sd`` over all blocks first (:func:`loo_moments` per block), then build one
:class:`Standardiser` with :meth:`Standardiser.from_moments` so the floor uses every voxel.
"""

from __future__ import annotations

from dataclasses import dataclass
from numbers import Real

import numpy as np

from ..errors import ConfigError, InputError
from .base import VoxelScorer, check_controls


def loo_scores(scorer: VoxelScorer, controls, progress: bool = False) -> np.ndarray:
    """Leave-one-out scores ``(S, V) float64``: row s = ``scorer.clone().fit(others).score(controls[s])``.

    ``scorer`` gives the parameters (it is cloned, not fitted); ``controls: (S, V, D)``, S >= 3
    (each fit sees S - 1 >= 2 controls).
    """
    x = check_controls(controls, "loo_scores", min_controls=3)
    S, V, _ = x.shape
    out = np.empty((S, V))
    rows = range(S)
    if progress:
        from tqdm.auto import tqdm

        rows = tqdm(rows, desc="leave-one-out", unit="control")
    keep = np.ones(S, bool)
    for s in rows:
        keep[s] = False
        out[s] = scorer.clone().fit(x[keep]).score(x[s])
        keep[s] = True
    return out


def loo_moments(loo) -> tuple[np.ndarray, np.ndarray]:
    """``loo: (S, V)`` leave-one-out scores -> per-voxel mean and sample sd, ``(V,)`` float64 each."""
    a = np.asarray(loo, dtype=np.float64)
    if a.ndim != 2 or a.shape[0] < 2:
        raise InputError(f"loo_moments: expected leave-one-out scores of shape (S, V) with S >= 2, got {a.shape}")
    if not np.isfinite(a).all():
        raise InputError("loo_moments: leave-one-out scores hold NaN or infinite values; check the controls")
    return a.mean(0), a.std(0, ddof=1)


@dataclass(frozen=True)
class Standardiser:
    """Per-voxel standardisation ``z = (score - mean) / max(sd, floor)``; see the module docstring.

    ``mean: (V,) float64``, ``sd: (V,) float64``, ``floor: float`` (> 0).
    """

    mean: np.ndarray
    sd: np.ndarray
    floor: float

    @classmethod
    def from_loo(cls, loo, floor_fraction: float = 0.1) -> "Standardiser":
        """From leave-one-out scores ``loo: (S, V)`` (see :func:`loo_scores`)."""
        mean, sd = loo_moments(loo)
        return cls.from_moments(mean, sd, floor_fraction)

    @classmethod
    def from_moments(cls, mean, sd, floor_fraction: float = 0.1) -> "Standardiser":
        """From per-voxel ``mean`` and ``sd`` (``(V,)`` each, gathered over all voxel blocks)."""
        if isinstance(floor_fraction, bool) or not isinstance(floor_fraction, Real) or not 0 < floor_fraction <= 1:
            raise ConfigError(f"Standardiser: floor_fraction must be in (0, 1], got {floor_fraction!r}; 0.1 is the default")
        mean, sd = np.asarray(mean, dtype=np.float64), np.asarray(sd, dtype=np.float64)
        if mean.ndim != 1 or mean.shape != sd.shape:
            raise InputError(f"Standardiser: mean and sd must be (V,) arrays of one shape, got {mean.shape} and {sd.shape}")
        if (sd < 0).any() or not (np.isfinite(mean).all() and np.isfinite(sd).all()):
            raise InputError("Standardiser: sd must be finite and >= 0 and mean finite; recompute them with loo_moments")
        positive = sd[sd > 0]
        if positive.size == 0:
            raise InputError(f"Standardiser: the controls' leave-one-out scores do not vary at any of {sd.size} voxels; "
                             "check that the controls differ (or the embedding is not constant)")
        return cls(mean=mean, sd=sd, floor=float(floor_fraction * np.median(positive)))

    def apply(self, score) -> np.ndarray:
        """``score: (V,)`` or ``(M, V)`` raw novelty -> standardised, same shape, float64."""
        a = np.asarray(score, dtype=np.float64)
        if a.ndim not in (1, 2) or a.shape[-1] != self.mean.shape[0]:
            raise InputError(f"Standardiser.apply: expected a score of shape (V,) or (M, V) with V={self.mean.shape[0]}, "
                             f"got {a.shape}; standardise with the statistics of the same voxels")
        return (a - self.mean) / np.maximum(self.sd, self.floor)

"""Per-voxel Gaussian with a shrunk covariance; novelty = squared Mahalanobis distance."""

from __future__ import annotations

from numbers import Real

import numpy as np

from ..errors import ConfigError, InputError
from .base import VoxelScorer, check_controls, voxel_blocks

_BLOCK = 2048  # voxels per internal block: bounds the temporaries (a few (block, S, D) float64 arrays)


def ledoit_wolf_shrinkage(xc: np.ndarray) -> np.ndarray:
    """Ledoit-Wolf shrinkage per voxel, ``xc: (B, S, D)`` centred float64 -> ``(B,)`` in [0, 1].

    The same quantities as scikit-learn's ``ledoit_wolf_shrinkage`` (``assume_centered=True`` on
    centred data), computed from row norms and the ``S x S`` Gram matrix instead of ``D x D``
    blocks: ``sum(X2.T @ X2) = sum_k |x_k|^4`` and ``sum((X.T @ X)^2) = sum((X @ X.T)^2)``.
    """
    B, S, D = xc.shape
    r = np.einsum("bsd,bsd->bs", xc, xc)  # |x_k|^2
    mu = r.sum(1) / S / D  # trace(emp_cov) / D
    beta_ = (r * r).sum(1)
    gram = np.matmul(xc, xc.transpose(0, 2, 1))
    delta_ = np.einsum("bst,bst->b", gram, gram) / S**2
    beta = 1.0 / (D * S) * (beta_ / S - delta_)
    delta = (delta_ - 2.0 * mu * (r.sum(1) / S) + D * mu**2) / D
    beta = np.minimum(beta, delta)
    with np.errstate(divide="ignore", invalid="ignore"):
        shrink = np.where(beta == 0, 0.0, beta / np.where(delta == 0, 1.0, delta))
    if D == 1:  # scikit-learn: with one feature the result is the same whatever the shrinkage
        shrink[:] = 0.0
    return shrink


class VoxelGaussian(VoxelScorer):
    """Per-voxel mean and shrunk covariance; ``score`` is the squared Mahalanobis distance.

    Parameters
    ----------
    shrinkage : ``"ledoit-wolf"`` (per-voxel Ledoit-Wolf coefficient, as scikit-learn's
        ``LedoitWolf``) or a number in [0, 1] used at every voxel (scikit-learn's
        ``ShrunkCovariance(shrinkage=...)``).

    Per voxel, with ``x_k`` the S controls, ``m`` their mean, ``C = (1/S) sum_k (x_k - m)(x_k - m)^T``
    (maximum-likelihood covariance), ``mu = trace(C) / D`` and shrinkage ``s``:
    ``Sigma = (1 - s) C + s mu I`` and ``score(y) = (y - m)^T pinv(Sigma) (y - m)``, the *squared*
    distance, equal to scikit-learn's ``LedoitWolf().fit(X).mahalanobis(y)``. The pseudo-inverse
    drops eigenvalues below ``D * eps * max eigenvalue`` (``scipy.linalg.pinvh``'s default). A
    voxel where all controls are exactly equal (e.g. outside the brain) scores 0 for any case: it
    holds no information (scikit-learn would divide by the rounding error of the mean there).

    ``Sigma`` is stored through the SVD of the centred controls (its eigenvectors with non-zero
    empirical variance and the single eigenvalue ``s mu`` of their complement), ``min(S, D) x D``
    numbers per voxel instead of ``D x D``. A robust (minimum covariance determinant) variant is
    not provided: it is random, slow per voxel, and has no cheap exact batched form.

    Fitted attributes: ``location_ (V, D)``, ``components_ (V, K, D)`` (K = min(S, D)),
    ``inv_eig_ (V, K)``, ``inv_rest_ (V,)``, ``shrinkage_ (V,)``, all float64.
    """

    _param_names = ("shrinkage",)
    _state_names = ("location_", "components_", "inv_eig_", "inv_rest_", "shrinkage_")

    def __init__(self, shrinkage="ledoit-wolf"):
        self.shrinkage = shrinkage

    def _check_params(self) -> None:
        s = self.shrinkage
        if isinstance(s, str):
            if s != "ledoit-wolf":
                raise ConfigError(f"VoxelGaussian: unknown shrinkage {s!r}; use 'ledoit-wolf' or a number in [0, 1]")
        elif isinstance(s, bool) or not isinstance(s, Real) or not 0.0 <= float(s) <= 1.0:
            raise ConfigError(f"VoxelGaussian: shrinkage must be 'ledoit-wolf' or a number in [0, 1], got {s!r}")

    def fit(self, controls) -> "VoxelGaussian":
        """Fit on ``controls: (S, V, D)`` float; returns self."""
        self._check_params()
        x = check_controls(controls, "VoxelGaussian.fit")
        S, V, D = x.shape
        K = min(S, D)
        loc, comp = np.empty((V, D)), np.empty((V, K, D))
        inv_eig, inv_rest, shrink = np.empty((V, K)), np.empty(V), np.empty(V)
        eps = np.finfo(np.float64).eps
        for sl in voxel_blocks(V, _BLOCK):
            xb = np.moveaxis(x[:, sl], 1, 0).astype(np.float64)  # (B, S, D), a copy
            const = (xb == xb[:, :1]).all((1, 2))  # all controls identical: no information
            m = xb.mean(1)
            xb -= m[:, None, :]
            s = ledoit_wolf_shrinkage(xb) if self.shrinkage == "ledoit-wolf" else np.full(len(m), float(self.shrinkage))
            _, sv, vt = np.linalg.svd(xb, full_matrices=False)  # sv: (B, K), vt: (B, K, D)
            lam = sv**2 / S  # eigenvalues of C along vt
            mu = (xb * xb).sum((1, 2)) / S / D
            ev = (1.0 - s)[:, None] * lam + (s * mu)[:, None]
            rest = s * mu  # eigenvalue on the complement of vt (exists when K < D)
            top = np.maximum(ev.max(1), rest if K < D else 0.0)
            cut = D * eps * top
            with np.errstate(divide="ignore"):
                inv_eig[sl] = np.where(ev > cut[:, None], 1.0 / ev, 0.0)
                inv_rest[sl] = np.where((rest > cut) & (K < D) & ~const, 1.0 / rest, 0.0)
            inv_eig[sl][const] = 0.0
            loc[sl], comp[sl], shrink[sl] = m, vt, s
        self.location_, self.components_, self.inv_eig_, self.inv_rest_, self.shrinkage_ = (
            loc, comp, inv_eig, inv_rest, shrink)
        self._set_sizes()
        return self

    def _set_sizes(self) -> None:
        V, D = self.location_.shape
        if self.components_.shape[::2] != (V, D) or self.inv_eig_.shape != self.components_.shape[:2]:
            raise InputError(f"VoxelGaussian: inconsistent fitted state: location_ {self.location_.shape}, "
                             f"components_ {self.components_.shape}; save and load it unchanged")
        self.n_voxels_, self.n_features_ = V, D

    def _score_many(self, cases: np.ndarray) -> np.ndarray:
        M, V, _ = cases.shape
        out = np.empty((M, V))
        for sl in voxel_blocks(V, _BLOCK):
            y = cases[:, sl].astype(np.float64) - self.location_[sl]  # (M, B, D)
            proj = np.einsum("bkd,mbd->mbk", self.components_[sl], y)
            inside = (proj * proj).sum(2)
            resid = np.maximum((y * y).sum(2) - inside, 0.0)
            out[:, sl] = (proj * proj * self.inv_eig_[sl]).sum(2) + resid * self.inv_rest_[sl]
        return out

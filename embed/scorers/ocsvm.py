"""One RBF one-class SVM per voxel, all voxels solved in one compiled call."""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from numbers import Real

import numpy as np

from ..errors import ConfigError, InputError
from .base import VoxelScorer, check_controls

_GAMMA_POLICIES = ("scale", "median")


def _run_chunks(fn, n_voxels: int, n_jobs: int | None) -> None:
    """Call ``fn(lo, hi)`` on contiguous voxel chunks, on ``n_jobs`` threads (None: all cores).

    The compiled kernels release the GIL, so the threads run in parallel.
    """
    n = (os.cpu_count() or 1) if n_jobs is None else int(n_jobs)
    n = max(1, min(n, n_voxels // 64))  # a thread per 64 voxels at least: small calls stay in this thread
    # chunks of 32 to 512 voxels, about 4 per thread: small enough that a thread slowed by other
    # work on the machine leaves little for the others to wait on, large enough that the cost of
    # a call (~20 us) stays below 1%
    size = min(512, max(32, n_voxels // (4 * n)))
    n_chunks = max(1, -(-n_voxels // size))
    bounds = [(c * n_voxels // n_chunks, (c + 1) * n_voxels // n_chunks) for c in range(n_chunks)]
    if n == 1 or n_chunks == 1:
        for lo, hi in bounds:
            fn(lo, hi)
        return
    with ThreadPoolExecutor(max_workers=n) as pool:
        for f in [pool.submit(fn, lo, hi) for lo, hi in bounds]:
            f.result()


def median_gamma(xv: np.ndarray, block: int = 1024) -> np.ndarray:
    """``1 / median_{s<t} |x_s - x_t|^2`` per voxel for ``xv: (V, S, D)`` -> ``(V,) float64``
    (1.0 where that median is 0 or the voxel holds non-finite values, which fit then reports).

    Distances from the Gram matrix of each voxel's centred controls (centring removes the
    cancellation the expanded form suffers when embeddings share a large offset).
    """
    V, S, _ = xv.shape
    iu = np.triu_indices(S, 1)
    out = np.empty(V)
    for a in range(0, V, block):
        x = xv[a:a + block].astype(np.float64)
        x -= x.mean(1, keepdims=True)
        gram = np.matmul(x, x.transpose(0, 2, 1))
        sq = np.einsum("vss->vs", gram)
        d2 = np.maximum(sq[:, :, None] + sq[:, None, :] - 2 * gram, 0.0)[:, iu[0], iu[1]]
        with np.errstate(invalid="ignore"):
            med = np.median(d2, axis=1)
        out[a:a + block] = np.where(np.isfinite(med) & (med > 0), 1.0 / np.where(med > 0, med, 1.0), 1.0)
    return out


class VoxelOCSVM(VoxelScorer):
    """One-class SVM with an RBF kernel, one per voxel, fitted on the controls' embeddings.

    Parameters
    ----------
    nu : float in (0, 1], upper bound on the fraction of controls outside the boundary.
    gamma : RBF width ``K(x, y) = exp(-gamma * |x - y|^2)``, per voxel:

        - ``"scale"`` (scikit-learn's default): ``1 / (D * X.var())`` where ``X`` is that voxel's
          ``(S, D)`` control matrix and ``var`` is over all ``S * D`` entries; 1.0 if that variance
          is 0 (as scikit-learn's ``BaseLibSVM.fit``).
        - ``"median"``: ``1 / median_{i<j} |x_i - x_j|^2`` over the voxel's control pairs (the
          median-distance heuristic, common practice, no source; here without the factor 2 some
          write); 1.0 if that median is 0.
        - a positive float, the same for every voxel.
    tol : stopping tolerance on the maximal KKT violation (scikit-learn's ``tol``, libsvm ``eps``).
    shrinking : use libsvm's shrinking heuristic (scikit-learn's default ``True``).
    n_jobs : threads for the compiled loops over voxels; None = all cores (``os.cpu_count()``).

    ``score`` returns ``-decision_function``: per voxel,
    ``rho_[v] - sum_i alpha_[v, i] * exp(-gamma_[v] * |x - controls_[i, v]|^2)``, i.e. minus what
    ``sklearn.svm.OneClassSVM(kernel="rbf", nu, gamma).fit(controls[:, v]).decision_function``
    returns (positive = outside the controls' support). The solver reproduces libsvm's one-class
    SMO (:mod:`embed.scorers.smo`, :mod:`embed.scorers.rbf`), so the values agree with scikit-learn
    to rounding (~1e-14 measured).

    Fitted attributes: ``controls_ (S, V, D)`` (the support vectors: the controls array itself,
    kept by reference, not copied, so do not modify it after ``fit``; the compiled loops read
    each voxel's controls, fastest when the array is voxel-major underneath, e.g. a ``(V, S, D)``
    block passed as ``block.transpose(1, 0, 2)``),
    ``alpha_ (V, S) float64`` (libsvm's dual coefficients; scikit-learn's ``dual_coef_`` are the
    non-zero ones), ``rho_ (V,) float64`` (``= -intercept_``), ``gamma_ (V,) float64``,
    ``n_iter_ (V,) int64``.
    """

    _param_names = ("nu", "gamma", "tol", "shrinking", "n_jobs")
    _state_names = ("controls_", "alpha_", "rho_", "gamma_", "n_iter_")

    def __init__(self, nu: float = 0.5, gamma="scale", tol: float = 1e-3, shrinking: bool = True,
                 n_jobs: int | None = None):
        self.nu = nu
        self.gamma = gamma
        self.tol = tol
        self.shrinking = shrinking
        self.n_jobs = n_jobs

    def _check_params(self) -> None:
        if isinstance(self.nu, bool) or not isinstance(self.nu, Real) or not 0 < float(self.nu) <= 1:
            raise ConfigError(f"VoxelOCSVM: nu must be a number in (0, 1], got {self.nu!r}; 0.5 is a usual choice")
        if isinstance(self.tol, bool) or not isinstance(self.tol, Real) or not float(self.tol) > 0:
            raise ConfigError(f"VoxelOCSVM: tol must be a positive number, got {self.tol!r}; scikit-learn uses 1e-3")
        if self.n_jobs is not None and (isinstance(self.n_jobs, bool) or not isinstance(self.n_jobs, int)
                                        or self.n_jobs < 1):
            raise ConfigError(f"VoxelOCSVM: n_jobs must be None or an integer >= 1, got {self.n_jobs!r}")
        g = self.gamma
        if isinstance(g, str):
            if g not in _GAMMA_POLICIES:
                raise ConfigError(f"VoxelOCSVM: unknown gamma policy {g!r}; use 'scale', 'median' or a positive number")
        elif isinstance(g, bool) or not isinstance(g, Real) or not (np.isfinite(g) and g > 0):
            raise ConfigError(f"VoxelOCSVM: gamma must be 'scale', 'median' or a positive number, got {g!r}")

    def fit(self, controls) -> "VoxelOCSVM":
        """Fit one model per voxel on ``controls: (S, V, D)`` float; returns self."""
        from . import smo

        self._check_params()
        x = check_controls(controls, "VoxelOCSVM.fit", check_finite=False)  # checked while fitting
        xv = np.moveaxis(x, 1, 0)  # (V, S, D) view, no copy
        V, S, _ = xv.shape
        alpha, rho, n_iter = np.zeros((V, S)), np.zeros(V), np.zeros(V, np.int64)
        if self.gamma == "median":
            gamma = median_gamma(xv)
        else:
            gamma = np.full(V, 0.0 if self.gamma == "scale" else float(self.gamma))
        scale, nu, tol, shrinking = self.gamma == "scale", float(self.nu), float(self.tol), bool(self.shrinking)
        _run_chunks(lambda lo, hi: smo.fit_voxels(xv, lo, hi, scale, nu, tol, shrinking, alpha, rho, gamma, n_iter),
                    V, self.n_jobs)
        bad = np.flatnonzero(n_iter < 0)
        if bad.size:
            raise InputError(f"VoxelOCSVM.fit: controls hold NaN or infinite values at {bad.size} voxel(s) "
                             f"(first voxel index {bad[0]}); mask or repair them before fitting")
        self.controls_, self.alpha_, self.rho_, self.gamma_, self.n_iter_ = x, alpha, rho, gamma, n_iter
        self._set_sizes()
        return self

    def _set_sizes(self) -> None:
        S, V, D = self.controls_.shape
        if self.alpha_.shape != (V, S) or self.rho_.shape != (V,) or self.gamma_.shape != (V,):
            raise InputError(f"VoxelOCSVM: inconsistent fitted state: controls_ {self.controls_.shape}, "
                             f"alpha_ {self.alpha_.shape}, rho_ {self.rho_.shape}; save and load it unchanged")
        self.n_controls_, self.n_voxels_, self.n_features_ = S, V, D

    def decision_function(self, cases) -> np.ndarray:
        """scikit-learn's sign convention: ``cases: (M, V, D)`` -> ``(M, V) float64``, positive = inside."""
        return -self.score_many(cases)

    def _score_many(self, cases: np.ndarray) -> np.ndarray:
        from . import rbf

        cases = np.ascontiguousarray(cases)  # float32 or float64; no copy when already C-ordered
        dec = np.empty((cases.shape[0], self.n_voxels_))
        xv = np.moveaxis(self.controls_, 1, 0)
        _run_chunks(lambda lo, hi: rbf.decision_voxels(xv, self.alpha_, self.rho_, self.gamma_, cases, lo, hi, dec),
                    self.n_voxels_, self.n_jobs)
        return -dec

"""Per-voxel RBF one-class SVMs: kernels, the loop over voxels, decision values.

For each voxel: the controls' squared distances (libsvm's ``|x|^2 + |y|^2 - 2 x.y``), the width
gamma, the kernel ``exp(-gamma * d2)`` rounded to float32 as libsvm stores it, then the one-class
SMO of :mod:`embed.scorers.smo`. The functions release the GIL so that callers can run disjoint
voxel ranges on several threads.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .smo import solve

_FAST = {"reassoc", "contract", "nsz"}  # reorder sums (SIMD) like a BLAS dot; keeps inf/NaN semantics


@njit(cache=True, fastmath=_FAST)
def _sq_distances(xv, sq, packed):
    """libsvm's RBF argument ``|x_s|^2 + |x_t|^2 - 2 x_s.x_t`` for the pairs s < t of rows of
    ``xv (S, D)``, into ``packed`` (the upper triangle row by row, for one long vectorised exp).

    Four dot products share each load of ``x_s``; indexing only (row views cost reference
    counting in the inner loop).
    """
    S, D = xv.shape
    for s in range(S):
        acc = 0.0
        for d in range(D):
            acc += xv[s, d] * xv[s, d]
        sq[s] = acc
    n = 0
    for s in range(S):
        t = s + 1
        while t + 3 < S:
            a0 = 0.0
            a1 = 0.0
            a2 = 0.0
            a3 = 0.0
            for d in range(D):
                x = xv[s, d]
                a0 += x * xv[t, d]
                a1 += x * xv[t + 1, d]
                a2 += x * xv[t + 2, d]
                a3 += x * xv[t + 3, d]
            packed[n] = sq[s] + sq[t] - 2 * a0
            packed[n + 1] = sq[s] + sq[t + 1] - 2 * a1
            packed[n + 2] = sq[s] + sq[t + 2] - 2 * a2
            packed[n + 3] = sq[s] + sq[t + 3] - 2 * a3
            n += 4
            t += 4
        while t < S:
            acc = 0.0
            for d in range(D):
                acc += xv[s, d] * xv[t, d]
            packed[n] = sq[s] + sq[t] - 2 * acc
            n += 1
            t += 1


@njit(cache=True, fastmath=_FAST)
def _variance(x):
    """Population variance of all entries of ``x: (S, D)`` (numpy's ``x.var()``, sums reordered)."""
    S, D = x.shape
    total = 0.0
    for s in range(S):
        for d in range(D):
            total += x[s, d]
    mean = total / (S * D)
    acc = 0.0
    for s in range(S):
        for d in range(D):
            acc += (x[s, d] - mean) * (x[s, d] - mean)
    return acc / (S * D)


# exp(v) for the kernel: v = k ln2 + r (Cody-Waite, fdlibm's split of ln2), exp(r) by its Taylor
# polynomial of degree 13 (|r| <= ln2 / 2: truncation < 1e-17 relative), times 2^k from a table.
# Written so that the loop over a kernel row vectorises (libm's exp does not); the results agree
# with libm's to about one double ulp, so their float32 roundings (what libsvm stores) match.
_LOG2E = 1.4426950408889634
_LN2_HI = 6.93147180369123816490e-01
_LN2_LO = 1.90821492927058770002e-10
_EXP_C = np.array([1.0 / np.prod(np.arange(1, k + 1, dtype=np.float64)) for k in range(14)])
_POW2 = np.array([2.0 ** k for k in range(-160, 2)])  # 2^k for k in [-160, 1]


@njit(cache=True)
def _exp_neg(buf, n, g):
    """``buf[:n] = exp(-g * buf[:n])`` in float64, to about one ulp of libm's exp; arguments below
    -110 are clamped (exp(-110) < 2e-48: float32 rounds it to 0, and in a decision value it is
    far below rounding)."""
    c = _EXP_C
    for i in range(n):
        x = -g * buf[i]
        x = x if x > -110.0 else -110.0
        x = x if x < 1.0 else 1.0
        k = np.floor(x * _LOG2E + 0.5)
        r = (x - k * _LN2_HI) - k * _LN2_LO
        p = c[13]
        p = p * r + c[12]
        p = p * r + c[11]
        p = p * r + c[10]
        p = p * r + c[9]
        p = p * r + c[8]
        p = p * r + c[7]
        p = p * r + c[6]
        p = p * r + c[5]
        p = p * r + c[4]
        p = p * r + c[3]
        p = p * r + c[2]
        p = p * r + c[1]
        p = p * r + c[0]
        buf[i] = p * _POW2[int(k) + 160]


@njit(cache=True)
def _rbf_kernel(packed, g, Q, QD):
    """``Q = float32(exp(-g * d2))`` (S, S) with unit diagonal, ``QD`` the diagonal in float64
    (libsvm ONE_CLASS_Q: ``exp(-g * 0) = 1``), from ``packed``, the squared distances of the
    pairs s < t row by row (overwritten)."""
    S = Q.shape[0]
    _exp_neg(packed, S * (S - 1) // 2, g)
    n = 0
    for s in range(S):
        QD[s] = 1.0
        Q[s, s] = 1.0
        for t in range(s + 1, S):
            q = np.float32(packed[n])
            Q[s, t] = q
            Q[t, s] = q
            n += 1


@njit(cache=True, nogil=True)
def fit_voxels(X, lo, hi, scale_gamma, nu, eps, shrinking, alpha, rho, gamma, n_iter):
    """Fit one one-class SVM per voxel ``v`` in ``[lo, hi)``, writing into the output arrays.

    ``X: (V, S, D)`` float32/float64 controls, any strides (fastest when each voxel's block is
    contiguous). ``scale_gamma``: compute scikit-learn's ``"scale"`` width per voxel,
    ``1 / (D * var(X[v]))`` (1.0 if the variance is 0), into ``gamma``; else ``gamma (V,)``
    holds the widths on entry. Outputs: ``alpha (V, S) float64, rho (V,) float64, gamma (V,)
    float64, n_iter (V,) int64``;
    a voxel holding NaN or infinite values is skipped with ``n_iter[v] = -1``.
    Releases the GIL: callers run disjoint voxel ranges on several threads.
    """
    V, S, D = X.shape
    xv = np.empty((S, D))
    sq = np.empty(S)
    packed = np.empty(max(S * (S - 1) // 2, 1))
    Q = np.empty((S, S), np.float32)
    QD = np.empty(S)
    work = np.empty((7, S))
    idx = np.empty(S, np.int64)
    for v in range(lo, hi):
        check = 0.0
        for s in range(S):
            for d in range(D):
                x = np.float64(X[v, s, d])
                xv[s, d] = x
                check += x - x  # NaN if any value is NaN or infinite
        if check != 0.0:
            n_iter[v] = -1
            continue
        _sq_distances(xv, sq, packed)
        if scale_gamma:
            var = _variance(xv)
            g = 1.0 / (D * var) if var != 0 else 1.0
        else:
            g = gamma[v]
        gamma[v] = g
        _rbf_kernel(packed, g, Q, QD)
        r, it = solve(S, nu, eps, shrinking, Q, QD, work, idx, alpha[v])
        rho[v] = r
        n_iter[v] = it


@njit(cache=True, fastmath=_FAST)
def _case_distances(cases, v, sv, n, buf):
    """``buf[m * n + k] = |cases[m, v] - sv[k]|^2`` for the M cases and the first n rows of ``sv``
    (differences, as libsvm's dense RBF ``k_function``; indexing only)."""
    M, _, D = cases.shape
    for m in range(M):
        for k in range(n):
            acc = 0.0
            for d in range(D):
                diff = cases[m, v, d] - sv[k, d]
                acc += diff * diff
            buf[m * n + k] = acc


@njit(cache=True, nogil=True)
def decision_voxels(X, alpha, rho, gamma, cases, lo, hi, out):
    """Decision values of ``cases: (M, V, D)`` float32/float64 (C order) at voxels ``[lo, hi)`` under the
    per-voxel models fitted on ``X: (V, S, D)`` (any strides; ``alpha (V, S)``, ``rho (V,)``,
    ``gamma (V,)``), written into ``out: (M, V) float64``. Releases the GIL."""
    V, S, D = X.shape
    M = cases.shape[0]
    sv = np.empty((S, D))
    coef = np.empty(S)
    buf = np.empty(M * S)
    for v in range(lo, hi):
        n = 0
        for s in range(S):
            if alpha[v, s] != 0.0:
                coef[n] = alpha[v, s]
                for d in range(D):
                    sv[n, d] = np.float64(X[v, s, d])
                n += 1
        _case_distances(cases, v, sv, n, buf)
        _exp_neg(buf, M * n, gamma[v])
        for m in range(M):
            acc = 0.0
            for k in range(n):
                acc += coef[k] * buf[m * n + k]
            out[m, v] = acc - rho[v]

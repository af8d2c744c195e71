"""Compiled one-class SVM solver (libsvm's SMO) and the loop fitting one per voxel.

This is a transcription, specialised to the one-class case (every label ``y = +1``, linear term
``p = 0``, upper bound ``C = 1``, RBF kernel so ``Q[i, i] = 1``), of the SMO solver in libsvm 3.x
as shipped with scikit-learn (``sklearn/svm/src/libsvm/svm.cpp``: ``solve_one_class``,
``Solver::Solve``, ``Solver::select_working_set``, ``Solver::do_shrinking``,
``Solver::be_shrunk``, ``Solver::reconstruct_gradient``, ``Solver::calculate_rho``). It follows
libsvm step by step so that the iterates, and therefore the solution, are those of
``sklearn.svm.OneClassSVM``:

- alpha starts at 1 on the first ``floor(nu * l)`` controls, the fractional remainder on the
  next, 0 elsewhere (``nu * l`` accumulated as a running sum, as libsvm does);
- second-order working-set selection (``WSS 2``), ``TAU = 1e-12`` for non-positive curvature;
- stop when the maximal violation ``Gmax + Gmax2 < eps`` (scikit-learn's ``tol``, 1e-3);
- shrinking every ``min(l, 1000)`` iterations, with one gradient reconstruction and unshrink
  once the violation falls below ``10 * eps``;
- kernel rows held as float32 (libsvm's ``Qfloat``);
- rho as the mean gradient over free alphas, else the middle of the bounds.

Speed without changing the iterates: the per-position loops run on the 8-lane float64 vectors
of :mod:`embed.scorers.rbf`, over the problem padded to a multiple of 8 positions. Every
gradient, curvature and objective value is computed with the same operations in the same order
as libsvm, element by element; only the maxima and "last index of the maximum" (libsvm's ``>=``
scans keep the last candidate) are found lane by lane and then across lanes, which is exact.
Bound status is held as two additive penalties, ``pu[t] = -inf`` if alpha is at its upper bound
or position t is shrunk away or padding (else 0) and ``pl[t] = -inf`` if at its lower bound or
shrunk away or padding, so "max over t not at the upper bound of -G[t]" is a plain max of
``pu - G``. The gradient update of one iteration and the choice of the first working-set index
of the next share one pass over the kernel rows.

The decision value of a point ``x`` is then ``sum_i alpha[i] * K(x_i, x) - rho`` (libsvm
``svm_predict_values``; scikit-learn's ``dual_coef_`` are these alphas for the support vectors
and ``intercept_ = -rho``); :func:`embed.scorers.rbf.decision_voxels` computes it.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .rbf import (W, _prefetch, _rbf_kernel, _sq_distances, _zeros, padded, vabs, vadd, vdiv, vfma, vhmax, vhsum,
                  viota, vload, vload2, vmax, vmul, vsel_eq, vsel_ge, vsel_gt, vsplat, vstore, vsub)

TAU = 1e-12


@njit(cache=True)
def _penalties(active, a, pu, pl):
    """Bound penalties of every position; positions from ``active`` on (shrunk, padding) get both."""
    for t in range(pu.shape[0]):
        inside = t < active
        pu[t] = 0.0 if inside and a[t] < 1.0 else -np.inf
        pl[t] = 0.0 if inside and a[t] > 0.0 else -np.inf


@njit(cache=True)
def _is_free(a, t):
    return 0.0 < a[t] < 1.0


@njit(cache=True)
def _reconstruct(l, active, G, Gbar, a, Q):
    """libsvm ``reconstruct_gradient`` (p = 0): rebuild G of the inactive part."""
    if active == l:
        return
    for j in range(active, l):
        G[j] = Gbar[j]
    nr_free = 0
    for j in range(active):
        nr_free += _is_free(a, j)
    if nr_free * l > 2 * active * (l - active):
        for i in range(active, l):
            for j in range(active):
                if _is_free(a, j):
                    G[i] += a[j] * Q[i, j]
    else:
        for i in range(active):
            if _is_free(a, i):
                for j in range(active, l):
                    G[j] += a[i] * Q[i, j]


@njit(cache=True)
def _swap(i, j, G, Gbar, a, idx, Q):
    """libsvm ``swap_index``: exchange positions i and j, kernel rows and columns included."""
    G[i], G[j] = G[j], G[i]
    Gbar[i], Gbar[j] = Gbar[j], Gbar[i]
    a[i], a[j] = a[j], a[i]
    idx[i], idx[j] = idx[j], idx[i]
    for k in range(Q.shape[0]):
        Q[i, k], Q[j, k] = Q[j, k], Q[i, k]
    for k in range(Q.shape[0]):
        Q[k, i], Q[k, j] = Q[k, j], Q[k, i]


@njit(cache=True)
def _be_shrunk(t, Gmax1, Gmax2, G, a):
    if a[t] >= 1.0:
        return -G[t] > Gmax1
    if a[t] <= 0.0:
        return G[t] > Gmax2
    return False


@njit(cache=True)
def _shrink(l, active, unshrink, eps, G, Gbar, a, idx, Q):
    """libsvm ``do_shrinking`` (y = +1); returns the new ``(active, unshrink)``."""
    Gmax1 = -np.inf
    Gmax2 = -np.inf
    for k in range(active):
        if a[k] < 1.0 and -G[k] >= Gmax1:
            Gmax1 = -G[k]
        if a[k] > 0.0 and G[k] >= Gmax2:
            Gmax2 = G[k]
    if (not unshrink) and Gmax1 + Gmax2 <= eps * 10:
        unshrink = True
        _reconstruct(l, active, G, Gbar, a, Q)
        active = l
    k = 0
    while k < active:
        if _be_shrunk(k, Gmax1, Gmax2, G, a):
            active -= 1
            while active > k:
                if not _be_shrunk(active, Gmax1, Gmax2, G, a):
                    _swap(k, active, G, Gbar, a, idx, Q)
                    break
                active -= 1
        k += 1
    return active, unshrink


@njit(cache=True, inline="always")
def _last_of(best, at, m):
    """The largest position among the lanes whose running maximum ``best`` equals ``m``."""
    return int(vhmax(vsel_eq(best, vsplat(m), at, vsplat(-1.0))))


@njit(cache=True)
def _first_index(G, pu, Q, i, j, dai, daj):
    """``(Gmax, i)``: max over positions of ``pu - G`` and its last position (libsvm's i).
    With ``i >= 0``, first applies the gradient update ``G += Q[i] * dai + Q[j] * daj`` (libsvm's
    expression, lane by lane) in the same pass."""
    best = vsplat(-np.inf)
    at = vsplat(-1.0)
    lane = viota()
    si = vsplat(dai)
    sj = vsplat(daj)
    for t in range(0, G.shape[0], W):
        g = vload(G, t)
        if i >= 0:
            g = vadd(g, vadd(vmul(vload2(Q, i, t), si), vmul(vload2(Q, j, t), sj)))
            vstore(G, t, g)
        v = vsub(vload(pu, t), g)
        at = vsel_ge(v, best, vadd(lane, vsplat(float(t))), at)
        best = vmax(best, v)
    m = vhmax(best)
    return m, _last_of(best, at, m)


@njit(cache=True)
def _second_index(G, pl, Q, i, Gmax):
    """``(Gmax2, best, j)`` of libsvm's second-order choice of j given i: ``Gmax2`` the max of
    G over positions not at the lower bound, ``best`` the largest ``grad_diff^2 / quad_coef`` (=
    minus libsvm's obj_diff) among them with ``grad_diff > 0``, and j its last position."""
    gmax = vsplat(Gmax)
    two = vsplat(2.0)
    zero = vsplat(0.0)
    tau = vsplat(TAU)
    g2 = vsplat(-np.inf)
    best = vsplat(-np.inf)
    at = vsplat(-1.0)
    lane = viota()
    for t in range(0, G.shape[0], W):
        g = vload(G, t)
        p = vload(pl, t)
        g2 = vmax(g2, vadd(g, p))
        gd = vadd(gmax, g)
        quad = vsub(two, vmul(two, vload2(Q, i, t)))  # QD[i] + QD[t] - 2 Q[i, t], QD = 1
        quad = vsel_gt(quad, zero, quad, tau)
        obj = vadd(vdiv(vmul(gd, vabs(gd)), quad), p)  # > 0 only where grad_diff > 0 and allowed
        at = vsel_ge(obj, best, vadd(lane, vsplat(float(t))), at)
        best = vmax(best, obj)
    m = vhmax(best)
    return vhmax(g2), m, _last_of(best, at, m)


@njit(cache=True)
def _working_set(G, pu, pl, Q, eps, Gmax, i):
    """libsvm ``select_working_set`` given the first index: ``j``, or -1 when optimal."""
    if Gmax == -np.inf:
        return -1
    Gmax2, best, j = _second_index(G, pl, Q, i, Gmax)
    return j if Gmax + Gmax2 >= eps and best > 0 else -1


@njit(cache=True)
def _add_row(x, Q, k, c):
    """``x += c * Q[k]``."""
    cv = vsplat(c)
    for t in range(0, x.shape[0], W):
        vstore(x, t, vadd(vload(x, t), vmul(cv, vload2(Q, k, t))))


@njit(cache=True)
def solve(l, nu, eps, shrinking, Q, work, idx, alpha_out):
    """One-class SMO on the kernel ``Q`` (lp, lp) float32, ``lp`` a multiple of 8, the first
    ``l`` rows and columns the problem and zeros elsewhere (unit diagonal).

    Writes the solution into ``alpha_out`` (l,) and returns ``(rho, n_iter)``. ``work`` is a
    (5, lp) float64 buffer and ``idx`` an (l,) int64 buffer (``idx[k]`` is the control at position
    ``k``); ``Q`` is permuted in place when shrinking swaps positions.
    """
    a, G, Gbar, pu, pl = work[0], work[1], work[2], work[3], work[4]
    lp = Q.shape[0]
    for t in range(lp):
        a[t] = 0.0
        G[t] = 0.0
        Gbar[t] = 0.0
    nu_l = 0.0
    for k in range(l):
        nu_l += 1.0 * nu
    n = 0
    while nu_l > 0 and n < l:
        a[n] = min(1.0, nu_l)
        nu_l -= a[n]
        n += 1
    for k in range(l):
        idx[k] = k
    # initial gradient in libsvm's order: the rows at the upper bound (a prefix) sum into Gbar,
    # and G equals Gbar after them; the row strictly inside the bounds, if any, adds to G
    k = 0
    while k < l and a[k] >= 1.0:
        _add_row(Gbar, Q, k, 1.0)
        k += 1
    G[:] = Gbar
    while k < l and a[k] > 0.0:
        _add_row(G, Q, k, a[k])
        k += 1
    active = l
    _penalties(active, a, pu, pl)
    unshrink = False
    n_iter = 0
    counter = min(l, 1000) + 1
    Gmax, i = _first_index(G, pu, Q, -1, -1, 0.0, 0.0)
    while True:
        counter -= 1
        if counter == 0:
            counter = min(l, 1000)
            if shrinking:
                active, unshrink = _shrink(l, active, unshrink, eps, G, Gbar, a, idx, Q)
                _penalties(active, a, pu, pl)
                Gmax, i = _first_index(G, pu, Q, -1, -1, 0.0, 0.0)
        j = _working_set(G, pu, pl, Q, eps, Gmax, i)
        if j == -1:
            # reconstruct the whole gradient and try once more
            _reconstruct(l, active, G, Gbar, a, Q)
            active = l
            _penalties(active, a, pu, pl)
            Gmax, i = _first_index(G, pu, Q, -1, -1, 0.0, 0.0)
            j = _working_set(G, pu, pl, Q, eps, Gmax, i)
            if j == -1:
                break
            counter = 1  # shrink at the next iteration
        n_iter += 1
        ai = a[i]
        aj = a[j]
        quad = 2.0 - 2.0 * np.float64(Q[i, j])
        if quad <= 0:
            quad = TAU
        delta = (G[i] - G[j]) / quad
        s = ai + aj
        ai -= delta
        aj += delta
        if s > 1.0:
            if ai > 1.0:
                ai = 1.0
                aj = s - 1.0
        else:
            if aj < 0:
                aj = 0.0
                ai = s
        if s > 1.0:
            if aj > 1.0:
                aj = 1.0
                ai = s - 1.0
        else:
            if ai < 0:
                ai = 0.0
                aj = s
        old_i, old_j = a[i], a[j]
        a[i] = ai
        a[j] = aj
        pu[i] = -np.inf if ai >= 1.0 else 0.0
        pl[i] = -np.inf if ai <= 0.0 else 0.0
        pu[j] = -np.inf if aj >= 1.0 else 0.0
        pl[j] = -np.inf if aj <= 0.0 else 0.0
        # update G and Gbar (C = 1: Gbar -/+= Q[k] when k leaves/reaches the upper bound)
        Gmax, i_next = _first_index(G, pu, Q, i, j, ai - old_i, aj - old_j)
        if (old_i >= 1.0) != (ai >= 1.0):
            _add_row(Gbar, Q, i, -1.0 if old_i >= 1.0 else 1.0)
        if (old_j >= 1.0) != (aj >= 1.0):
            _add_row(Gbar, Q, j, -1.0 if old_j >= 1.0 else 1.0)
        i = i_next
    # libsvm calculate_rho, y = +1, over the active set (the sum in position order)
    ub = np.inf
    lb = -np.inf
    nr_free = 0
    sum_free = 0.0
    for k in range(active):
        g = G[k]
        up = a[k] >= 1.0
        low = a[k] <= 0.0
        lb = max(lb, g) if up else lb
        ub = min(ub, g) if low else ub
        free = not (up or low)
        nr_free += free
        sum_free += g if free else 0.0
    rho = sum_free / nr_free if nr_free > 0 else (ub + lb) / 2
    for k in range(l):
        alpha_out[idx[k]] = a[k]
    return rho, n_iter


@njit(cache=True)
def _load_voxel(X, v, xv, S, D):
    """``xv[:S, :D] = X[v]`` in float64 (the padding stays 0); returns ``(finite, variance)``:
    whether every value is finite, and the population variance of ``X[v]`` (numpy's
    ``x.var()``: mean first, then mean squared deviation; sums in another order)."""
    for s in range(S):
        for d in range(D):
            xv[s, d] = X[v, s, d]
    flat = xv.reshape(-1)
    n = S * xv.shape[1]  # a multiple of 8; four chains of sums (one would wait on its latency)
    t0 = t1 = t2 = t3 = c0 = c1 = c2 = c3 = vsplat(0.0)
    for i in range(0, n - 3 * W, 4 * W):
        x0, x1, x2, x3 = vload(flat, i), vload(flat, i + W), vload(flat, i + 2 * W), vload(flat, i + 3 * W)
        t0, t1, t2, t3 = vadd(t0, x0), vadd(t1, x1), vadd(t2, x2), vadd(t3, x3)
        c0, c1, c2, c3 = vadd(c0, vsub(x0, x0)), vadd(c1, vsub(x1, x1)), vadd(c2, vsub(x2, x2)), vadd(c3, vsub(x3, x3))
    for i in range(n // (4 * W) * 4 * W, n, W):
        x0 = vload(flat, i)
        t0, c0 = vadd(t0, x0), vadd(c0, vsub(x0, x0))  # c: NaN if any value is NaN or infinite
    finite = vhsum(vadd(vadd(c0, c1), vadd(c2, c3))) == 0.0
    mean = vsplat(vhsum(vadd(vadd(t0, t1), vadd(t2, t3))) / (S * D))
    a0 = a1 = a2 = a3 = vsplat(0.0)
    if D % W == 0:
        for i in range(0, n - 3 * W, 4 * W):
            e0, e1 = vsub(vload(flat, i), mean), vsub(vload(flat, i + W), mean)
            e2, e3 = vsub(vload(flat, i + 2 * W), mean), vsub(vload(flat, i + 3 * W), mean)
            a0, a1, a2, a3 = vfma(e0, e0, a0), vfma(e1, e1, a1), vfma(e2, e2, a2), vfma(e3, e3, a3)
        for i in range(n // (4 * W) * 4 * W, n, W):
            e0 = vsub(vload(flat, i), mean)
            a0 = vfma(e0, e0, a0)
    else:
        lane = viota()
        for s in range(S):
            for c in range(0, xv.shape[1], W):
                e0 = vsub(vload2(xv, s, c), mean)
                e0 = vsel_gt(vsplat(float(D - c)), lane, e0, vsplat(0.0))  # padding columns: 0
                a0 = vfma(e0, e0, a0)
    return finite, vhsum(vadd(vadd(a0, a1), vadd(a2, a3))) / (S * D)


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
    lp = padded(S)
    xv = _zeros(padded(S + 9), padded(D), np.float64)
    sq = np.zeros(xv.shape[0] + W)
    d2 = _zeros(S, lp + 2 * W, np.float64)
    Q = _zeros(lp, lp, np.float32)
    work = _zeros(5, lp, np.float64)
    idx = np.empty(S, np.int64)
    for v in range(lo, hi):
        _prefetch(X, v + 1)
        finite, var = _load_voxel(X, v, xv, S, D)
        if not finite:
            n_iter[v] = -1
            continue
        if scale_gamma:
            gamma[v] = 1.0 / (D * var) if var != 0 else 1.0
        _sq_distances(xv, S, sq, d2)
        _rbf_kernel(d2, S, gamma[v], Q)
        rho[v], n_iter[v] = solve(S, nu, eps, shrinking, Q, work, idx, alpha[v])

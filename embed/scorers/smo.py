"""Compiled one-class SVM solver (libsvm's SMO), for the many small problems of one per voxel.

This is a transcription, specialised to the one-class case (every label ``y = +1``, linear term
``p = 0``, upper bound ``C = 1``), of the SMO solver in libsvm 3.x as shipped with scikit-learn
(``sklearn/svm/src/libsvm/svm.cpp``: ``solve_one_class``, ``Solver::Solve``,
``Solver::select_working_set``, ``Solver::do_shrinking``, ``Solver::be_shrunk``,
``Solver::reconstruct_gradient``, ``Solver::calculate_rho``). It follows libsvm step by step so
that the iterates, and therefore the solution, are those of ``sklearn.svm.OneClassSVM``:

- alpha starts at 1 on the first ``floor(nu * l)`` controls, the fractional remainder on the
  next, 0 elsewhere (``nu * l`` accumulated as a running sum, as libsvm does);
- second-order working-set selection (``WSS 2``), ``TAU = 1e-12`` for non-positive curvature;
- stop when the maximal violation ``Gmax + Gmax2 < eps`` (scikit-learn's ``tol``, 1e-3);
- shrinking every ``min(l, 1000)`` iterations, with one gradient reconstruction and unshrink
  once the violation falls below ``10 * eps``;
- kernel rows held as float32 (libsvm's ``Qfloat``), their diagonal as float64;
- rho as the mean gradient over free alphas, else the middle of the bounds.

The decision value of a point ``x`` is then ``sum_i alpha[i] * K(x_i, x) - rho`` (libsvm
``svm_predict_values``; scikit-learn's ``dual_coef_`` are these alphas for the support vectors
and ``intercept_ = -rho``). The loops over voxels are in :mod:`embed.scorers.rbf`.
"""

from __future__ import annotations

import numpy as np
from numba import njit

TAU = 1e-12

# Bound status of each position is held as two additive penalties: ``pu[t] = -inf`` if alpha is
# at its upper bound (else 0) and ``pl[t] = -inf`` if at its lower bound (else 0). libsvm's
# "max over t not at upper bound of -G[t]" is then a plain max of ``pu - G`` with no branch on
# the status (such branches are unpredictable and dominated the cost); ties go to the last
# index, as libsvm's ``>=`` scans do.


@njit(cache=True)
def _set_status(t, a, pu, pl):
    pu[t] = -np.inf if a[t] >= 1.0 else 0.0
    pl[t] = -np.inf if a[t] <= 0.0 else 0.0


@njit(cache=True)
def _max4(x, n):
    """``max(x[:n])`` (-inf if n == 0) with four independent chains (latency, not throughput,
    bounds a single running max). Exact: max does not round."""
    m0 = m1 = m2 = m3 = -np.inf
    n4 = n - n % 4
    for t in range(0, n4, 4):
        m0 = x[t] if x[t] > m0 else m0
        m1 = x[t + 1] if x[t + 1] > m1 else m1
        m2 = x[t + 2] if x[t + 2] > m2 else m2
        m3 = x[t + 3] if x[t + 3] > m3 else m3
    for t in range(n4, n):
        m0 = x[t] if x[t] > m0 else m0
    m0 = m1 if m1 > m0 else m0
    m2 = m3 if m3 > m2 else m2
    return m2 if m2 > m0 else m0


@njit(cache=True)
def _last_index(x, n, value):
    """Largest t < n with ``x[t] == value`` (-1 if none): libsvm's ``>=`` / ``<=`` scans keep
    the last of equal candidates."""
    for t in range(n - 1, -1, -1):
        if x[t] == value:
            return t
    return -1


@njit(cache=True)
def _reconstruct(l, active, G, Gbar, a, pu, pl, Q):
    """libsvm ``reconstruct_gradient`` (p = 0): rebuild G of the inactive part."""
    if active == l:
        return
    for j in range(active, l):
        G[j] = Gbar[j]
    nr_free = 0
    for j in range(active):
        if pu[j] == 0 and pl[j] == 0:
            nr_free += 1
    if nr_free * l > 2 * active * (l - active):
        for i in range(active, l):
            for j in range(active):
                if pu[j] == 0 and pl[j] == 0:
                    G[i] += a[j] * Q[i, j]
    else:
        for i in range(active):
            if pu[i] == 0 and pl[i] == 0:
                ai = a[i]
                for j in range(active, l):
                    G[j] += ai * Q[i, j]


@njit(cache=True)
def _swap(i, j, G, Gbar, a, pu, pl, idx, Q, QD):
    """libsvm ``swap_index``: exchange positions i and j, kernel rows and columns included."""
    G[i], G[j] = G[j], G[i]
    Gbar[i], Gbar[j] = Gbar[j], Gbar[i]
    a[i], a[j] = a[j], a[i]
    pu[i], pu[j] = pu[j], pu[i]
    pl[i], pl[j] = pl[j], pl[i]
    idx[i], idx[j] = idx[j], idx[i]
    QD[i], QD[j] = QD[j], QD[i]
    for k in range(Q.shape[0]):
        Q[i, k], Q[j, k] = Q[j, k], Q[i, k]
    for k in range(Q.shape[0]):
        Q[k, i], Q[k, j] = Q[k, j], Q[k, i]


@njit(cache=True)
def _be_shrunk(t, Gmax1, Gmax2, G, pu, pl):
    if pu[t] != 0:
        return -G[t] > Gmax1
    if pl[t] != 0:
        return G[t] > Gmax2
    return False


@njit(cache=True)
def _shrink(l, active, unshrink, eps, G, Gbar, a, pu, pl, idx, Q, QD):
    """libsvm ``do_shrinking`` (y = +1); returns the new ``(active, unshrink)``."""
    Gmax1 = -np.inf
    Gmax2 = -np.inf
    for k in range(active):
        if pu[k] == 0 and -G[k] >= Gmax1:
            Gmax1 = -G[k]
        if pl[k] == 0 and G[k] >= Gmax2:
            Gmax2 = G[k]
    if (not unshrink) and Gmax1 + Gmax2 <= eps * 10:
        unshrink = True
        _reconstruct(l, active, G, Gbar, a, pu, pl, Q)
        active = l
    k = 0
    while k < active:
        if _be_shrunk(k, Gmax1, Gmax2, G, pu, pl):
            active -= 1
            while active > k:
                if not _be_shrunk(active, Gmax1, Gmax2, G, pu, pl):
                    _swap(k, active, G, Gbar, a, pu, pl, idx, Q, QD)
                    break
                active -= 1
        k += 1
    return active, unshrink


@njit(cache=True)
def solve(l, nu, eps, shrinking, Q, QD, work, idx, alpha_out):
    """One-class SMO on the kernel ``Q`` (l, l) float32 with diagonal ``QD`` (l,) float64.

    Writes the solution into ``alpha_out`` (l,) and returns ``(rho, n_iter)``. ``work`` is a
    (7, l) float64 buffer and ``idx`` an (l,) int64 buffer (``idx[k]`` is the control at position
    ``k``); ``Q`` and ``QD`` are permuted in place when shrinking swaps positions.
    """
    a, G, Gbar, pu, pl, key, obj = work[0], work[1], work[2], work[3], work[4], work[5], work[6]
    nu_l = 0.0
    for k in range(l):
        nu_l += 1.0 * nu
    n = 0
    while nu_l > 0 and n < l:
        a[n] = min(1.0, nu_l)
        nu_l -= a[n]
        n += 1
    for k in range(n, l):
        a[k] = 0.0
    for k in range(l):
        _set_status(k, a, pu, pl)
        idx[k] = k
        G[k] = 0.0
        Gbar[k] = 0.0
    for k in range(l):
        if pl[k] == 0:
            ak = a[k]
            for t in range(l):
                G[t] += ak * Q[k, t]
            if pu[k] != 0:
                for t in range(l):
                    Gbar[t] += Q[k, t]
    active = l
    unshrink = False
    n_iter = 0
    counter = min(l, 1000) + 1
    while True:
        counter -= 1
        if counter == 0:
            counter = min(l, 1000)
            if shrinking:
                active, unshrink = _shrink(l, active, unshrink, eps, G, Gbar, a, pu, pl, idx, Q, QD)
        # working-set selection (libsvm select_working_set, written out here: the hot loop);
        # on failure reconstruct the whole gradient and try once more
        done = False
        for attempt in range(2):
            # i = argmax over t not at the upper bound of -G[t]
            for t in range(active):
                key[t] = pu[t] - G[t]
            Gmax = _max4(key, active)
            i = -1 if Gmax == -np.inf else _last_index(key, active, Gmax)
            # j: second-order rule, as obj = -libsvm's obj_diff (maximised), -inf or <= 0 if not allowed
            Gmax2 = -np.inf
            j = -1
            if i != -1:
                qdi = QD[i]
                for t in range(active):
                    g = G[t]
                    key[t] = g + pl[t]
                    grad_diff = Gmax + g
                    quad = qdi + QD[t] - 2.0 * Q[i, t]
                    quad = quad if quad > 0 else TAU
                    obj[t] = (grad_diff * abs(grad_diff)) / quad + pl[t]
                Gmax2 = _max4(key, active)
                best = _max4(obj, active)
                j = _last_index(obj, active, best) if best > 0 else -1
            if Gmax + Gmax2 < eps or j == -1:
                if attempt == 1:
                    done = True
                    break
                _reconstruct(l, active, G, Gbar, a, pu, pl, Q)
                active = l
                continue
            if attempt == 1:
                counter = 1  # shrink at the next iteration
            break
        if done:
            break
        n_iter += 1
        old_ai = a[i]
        old_aj = a[j]
        quad = QD[i] + QD[j] - 2 * Q[i, j]
        if quad <= 0:
            quad = TAU
        delta = (G[i] - G[j]) / quad
        s = a[i] + a[j]
        a[i] -= delta
        a[j] += delta
        if s > 1.0:
            if a[i] > 1.0:
                a[i] = 1.0
                a[j] = s - 1.0
        else:
            if a[j] < 0:
                a[j] = 0.0
                a[i] = s
        if s > 1.0:
            if a[j] > 1.0:
                a[j] = 1.0
                a[i] = s - 1.0
        else:
            if a[i] < 0:
                a[i] = 0.0
                a[j] = s
        dai = a[i] - old_ai
        daj = a[j] - old_aj
        for k in range(active):
            G[k] += Q[i, k] * dai + Q[j, k] * daj
        ui = pu[i] != 0
        uj = pu[j] != 0
        _set_status(i, a, pu, pl)
        _set_status(j, a, pu, pl)
        if ui != (pu[i] != 0):
            sign = -1.0 if ui else 1.0
            for k in range(l):
                Gbar[k] += sign * Q[i, k]
        if uj != (pu[j] != 0):
            sign = -1.0 if uj else 1.0
            for k in range(l):
                Gbar[k] += sign * Q[j, k]
    # libsvm calculate_rho, y = +1, over the active set
    ub = np.inf
    lb = -np.inf
    nr_free = 0
    sum_free = 0.0
    for k in range(active):
        if pu[k] != 0:
            lb = max(lb, G[k])
        elif pl[k] != 0:
            ub = min(ub, G[k])
        else:
            nr_free += 1
            sum_free += G[k]
    rho = sum_free / nr_free if nr_free > 0 else (ub + lb) / 2
    for k in range(l):
        alpha_out[idx[k]] = a[k]
    return rho, n_iter

"""VoxelOCSVM against scikit-learn's OneClassSVM fitted voxel by voxel (the reference)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import pdist
from sklearn.svm import OneClassSVM

from embed.errors import ConfigError, InputError
from embed.scorers import VoxelOCSVM, voxel_blocks


def _data(rng, S, V, D, M=4, dtype=np.float64):
    """Controls with per-voxel scale/offset, cases partly outside the controls' cloud."""
    scale = rng.uniform(0.3, 3.0, size=(1, V, 1))
    offset = rng.normal(size=(1, V, D))
    controls = rng.normal(size=(S, V, D)) * scale + offset
    cases = rng.normal(size=(M, V, D)) * scale * rng.uniform(0.5, 2.0, size=(M, 1, 1)) + offset
    return controls.astype(dtype), cases.astype(dtype)


def _sklearn(controls, cases, nu, gamma_per_voxel, with_iter=False):
    """Reference: scikit-learn OneClassSVM(kernel="rbf") per voxel -> decision (M, V), alpha (V, S), rho (V,)
    (and the solver's iteration counts (V,) with ``with_iter``)."""
    S, V, _ = controls.shape
    dec, alpha, rho, n_iter = np.empty((cases.shape[0], V)), np.zeros((V, S)), np.empty(V), np.empty(V, np.int64)
    for v in range(V):
        m = OneClassSVM(kernel="rbf", nu=nu, gamma=gamma_per_voxel(v)).fit(controls[:, v])
        dec[:, v] = m.decision_function(cases[:, v])
        alpha[v, m.support_] = m.dual_coef_[0]
        rho[v] = -m.intercept_[0]
        n_iter[v] = np.ravel(m.n_iter_)[0]
    return (dec, alpha, rho, n_iter) if with_iter else (dec, alpha, rho)


@pytest.mark.parametrize("S, V, D, nu, gamma", [
    (40, 200, 16, 0.5, "scale"),
    (20, 100, 8, 0.2, "median"),
    (60, 60, 64, 0.5, 0.01),
    (33, 80, 24, 0.37, "scale"),
])
def test_matches_sklearn_voxel_by_voxel(S, V, D, nu, gamma):
    rng = np.random.default_rng(S * 1000 + D)
    controls, cases = _data(rng, S, V, D)
    ours = VoxelOCSVM(nu=nu, gamma=gamma).fit(controls)
    if gamma == "median":
        # our documented heuristic, recomputed independently: 1 / median squared pairwise distance
        want = np.array([1.0 / np.median(pdist(controls[:, v], "sqeuclidean")) for v in range(V)])
        np.testing.assert_allclose(ours.gamma_, want, rtol=1e-10)
        ref_gamma = lambda v: want[v]  # noqa: E731
    elif gamma == "scale":
        # scikit-learn's "scale": 1 / (n_features * X.var()) (sklearn/svm/_base.py)
        want = np.array([1.0 / (D * controls[:, v].var()) for v in range(V)])
        np.testing.assert_allclose(ours.gamma_, want, rtol=1e-12)
        ref_gamma = lambda v: "scale"  # noqa: E731
    else:
        ref_gamma = lambda v: gamma  # noqa: E731
    dec_ref, alpha_ref, rho_ref, n_iter_ref = _sklearn(controls, cases, nu, ref_gamma, with_iter=True)
    dec = ours.decision_function(cases)
    # reference: sklearn.svm.OneClassSVM.decision_function; requirement <= 1e-4, same sign
    assert np.abs(dec - dec_ref).max() <= 1e-6
    assert (np.sign(dec) == np.sign(dec_ref)).all()
    np.testing.assert_allclose(ours.alpha_, alpha_ref, atol=1e-6)  # sklearn dual_coef_ on support_
    np.testing.assert_allclose(ours.rho_, rho_ref, atol=1e-6)  # sklearn intercept_ = -rho
    # the same SMO path as libsvm: sklearn's n_iter_ (iterations of its solver) on every voxel
    np.testing.assert_array_equal(ours.n_iter_, n_iter_ref)
    # score is minus the decision function (contract in ARCHITECTURE.md)
    np.testing.assert_array_equal(ours.score_many(cases), -dec)
    np.testing.assert_array_equal(ours.score(cases[1]), -dec[1])


def test_shrinking_path_exercised_and_matches():
    # small S: many voxels need more than S iterations, so libsvm's shrinking step runs
    rng = np.random.default_rng(7)
    controls, cases = _data(rng, 12, 150, 6)
    ours = VoxelOCSVM(nu=0.3).fit(controls)
    assert (ours.n_iter_ > 12).sum() >= 10
    dec_ref, _, _ = _sklearn(controls, cases, 0.3, lambda v: "scale")
    assert np.abs(ours.decision_function(cases) - dec_ref).max() <= 1e-6
    # shrinking=False reaches the same solution within the stopping tolerance (sklearn: shrinking=False)
    flat = VoxelOCSVM(nu=0.3, shrinking=False).fit(controls)
    dec_ref2, _, _ = _sklearn_no_shrink(controls, cases, 0.3)
    assert np.abs(flat.decision_function(cases) - dec_ref2).max() <= 1e-6


def _sklearn_no_shrink(controls, cases, nu):
    V = controls.shape[1]
    dec = np.empty((cases.shape[0], V))
    for v in range(V):
        dec[:, v] = OneClassSVM(nu=nu, shrinking=False).fit(controls[:, v]).decision_function(cases[:, v])
    return dec, None, None


def test_degenerate_voxels_match_sklearn():
    # duplicated controls (zero curvature: libsvm's TAU branch) and a constant voxel (variance 0:
    # scikit-learn's "scale" falls back to gamma = 1.0, sklearn/svm/_base.py)
    rng = np.random.default_rng(13)
    controls, cases = _data(rng, 14, 12, 5)
    controls[7:, :6] = controls[:7, :6]  # every control twice at voxels 0-5
    controls[:, 9] = 0.25
    ours = VoxelOCSVM(nu=0.5).fit(controls)
    assert ours.gamma_[9] == 1.0
    dec_ref, _, _, n_iter_ref = _sklearn(controls, cases, 0.5, lambda v: "scale", with_iter=True)
    dec = ours.decision_function(cases)
    assert np.abs(dec - dec_ref).max() <= 1e-6 and (np.sign(dec) == np.sign(dec_ref)).all()
    np.testing.assert_array_equal(ours.n_iter_, n_iter_ref)


@pytest.mark.parametrize("S, D, M", [(9, 3, 11), (17, 13, 17), (2, 1, 1)])
def test_odd_sizes_and_many_cases_match_sklearn(S, D, M):
    # sizes that are not multiples of the 8-wide vectors, more than 8 cases per voxel, 2 controls
    rng = np.random.default_rng(S + D + M)
    controls, cases = _data(rng, S, 20, D, M=M)
    ours = VoxelOCSVM(nu=0.45).fit(controls)
    dec_ref, _, _ = _sklearn(controls, cases, 0.45, lambda v: "scale")
    dec = ours.decision_function(cases)
    assert np.abs(dec - dec_ref).max() <= 1e-6 and (np.sign(dec) == np.sign(dec_ref)).all()


def test_float32_voxel_major_input_matches_sklearn():
    # the store hands out voxel-major float32 blocks: (V, S, D) seen as (S, V, D)
    rng = np.random.default_rng(11)
    controls, cases = _data(rng, 30, 60, 12, dtype=np.float32)
    vm = np.ascontiguousarray(controls.transpose(1, 0, 2)).transpose(1, 0, 2)
    ours = VoxelOCSVM(nu=0.5).fit(vm)
    # scikit-learn converts float32 input to float64 before fitting (reference semantics)
    dec_ref, _, _ = _sklearn(controls.astype(np.float64), cases.astype(np.float64), 0.5, lambda v: "scale")
    dec = ours.decision_function(cases)
    assert np.abs(dec - dec_ref).max() <= 1e-6 and (np.sign(dec) == np.sign(dec_ref)).all()


def test_blocks_give_the_same_scores_and_jobs_do_not_matter():
    rng = np.random.default_rng(3)
    controls, cases = _data(rng, 25, 130, 10)
    whole = VoxelOCSVM(nu=0.4, gamma="median", n_jobs=2).fit(controls).score_many(cases)  # two threads
    parts = np.empty_like(whole)
    for sl in voxel_blocks(130, 32):
        parts[:, sl] = VoxelOCSVM(nu=0.4, gamma="median", n_jobs=1).fit(controls[:, sl]).score_many(cases[:, sl])
    np.testing.assert_array_equal(parts, whole)


def test_state_round_trip():
    rng = np.random.default_rng(5)
    controls, cases = _data(rng, 15, 20, 5)
    a = VoxelOCSVM(nu=0.5).fit(controls)
    b = VoxelOCSVM.from_state(a.get_params(), {k: v.copy() for k, v in a.fitted_state().items()})
    np.testing.assert_array_equal(b.score_many(cases), a.score_many(cases))
    with pytest.raises(InputError, match="state lacks"):
        VoxelOCSVM.from_state(a.get_params(), {"alpha_": a.alpha_})
    with pytest.raises(InputError, match="inconsistent fitted state"):
        VoxelOCSVM.from_state(a.get_params(), {**a.fitted_state(), "rho_": a.rho_[:3]})


def test_bad_input_and_parameters():
    rng = np.random.default_rng(0)
    controls, cases = _data(rng, 10, 6, 3)
    with pytest.raises(ConfigError, match="nu must be a number in"):
        VoxelOCSVM(nu=0.0).fit(controls)
    with pytest.raises(ConfigError, match="nu must be a number in"):
        VoxelOCSVM(nu=1.5).fit(controls)
    with pytest.raises(ConfigError, match="unknown gamma policy 'auto'"):
        VoxelOCSVM(gamma="auto").fit(controls)
    with pytest.raises(ConfigError, match="gamma must be"):
        VoxelOCSVM(gamma=-1.0).fit(controls)
    with pytest.raises(ConfigError, match="tol must be a positive number"):
        VoxelOCSVM(tol=0).fit(controls)
    with pytest.raises(ConfigError, match="n_jobs must be None or an integer"):
        VoxelOCSVM(n_jobs=0).fit(controls)
    with pytest.raises(InputError, match=r"controls must be a 3-D array"):
        VoxelOCSVM().fit(controls[0])
    with pytest.raises(InputError, match="need at least 2 controls"):
        VoxelOCSVM().fit(controls[:1])
    with pytest.raises(InputError, match="must hold real numbers"):
        VoxelOCSVM().fit(controls.astype(complex))
    bad = controls.copy()
    bad[2, 4, 1] = np.nan
    with pytest.raises(InputError, match=r"NaN or infinite values at 1 voxel\(s\) \(first voxel index 4\)"):
        VoxelOCSVM().fit(bad)
    with pytest.raises(InputError, match="is not fitted"):
        VoxelOCSVM().score(cases[0])
    fitted = VoxelOCSVM().fit(controls)
    with pytest.raises(InputError, match=r"do not match the fitted \(V, D\) = \(6, 3\)"):
        fitted.score_many(cases[:, :5])
    with pytest.raises(InputError, match=r"case must be a 2-D array"):
        fitted.score(cases)
    with pytest.raises(InputError, match="case has NaN or infinite"):
        fitted.score(np.full((6, 3), np.inf))

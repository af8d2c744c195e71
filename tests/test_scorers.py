"""VoxelGaussian, VoxelKNN, leave-one-out standardisation and the shared protocol."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.covariance import LedoitWolf, ShrunkCovariance
from sklearn.neighbors import NearestNeighbors

from embed.errors import ConfigError, InputError
from embed.scorers import (Standardiser, VoxelGaussian, VoxelKNN, VoxelOCSVM, loo_scores, make_scorer,
                           voxel_blocks)
from embed.scorers.normalise import loo_moments


def _data(rng, S, V, D, M=3):
    scale = rng.uniform(0.2, 3.0, size=(1, V, D))
    controls = rng.normal(size=(S, V, D)) * scale
    cases = rng.normal(size=(M, V, D)) * scale * 1.5
    return controls, cases


@pytest.mark.parametrize("S, D", [(30, 8), (20, 40), (50, 64), (12, 1), (25, 25)])
def test_gaussian_matches_sklearn_ledoit_wolf(S, D):
    rng = np.random.default_rng(S + D)
    controls, cases = _data(rng, S, 12, D)
    g = VoxelGaussian().fit(controls)
    got = g.score_many(cases)
    for v in range(12):
        lw = LedoitWolf().fit(controls[:, v])  # scikit-learn reference; .mahalanobis is squared
        np.testing.assert_allclose(got[:, v], lw.mahalanobis(cases[:, v]), rtol=1e-9)
        assert g.shrinkage_[v] == pytest.approx(lw.shrinkage_, abs=1e-12)


def test_gaussian_fixed_shrinkage_matches_sklearn_shrunk_covariance():
    rng = np.random.default_rng(1)
    controls, cases = _data(rng, 20, 10, 30)
    got = VoxelGaussian(shrinkage=0.25).fit(controls).score_many(cases)
    for v in range(10):
        ref = ShrunkCovariance(shrinkage=0.25).fit(controls[:, v]).mahalanobis(cases[:, v])  # scikit-learn
        np.testing.assert_allclose(got[:, v], ref, rtol=1e-9)


def test_gaussian_constant_voxel_scores_zero_and_blocks_agree():
    rng = np.random.default_rng(2)
    controls, cases = _data(rng, 15, 9, 4)
    controls[:, 3] = 0.7  # every control identical there: pinv of a zero covariance is zero
    g = VoxelGaussian().fit(controls)
    assert (g.score_many(cases)[:, 3] == 0).all()
    whole = g.score_many(cases)
    parts = np.concatenate([VoxelGaussian().fit(controls[:, sl]).score_many(cases[:, sl])
                            for sl in voxel_blocks(9, 4)], axis=1)
    np.testing.assert_allclose(parts, whole, rtol=1e-12)
    state = VoxelGaussian.from_state(g.get_params(), g.fitted_state())
    np.testing.assert_array_equal(state.score_many(cases), whole)


@pytest.mark.parametrize("k", [1, 3, 9])
def test_knn_matches_sklearn_nearest_neighbors(k):
    rng = np.random.default_rng(k)
    controls, cases = _data(rng, 10, 15, 6)
    got = VoxelKNN(k=k).fit(controls).score_many(cases)
    for v in range(15):
        dist, _ = NearestNeighbors(n_neighbors=k).fit(controls[:, v]).kneighbors(cases[:, v])  # scikit-learn
        np.testing.assert_allclose(got[:, v], dist.mean(1), rtol=1e-12, atol=1e-12)


def test_scorer_parameter_and_input_errors():
    rng = np.random.default_rng(0)
    controls, cases = _data(rng, 6, 4, 3)
    with pytest.raises(ConfigError, match="unknown shrinkage 'oas'"):
        VoxelGaussian(shrinkage="oas").fit(controls)
    with pytest.raises(ConfigError, match=r"shrinkage must be 'ledoit-wolf' or a number in \[0, 1\], got 1.5"):
        VoxelGaussian(shrinkage=1.5).fit(controls)
    with pytest.raises(InputError, match="need at least 2 controls"):
        VoxelGaussian().fit(controls[:1])
    with pytest.raises(InputError, match="controls has NaN or infinite values"):
        VoxelGaussian().fit(np.where(controls > 1, np.inf, controls))
    with pytest.raises(InputError, match=r"at least one voxel and one dimension, got shape \(6, 0, 3\)"):
        VoxelGaussian().fit(controls[:, :0])
    g = VoxelGaussian().fit(controls)
    with pytest.raises(InputError, match="VoxelGaussian: inconsistent fitted state"):
        VoxelGaussian.from_state(g.get_params(), {**g.fitted_state(), "inv_eig_": g.inv_eig_[:2]})
    with pytest.raises(ConfigError, match="k must be an integer >= 1, got 0"):
        VoxelKNN(k=0).fit(controls)
    with pytest.raises(InputError, match=r"k=6 needs more than k controls, got S=6"):
        VoxelKNN(k=6).fit(controls)
    with pytest.raises(InputError, match="is not fitted"):
        VoxelKNN().score_many(cases)
    with pytest.raises(InputError, match=r"do not match the fitted \(V, D\) = \(4, 3\)"):
        VoxelKNN(k=2).fit(controls).score(cases[0, :, :2])
    with pytest.raises(ConfigError, match="unknown scorer 'svm'; choose one of gaussian, knn, ocsvm"):
        make_scorer("svm")
    with pytest.raises(ConfigError, match=r"scorer 'knn': bad parameters \['nu'\]"):
        make_scorer("knn", nu=0.5)
    with pytest.raises(InputError, match="block_size must be >= 1"):
        voxel_blocks(10, 0)
    assert voxel_blocks(10, 4) == [slice(0, 4), slice(4, 8), slice(8, 10)]
    assert repr(make_scorer("ocsvm", nu=0.3)) == "VoxelOCSVM(nu=0.3, gamma='scale', tol=0.001, shrinking=True, n_jobs=None)"


def test_loo_scores_equal_refits_without_each_control():
    rng = np.random.default_rng(4)
    controls, _ = _data(rng, 7, 5, 3)
    loo = loo_scores(VoxelKNN(k=2), controls)
    for s in range(7):
        others = np.delete(controls, s, axis=0)
        for v in range(5):  # scikit-learn reference for each left-out control
            d, _ = NearestNeighbors(n_neighbors=2).fit(others[:, v]).kneighbors(controls[s:s + 1, v])
            assert loo[s, v] == pytest.approx(d.mean(), rel=1e-12)
    ocsvm = loo_scores(VoxelOCSVM(nu=0.5), controls)
    assert ocsvm.shape == (7, 5)
    np.testing.assert_array_equal(ocsvm[2], VoxelOCSVM(nu=0.5).fit(np.delete(controls, 2, 0)).score(controls[2]))


def test_standardised_map_formula_outlier_and_down_weighting():
    rng = np.random.default_rng(8)
    S, V, D = 20, 50, 4
    controls = rng.normal(size=(S, V, D))
    controls[:, 7] *= 6.0  # a voxel where healthy anatomy varies a lot
    case = rng.normal(size=(V, D))
    case[7] += 6.0  # same raw shift (relative to its spread: small) at the variable voxel
    case[21] += 6.0  # planted outlier at an ordinary voxel
    scorer = VoxelKNN(k=3)
    loo = loo_scores(scorer, controls)
    st = Standardiser.from_loo(loo)
    raw = scorer.clone().fit(controls).score(case)
    z = st.apply(raw)
    # exact formula (documented in embed.scorers.normalise)
    m, sd = loo.mean(0), loo.std(0, ddof=1)
    floor = 0.1 * np.median(sd[sd > 0])
    np.testing.assert_allclose(z, (raw - m) / np.maximum(sd, floor), rtol=1e-12)
    assert st.floor == pytest.approx(floor)
    assert int(np.argmax(z)) == 21 and z[21] > 5
    assert raw[7] > raw[21] * 0.5  # the variable voxel's raw score is high too ...
    assert z[7] < z[21] / 3  # ... but standardising counts it for much less
    np.testing.assert_allclose(st.apply(np.stack([raw, raw])), np.stack([z, z]))
    # floor: a voxel whose controls agree exactly is divided by the floor, not by ~0
    tight = Standardiser.from_moments(np.zeros(3), np.array([0.0, 1.0, 2.0]), floor_fraction=0.5)
    assert tight.floor == 0.75
    np.testing.assert_allclose(tight.apply(np.ones(3)), [1 / 0.75, 1.0, 0.5])


def test_standardiser_errors():
    with pytest.raises(ConfigError, match=r"floor_fraction must be in \(0, 1\], got 0"):
        Standardiser.from_moments(np.zeros(2), np.ones(2), floor_fraction=0)
    with pytest.raises(InputError, match="do not vary at any of 3 voxels"):
        Standardiser.from_loo(np.ones((4, 3)))
    with pytest.raises(InputError, match=r"mean and sd must be \(V,\) arrays of one shape"):
        Standardiser.from_moments(np.zeros(2), np.ones(3))
    with pytest.raises(InputError, match="sd must be finite and >= 0"):
        Standardiser.from_moments(np.zeros(2), np.array([1.0, -1.0]))
    with pytest.raises(InputError, match=r"expected leave-one-out scores of shape \(S, V\) with S >= 2"):
        loo_moments(np.ones(5))
    with pytest.raises(InputError, match="leave-one-out scores hold NaN"):
        loo_moments(np.array([[1.0, np.nan], [2.0, 3.0]]))
    st = Standardiser.from_moments(np.zeros(3), np.ones(3))
    with pytest.raises(InputError, match=r"expected a score of shape \(V,\) or \(M, V\) with V=3"):
        st.apply(np.ones(4))
    with pytest.raises(InputError, match="need at least 3 controls"):
        loo_scores(VoxelKNN(k=1), np.ones((2, 3, 1)))

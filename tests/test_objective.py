"""Tests of embed.objective (loss terms, schedules, diagnostics) and embed.monitor's pure helpers."""

import re

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics.pairwise import cosine_similarity

from embed.monitor import MIN_EFFECTIVE_RANK, MIN_SPREAD, collapse_warning, recon_grid
from embed.objective import (agreement, agreement_space, agreement_weight, centre, cosine_diagnostics, pair_loss,
                             reconstruction, retrieval_score)


def sk_agreement(z1: np.ndarray, z2: np.ndarray) -> float:
    """1 - mean cosine of row pairs (source: scikit-learn, sklearn.metrics.pairwise.cosine_similarity)."""
    return 1.0 - float(np.mean(np.diag(cosine_similarity(z1, z2))))


def np_centre(z1: np.ndarray, z2: np.ndarray):
    """Subtract the mean of the 2N concatenated embeddings, by hand."""
    mean = np.concatenate([z1, z2]).mean(axis=0)
    return z1 - mean, z2 - mean


def pair_batch(rng, n=40, d=6, offset=0.0):
    """Two (n, d) float64 embedding batches, correlated, sharing a common component ``offset``."""
    z1 = rng.normal(size=(n, d)) + offset
    z2 = 0.6 * (z1 - offset) + 0.8 * rng.normal(size=(n, d)) + offset
    return z1, z2


# --------------------------------------------------------------------------------------------
# agreement, centre, reconstruction, pair_loss


@pytest.mark.parametrize("offset", [0.0, 3.0])
def test_agreement_raw_matches_sklearn(offset):
    z1, z2 = pair_batch(np.random.default_rng(0), offset=offset)
    got = agreement(torch.from_numpy(z1), torch.from_numpy(z2), centred=False).item()
    assert got == pytest.approx(sk_agreement(z1, z2), abs=1e-12)
    assert 0.0 <= got <= 2.0


@pytest.mark.parametrize("offset", [0.0, 3.0])
def test_agreement_centred_matches_sklearn_on_hand_centred(offset):
    z1, z2 = pair_batch(np.random.default_rng(1), offset=offset)
    got = agreement(torch.from_numpy(z1), torch.from_numpy(z2), centred=True).item()
    c1, c2 = np_centre(z1, z2)
    assert got == pytest.approx(sk_agreement(c1, c2), abs=1e-12)


def test_centring_matters_with_a_common_component():
    # A large shared offset drives the raw cosine towards 1; centring removes it.
    z1, z2 = pair_batch(np.random.default_rng(2), n=200, offset=20.0)
    t1, t2 = torch.from_numpy(z1), torch.from_numpy(z2)
    assert agreement(t1, t2).item() < 0.05
    assert agreement(t1, t2, centred=True).item() > 0.2


def test_centre_matches_numpy():
    z1, z2 = pair_batch(np.random.default_rng(3), offset=1.5)
    c1, c2 = centre(torch.from_numpy(z1), torch.from_numpy(z2))
    n1, n2 = np_centre(z1, z2)
    np.testing.assert_allclose(c1.numpy(), n1, rtol=0, atol=1e-12)
    np.testing.assert_allclose(c2.numpy(), n2, rtol=0, atol=1e-12)


def test_agreement_of_identical_and_opposite_embeddings():
    z = torch.from_numpy(np.random.default_rng(4).normal(size=(10, 5)))
    assert agreement(z, z).item() == pytest.approx(0.0, abs=1e-12)
    assert agreement(z, -z).item() == pytest.approx(2.0, abs=1e-12)


@pytest.mark.parametrize("kind, ref", [
    ("mse", lambda x, r: np.mean((r - x) ** 2)),
    ("l1", lambda x, r: np.mean(np.abs(r - x))),
])
def test_reconstruction_matches_numpy(kind, ref):
    rng = np.random.default_rng(5)
    x, r = rng.normal(size=(7, 2, 5, 5)), rng.normal(size=(7, 2, 5, 5))
    got = reconstruction(torch.from_numpy(x), torch.from_numpy(r), kind).item()
    assert got == pytest.approx(ref(x, r), rel=1e-12)


@pytest.mark.parametrize("kind", ["mse", "l1"])
@pytest.mark.parametrize("centred", [False, True])
@pytest.mark.parametrize("weight", [0.0, 0.5, 3.0])
def test_pair_loss_total_is_rec_plus_weighted_agreement(kind, centred, weight):
    rng = np.random.default_rng(6)
    x1, x2, r1, r2 = (rng.normal(size=(8, 2, 5, 5)) for _ in range(4))
    z1, z2 = pair_batch(rng, n=8, d=4, offset=1.0)
    t = [torch.from_numpy(a) for a in (x1, x2, r1, r2, z1, z2)]
    terms = pair_loss(*t, weight=weight, centred=centred, kind=kind)
    err = (lambda a, b: np.mean((a - b) ** 2)) if kind == "mse" else (lambda a, b: np.mean(np.abs(a - b)))
    rec = 0.5 * (err(x1, r1) + err(x2, r2))
    agr = sk_agreement(*(np_centre(z1, z2) if centred else (z1, z2)))
    assert terms["reconstruction"].item() == pytest.approx(rec, rel=1e-12)
    assert terms["agreement"].item() == pytest.approx(agr, rel=1e-12)
    assert terms["total"].item() == pytest.approx(rec + weight * agr, rel=1e-12)


def test_pair_loss_is_differentiable():
    rng = np.random.default_rng(7)
    x1, x2, r1, r2 = (torch.from_numpy(rng.normal(size=(4, 1, 3, 3))) for _ in range(4))
    z1 = torch.from_numpy(rng.normal(size=(4, 3))).requires_grad_()
    z2 = torch.from_numpy(rng.normal(size=(4, 3)))
    pair_loss(x1, x2, r1, r2, z1, z2, weight=1.0, centred=True)["total"].backward()
    assert z1.grad is not None and torch.isfinite(z1.grad).all() and z1.grad.abs().sum() > 0


# --------------------------------------------------------------------------------------------
# agreement weight schedules


@pytest.mark.parametrize("step", [0, 1, 50, 99])
def test_constant_schedule(step):
    assert agreement_weight(step, 100, 0.7, "constant", 0.5) == 0.7


def test_ramp_is_linear_then_flat():
    total, w, frac = 200, 2.5, 0.3
    steps = np.arange(total)
    got = np.array([agreement_weight(int(s), total, w, "ramp", frac) for s in steps])
    # Linear from 0 at step 0 to w at frac * total (= step 60), then flat: np.interp clamps at the ends.
    want = np.interp(steps, [0.0, frac * total], [0.0, w])
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)
    assert got[0] == 0.0 and got[30] == pytest.approx(w / 2) and got[60] == w and got[-1] == w


def test_ramp_shorter_than_a_step():
    # ramp_fraction * steps < 1: full weight from step 1 on, never a division by zero.
    assert agreement_weight(0, 3, 1.0, "ramp", 0.1) == 0.0
    assert agreement_weight(1, 3, 1.0, "ramp", 0.1) == 1.0


@settings(max_examples=200, deadline=None)
@given(
    total=st.integers(1, 10**6),
    weight=st.floats(0.0, 1e3, allow_nan=False),
    frac=st.floats(1e-6, 1.0),
    data=st.data(),
)
def test_ramp_is_monotone_and_bounded(total, weight, frac, data):
    s = data.draw(st.integers(0, total - 1))
    t = data.draw(st.integers(s, total - 1))
    ws = agreement_weight(s, total, weight, "ramp", frac)
    wt = agreement_weight(t, total, weight, "ramp", frac)
    assert 0.0 <= ws <= wt <= weight
    assert agreement_weight(0, total, weight, "ramp", frac) == 0.0


# --------------------------------------------------------------------------------------------
# cosine diagnostics


def diag_np(z1, z2):
    return cosine_diagnostics(torch.from_numpy(z1), torch.from_numpy(z2))


def test_identical_embeddings_agree_perfectly():
    z = np.random.default_rng(8).normal(size=(100, 6))
    d = diag_np(z, z.copy())
    assert d["cos_colocated"] == pytest.approx(1.0, abs=1e-6)
    assert d["cos_raw"] == pytest.approx(1.0, abs=1e-6)


def test_collapsed_embedding_has_no_spread():
    row = np.random.default_rng(9).normal(size=(1, 8)) * 5
    z = np.repeat(row, 64, axis=0)
    d = diag_np(z, z.copy())
    assert d["spread"] == pytest.approx(0.0, abs=1e-6)
    assert collapse_warning(d) is not None


def test_isotropic_gaussian_uses_every_dimension():
    rng = np.random.default_rng(10)
    z1, z2 = rng.normal(size=(4000, 8)), rng.normal(size=(4000, 8))
    d = diag_np(z1, z2)
    assert 7.0 < d["effective_rank"] <= 8.0 + 1e-6
    assert abs(d["cos_random"]) < 0.05
    assert abs(d["cos_colocated"]) < 0.05  # independent halves: no agreement either
    assert d["spread"] == pytest.approx(1.0, abs=0.05)  # unit-variance Gaussian
    assert collapse_warning(d) is None


def test_rank_one_embedding_has_effective_rank_one():
    rng = np.random.default_rng(11)
    v = rng.normal(size=8)
    z1 = rng.normal(size=(500, 1)) * v + 2.0 * v
    z2 = rng.normal(size=(500, 1)) * v + 2.0 * v
    d = diag_np(z1, z2)
    assert d["effective_rank"] == pytest.approx(1.0, abs=1e-3)
    assert "effective rank" in collapse_warning(d)


def test_diagnostics_against_numpy_and_sklearn():
    rng = np.random.default_rng(12)
    n, dim = 60, 5
    z1 = rng.normal(size=(n, dim)) + 1.0
    # z2 alternates between two rows, so z2_{i-1} == z2_{i+1}: the random-pair check does not
    # depend on which neighbour the "random" partner is.
    z2 = np.where((np.arange(n) % 2 == 0)[:, None], rng.normal(size=dim), rng.normal(size=dim)) + 1.0
    d = diag_np(z1, z2)
    c1, c2 = np_centre(z1, z2)
    # scikit-learn cosine_similarity as the reference for the three cosines.
    assert d["cos_raw"] == pytest.approx(np.mean(np.diag(cosine_similarity(z1, z2))), abs=1e-5)
    assert d["cos_colocated"] == pytest.approx(np.mean(np.diag(cosine_similarity(c1, c2))), abs=1e-5)
    assert d["cos_random"] == pytest.approx(np.mean(np.diag(cosine_similarity(c1, np.roll(c2, 1, axis=0)))), abs=1e-5)
    # spread: mean over dimensions of the standard deviation of all 2N embeddings (numpy, ddof=1 as torch.std).
    assert d["spread"] == pytest.approx(np.concatenate([z1, z2]).std(axis=0, ddof=1).mean(), rel=1e-5)
    # effective rank: exp(entropy) of the normalised singular values of the centred embeddings (numpy SVD).
    s = np.linalg.svd(np.concatenate([c1, c2]), compute_uv=False)
    p = s / s.sum()
    assert d["effective_rank"] == pytest.approx(np.exp(-(p * np.log(p)).sum()), rel=1e-5)


# --------------------------------------------------------------------------------------------
# monitor helpers


@pytest.mark.parametrize("diag, expect", [
    ({"spread": 0.5, "effective_rank": 4.0}, None),
    ({}, None),
    ({"spread": MIN_SPREAD / 10, "effective_rank": 4.0}, r"embedding collapse: spread 1\.00e-04 < 0\.001"),
    ({"spread": 0.5, "effective_rank": 1.2}, r"embedding collapse: effective rank 1\.20 < 1\.5 .*lower loss\.agreement_weight"),
    ({"spread": MIN_SPREAD, "effective_rank": MIN_EFFECTIVE_RANK}, None),  # the thresholds themselves are fine
])
def test_collapse_warning(diag, expect):
    got = collapse_warning(diag)
    if expect is None:
        assert got is None
    else:
        assert got is not None and "\n" not in got
        assert re.search(expect, got), got


def test_recon_grid_shape_range_and_layout():
    rng = np.random.default_rng(13)
    n, c, p = 10, 2, 5
    x = rng.normal(size=(n, c, p, p)).astype(np.float32) * 3 + 1
    recon = x + rng.normal(size=x.shape).astype(np.float32)
    g = recon_grid(x, recon, n=8)
    assert g.shape == (2 * c * p, 8 * p)
    assert g.dtype == np.float32
    assert g.min() >= 0.0 and g.max() <= 1.0
    for ch in range(c):
        lo, hi = x[:8, ch].min(), x[:8, ch].max()
        top = g[2 * ch * p:(2 * ch + 1) * p]
        # input row: each contrast scaled by its range over the shown patches; min -> 0, max -> 1
        np.testing.assert_allclose(top[:, 3 * p:4 * p], (x[3, ch] - lo) / (hi - lo), atol=1e-6)
        assert top.min() == 0.0 and top.max() == pytest.approx(1.0)
        bottom = g[(2 * ch + 1) * p:(2 * ch + 2) * p]
        np.testing.assert_allclose(bottom[:, :p], np.clip((recon[0, ch] - lo) / (hi - lo), 0, 1), atol=1e-6)


def test_recon_grid_fewer_patches_and_constant_input():
    x = np.full((3, 1, 3, 3), 2.0, np.float32)
    g = recon_grid(x, x + 0.5, n=8)
    assert g.shape == (2 * 3, 3 * 3)
    assert np.isfinite(g).all() and g.min() >= 0.0 and g.max() <= 1.0


# --------------------------------------------------------------------------------------------
# ablation switches: schedules, batch-normalised agreement, reconstruction weight; retrieval


def test_cosine_ramp_schedule():
    total, w, frac = 100, 2.0, 0.4
    got = np.array([agreement_weight(s, total, w, "cosine_ramp", frac) for s in range(total)])
    t = np.minimum(np.arange(total) / (frac * total), 1.0)
    np.testing.assert_allclose(got, w * 0.5 * (1 - np.cos(np.pi * t)), rtol=0, atol=1e-12)  # half-cosine ramp
    assert got[0] == 0.0 and got[20] == pytest.approx(w / 2) and got[40] == w and (np.diff(got) >= 0).all()


def test_step_schedule():
    got = [agreement_weight(s, 10, 1.5, "step", 0.3) for s in range(10)]
    assert got == [0.0, 0.0, 0.0] + [1.5] * 7


def test_batchnorm_agreement_matches_torch_batchnorm_and_sklearn():
    z1, z2 = pair_batch(np.random.default_rng(13), n=50, d=5, offset=2.0)
    z1, z2 = z1 * np.array([1, 10, 0.1, 3, 1]), z2 * np.array([1, 10, 0.1, 3, 1])
    # Reference: torch.nn.BatchNorm1d(affine=False) in training mode over the 2N embeddings.
    bn = torch.nn.BatchNorm1d(5, affine=False, dtype=torch.float64).train()
    n1, n2 = bn(torch.from_numpy(np.concatenate([z1, z2]))).detach().numpy().reshape(2, 50, 5)
    got = agreement(torch.from_numpy(z1), torch.from_numpy(z2), "batchnorm").item()
    assert got == pytest.approx(sk_agreement(n1, n2), abs=1e-9)
    assert agreement(torch.from_numpy(z1), torch.from_numpy(z2), "centred").item() == pytest.approx(
        agreement(torch.from_numpy(z1), torch.from_numpy(z2), True).item())
    assert agreement_space(False, False) == "raw" and agreement_space(True, False) == "centred"
    assert agreement_space(False, True) == "batchnorm" and agreement_space(True, True) == "batchnorm"


@pytest.mark.parametrize("rec_weight", [0.0, 0.3, 1.0])
def test_reconstruction_weight(rec_weight):
    rng = np.random.default_rng(14)
    x1, x2, r1, r2 = (torch.from_numpy(rng.normal(size=(6, 2, 3, 3))) for _ in range(4))
    z1, z2 = (torch.from_numpy(a) for a in pair_batch(rng, n=6, d=4))
    t = pair_loss(x1, x2, r1, r2, z1, z2, weight=0.7, rec_weight=rec_weight)
    assert t["total"].item() == pytest.approx(rec_weight * t["reconstruction"].item() + 0.7 * t["agreement"].item())


def test_retrieval_score_matches_sklearn_nearest_neighbours():
    from sklearn.neighbors import NearestNeighbors

    rng = np.random.default_rng(15)
    k, r, d, true = 40, 27, 6, 13
    cand = rng.normal(size=(k, r, d))
    query = cand[:, true] + rng.normal(scale=0.7, size=(k, d))
    want = np.mean([NearestNeighbors(n_neighbors=1).fit(cand[i]).kneighbors(query[i:i + 1])[1][0, 0] == true
                    for i in range(k)])  # scikit-learn, Euclidean nearest neighbour
    assert retrieval_score(query, cand, true) == pytest.approx(want)
    assert 0 < want < 1
    assert retrieval_score(cand[:, true], cand, true) == 1.0  # the query itself among the candidates


def np_mmd(z: np.ndarray, p: np.ndarray) -> float:
    """Unbiased squared MMD with k(x, y) = C / (C + |x - y|^2), C = 2 D, written out with loops as in
    Tolstikhin et al., Wasserstein Auto-Encoders (ICLR 2018), Algorithm 2."""
    n, d = z.shape
    c = 2.0 * d
    k = lambda a, b: c / (c + np.sum((a - b) ** 2))  # noqa: E731
    zz = sum(k(z[i], z[j]) for i in range(n) for j in range(n) if i != j) / (n * (n - 1))
    pp = sum(k(p[i], p[j]) for i in range(n) for j in range(n) if i != j) / (n * (n - 1))
    zp = sum(k(z[i], p[j]) for i in range(n) for j in range(n)) / (n * n)
    return zz + pp - 2 * zp


def test_mmd_matches_the_written_out_estimator():
    from embed.objective import mmd_to_prior

    rng = np.random.default_rng(16)
    z, p = rng.normal(size=(12, 3)) * 2 + 1, rng.normal(size=(12, 3))
    assert mmd_to_prior(torch.from_numpy(z), torch.from_numpy(p)).item() == pytest.approx(np_mmd(z, p), rel=1e-9)


def test_mmd_separates_a_shifted_sample_from_the_prior():
    from embed.objective import mmd_to_prior, prior_draw

    same = mmd_to_prior(prior_draw(400, 4, [1]), prior_draw(400, 4, [2])).item()
    shifted = mmd_to_prior(prior_draw(400, 4, [1]) + 1.0, prior_draw(400, 4, [2])).item()
    assert abs(same) < 0.01 < shifted  # unbiased: near 0 for two samples of one distribution
    assert torch.equal(prior_draw(5, 2, [3, 4]), prior_draw(5, 2, [3, 4]))  # seeded, so resumable

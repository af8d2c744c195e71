"""Tests of embed.normalise: z-score and piecewise-linear histogram standardisation (Nyul and Udupa)."""

import json

import numpy as np
import pytest
from scipy import stats

from embed.cache import load_cache, prepare
from embed.cohort import load_cohort, load_subject, read_manifest
from embed.errors import CohortError, ConfigError, InputError
from embed.normalise import (PERCENTILES, check_params, histogram, landmarks, learn_standard, normalise_with,
                             piecewise_map, standard_scale, zscore)
from tests.test_cohort import BRAIN, SHAPE, scan


def test_landmarks_are_numpy_and_scipy_percentiles():
    rng = np.random.default_rng(0)
    vol = scan(rng)
    vol[BRAIN] = rng.gamma(2.0, 30.0, int(BRAIN.sum())).astype(np.float32)
    marks = landmarks(vol, BRAIN)
    inside = vol[BRAIN].astype(np.float64)
    np.testing.assert_array_equal(marks, np.percentile(inside, PERCENTILES))  # source: numpy.percentile (linear)
    # an independent implementation: scipy.stats.scoreatpercentile, 'fraction' interpolation (source: scipy)
    np.testing.assert_allclose(marks, stats.scoreatpercentile(inside, PERCENTILES), rtol=1e-12)
    assert PERCENTILES == (1, 10, 20, 30, 40, 50, 60, 70, 80, 90, 99)


def test_standard_scale_is_normal_quantiles():
    low, high = standard_scale()
    # the 99th percentile of the standard normal is 2.3263 (printed normal tables; from memory)
    assert high == pytest.approx(2.3263, abs=1e-4) and low == -high
    assert standard_scale((5, 50, 95))[1] == pytest.approx(stats.norm.ppf(0.95))


def test_learn_standard_by_hand():
    # two controls with landmarks (0, 1, 4) and (10, 30, 50) at percentiles 10, 50, 90
    pct = (10, 50, 90)
    low, high = standard_scale(pct)
    marks = np.array([[0.0, 1.0, 4.0], [10.0, 30.0, 50.0]])
    expected = np.array([low, (low + (1 / 4) * (high - low) + low + 0.5 * (high - low)) / 2, high])
    np.testing.assert_allclose(learn_standard(marks, pct), expected, rtol=1e-12)


def test_piecewise_map_matches_numpy_interp_and_extends_linearly():
    own = np.array([1.0, 2.0, 4.0, 8.0])
    std = np.array([-2.0, 0.0, 1.0, 3.0])
    inside = np.linspace(1.0, 8.0, 57)
    np.testing.assert_allclose(piecewise_map(inside, own, std), np.interp(inside, own, std), rtol=0, atol=1e-12)  # source: numpy.interp
    np.testing.assert_allclose(piecewise_map(own, own, std), std, atol=1e-12)  # landmarks land on the standard
    # beyond the ends, the first and last segments continue (nothing is clipped)
    assert piecewise_map(np.array([0.0]), own, std)[0] == pytest.approx(-4.0)       # slope 2 below 1
    assert piecewise_map(np.array([10.0]), own, std)[0] == pytest.approx(4.0)       # slope 0.5 above 8
    assert np.all(np.diff(piecewise_map(np.linspace(-5, 20, 101), own, std)) > 0)   # monotone


def test_gaussian_data_histogram_close_to_zscore():
    """With the normal-quantile scale, Gaussian intensities come out close to their z-scores."""
    rng = np.random.default_rng(1)
    shape = (40, 40, 40)
    mask = np.ones(shape, bool)
    controls = [rng.normal(100 + 10 * k, 15, shape).astype(np.float32) for k in range(4)]
    std = learn_standard(np.stack([landmarks(v, mask) for v in controls]))
    # standard landmarks of normal data = normal quantiles, up to sampling error (source: scipy.stats.norm)
    np.testing.assert_allclose(std, stats.norm.ppf(np.array(PERCENTILES) / 100), atol=0.02)
    new = rng.normal(60, 5, shape).astype(np.float32)
    z, _ = zscore(new, mask)
    h = histogram(new, mask, landmarks(new, mask), std)
    assert np.abs(h - z).mean() < 0.02


def test_normalise_with_zscore_equals_zscore_and_errors():
    rng = np.random.default_rng(2)
    vol = scan(rng)
    out, st = normalise_with(vol, BRAIN, {"method": "zscore", "within": "mask"})
    ref, st_ref = zscore(vol, BRAIN)
    np.testing.assert_array_equal(out, ref)
    assert st == st_ref
    params = {"method": "histogram", "within": "mask", "percentiles": [1, 50, 99], "landmarks": {"T1w": [-2, 0, 2]}}
    with pytest.raises(InputError, match=r"histogram normalisation needs the contrast name .*pass contrast="):
        normalise_with(vol, BRAIN, params)
    with pytest.raises(ConfigError, match=r"no valid histogram landmarks for contrast 'FLAIR' \(found contrasts \['T1w'\]\)"):
        normalise_with(vol, BRAIN, params, "FLAIR")
    with pytest.raises(ConfigError, match=r"normalisation method 'minmax' is unknown; expected one of zscore, histogram"):
        normalise_with(vol, BRAIN, {"method": "minmax"})
    with pytest.raises(ConfigError, match=r"histogram parameters need 'percentiles' .*found keys \['landmarks', 'method'\]"):
        check_params({"method": "histogram", "landmarks": {}}, ["T1w"], "card")
    with pytest.raises(ConfigError, match=r"need 3 increasing numbers per contrast"):
        check_params(dict(params, landmarks={"T1w": [0, 0, 1]}), ["T1w"], "card")
    flat = np.where(BRAIN, np.where(np.arange(BRAIN.size).reshape(SHAPE) % 2, 5.0, 9.0), 0).astype(np.float32)
    with pytest.raises(CohortError, match=r"histogram landmarks are not strictly increasing \(landmarks 0 and 1 are both 5\)"):
        normalise_with(flat, BRAIN, dict(params, percentiles=list(PERCENTILES), landmarks={"T1w": list(range(11))}),
                       "T1w", what="T1w image of subject x")
    out, st = normalise_with(vol, BRAIN, params, "T1w")
    np.testing.assert_allclose(st["landmarks"], np.percentile(vol[BRAIN].astype(np.float64), [1, 50, 99]))
    assert np.all(out[~BRAIN] == 0)


def test_load_cohort_histogram_controls_land_on_the_standard(tiny_manifest):
    c = load_cohort(tiny_manifest, normalisation="histogram", progress=False)
    p = c.normalisation_params
    assert p["method"] == "histogram" and p["controls"] == 6 and p["percentiles"] == list(PERCENTILES)
    json.dumps(p)  # JSON-ready, for a bundle card
    for ci, contrast in enumerate(c.contrasts):
        std = np.array(p["landmarks"][contrast])
        assert std[0] == pytest.approx(standard_scale()[0]) and std[-1] == pytest.approx(standard_scale()[1])
        for s in c.indices("control"):
            # each control's own percentiles are mapped onto the standard landmarks (interpolation between two
            # neighbouring voxels across a landmark is the only difference)
            got = np.percentile(c.data[s, ci][c.masks[s]].astype(np.float64), PERCENTILES)
            np.testing.assert_allclose(got, std, atol=2e-3)


@pytest.mark.parametrize("method", ["histogram", "zscore"])
def test_case_through_stored_params_matches_prepare(tiny_manifest, tmp_path, method):
    """A new case normalised through the stored parameters (as a bundle card carries them) equals what
    prepare wrote for the same subject, bit for bit."""
    prepare(tiny_manifest, out=tmp_path / "cache", normalisation=method, progress=False)
    cohort = load_cache(tmp_path / "cache")
    card = json.loads(json.dumps({"normalisation": cohort.normalisation_params}))  # through JSON, as in a card
    rows, _ = read_manifest(tiny_manifest)
    for row in rows:
        if row.role != "case":
            continue
        sub = load_subject(row.images, subject=row.subject, mask=row.mask, normalisation=card["normalisation"])
        s = cohort.subjects.index(row.subject)
        np.testing.assert_array_equal(sub.data, cohort.data[s])
        np.testing.assert_array_equal(sub.mask, cohort.masks[s])
        assert sub.stats == cohort.stats[row.subject]
    with pytest.raises(ConfigError, match=r"method 'histogram' needs landmarks learned on the controls; pass the stored parameters"):
        load_subject(rows[0].images, normalisation="histogram")

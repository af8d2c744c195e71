"""Tests of embed.implant: the fitted tissue model, raw zero, and lesions implanted into a control."""

import dataclasses

import numpy as np
import pytest

from embed import synth
from embed.errors import InputError
from embed.implant import MIXED_RISE_PER_MM, implant, plan_lesion, raw_zero, tissue_model
from embed.normalise import histogram, histogram_params, landmarks, learn_standard, normalise_with, piecewise_map, zscore

VOXEL_MM = 4
T1, FLAIR = 0, 1  # channel order of synth.CONTRASTS
assert synth.CONTRASTS == ("T1w", "FLAIR")


@pytest.fixture(scope="module")
def control():
    """One synthetic control on the 4 mm grid, z-scored inside its mask, with its fitted tissue model.

    Returns (data (2, X, Y, Z) float32, mask, stats, model, true tissue maps)."""
    template = synth.load_template(VOXEL_MM)
    subject = synth.make_subject(template, np.random.default_rng(0))
    # make_subject draws the warp first (warp_template is its first use of rng), so the same seed
    # gives the subject's own noise-free tissue fractions: the honest reference for the fit.
    true_tissue, true_mask, _ = synth.warp_template(template, np.random.default_rng(0))
    assert np.array_equal(true_mask, subject.mask)
    stats, data = {}, []
    for c in synth.CONTRASTS:
        z, stats[c] = zscore(subject.images[c], subject.mask)
        data.append(z)
    data = np.stack(data)
    model = tissue_model(data, subject.mask, raw_zero(stats, synth.CONTRASTS, None))
    return data, subject.mask, stats, model, true_tissue


def full(data: np.ndarray, imp) -> np.ndarray:
    """The whole implanted volume: ``data`` with the implant's box replaced."""
    out = data.copy()
    out[(slice(None), *imp.box)] = imp.values
    return out


def to_raw(x: np.ndarray, stats: dict, c: int) -> np.ndarray:
    s = stats[synth.CONTRASTS[c]]
    return x.astype(np.float64) * s["std"] + s["mean"]


# --------------------------------------------------------------------------------------------
# tissue model


def test_tissue_model_recovers_the_true_fractions(control):
    data, mask, _, model, true = control
    for k in ("csf", "gm", "wm"):
        assert model.tissue[k].shape == mask.shape
        assert np.all(model.tissue[k][~mask] == 0)
    total = sum(model.tissue[k] for k in ("csf", "gm", "wm"))
    np.testing.assert_allclose(total[mask], 1.0, atol=1e-9)
    # Pearson r (numpy.corrcoef) against the subject's own warped priors; observed about 0.94 (WM)
    # and 0.80 (GM) on this 4 mm subject: GMM posteriors are sharper than partial-volume fractions,
    # and GM, the middle class, takes most of that loss, hence its lower bound.
    r = {k: np.corrcoef(model.tissue[k][mask], true[k][mask])[0, 1] for k in ("csf", "gm", "wm")}
    assert r["wm"] > 0.85 and r["csf"] > 0.85 and r["gm"] > 0.7, r
    # class means in normalised units: nominal T1w CSF < GM < WM and FLAIR CSF < WM < GM (synth's table)
    assert model.means.shape == (2, 3)
    assert model.means[T1, 0] < model.means[T1, 1] < model.means[T1, 2]
    assert model.means[FLAIR, 0] < model.means[FLAIR, 2] < model.means[FLAIR, 1]
    # The least-squares model explains most of each image. Observed residual variance: T1w 0.04
    # (fitting the true fractions instead: 0.03); FLAIR 0.32 (true fractions: 0.08), because a
    # CSF/WM partial-volume voxel looks like GM on T1w but is dark on FLAIR, which a T1w-only
    # mixture cannot tell apart. Bounds with room above those values.
    for c, bound in ((T1, 0.1), (FLAIR, 0.5)):
        fit = sum(model.tissue[k] * model.means[c, i] for i, k in enumerate(("csf", "gm", "wm")))
        resid = data[c][mask] - fit[mask]
        assert resid.var() < bound * data[c][mask].var()


# --------------------------------------------------------------------------------------------
# raw zero


def test_raw_zero_zscore_is_where_a_raw_zero_lands():
    rng = np.random.default_rng(1)
    vol = rng.uniform(1.0, 3.0, (6, 7, 5)).astype(np.float32)
    mask = rng.random(vol.shape) < 0.7
    mask[2, 3, 1] = True
    vol[2, 3, 1] = 0.0  # a raw 0 inside the mask
    out, stats = zscore(vol, mask)
    np.testing.assert_allclose(raw_zero({"T1w": stats}, ["T1w"], None), [-stats["mean"] / stats["std"]], rtol=1e-12)
    for params in (None, {"method": "zscore", "within": "mask"}):
        np.testing.assert_allclose(raw_zero({"T1w": stats}, ["T1w"], params), [out[2, 3, 1]], rtol=1e-6)
    out2, stats2 = normalise_with(vol, mask, {"method": "zscore", "within": "mask"}, "T1w")
    np.testing.assert_allclose(raw_zero({"T1w": stats2}, ["T1w"], None), [out2[2, 3, 1]], rtol=1e-6)


def test_raw_zero_histogram_is_where_a_raw_zero_lands():
    rng = np.random.default_rng(2)
    shape = (6, 7, 5)
    mask = np.ones(shape, bool)
    controls = [rng.uniform(1.0, 3.0, shape) for _ in range(3)]
    standard = {c: learn_standard(np.array([landmarks(v, mask) for v in controls])) for c in ("T1w", "FLAIR")}
    params = histogram_params(standard, 3)  # the parameters prepare stores in a cache or card
    vols = {"T1w": rng.uniform(1.0, 3.0, shape).astype(np.float32),
            "FLAIR": rng.uniform(0.5, 2.0, shape).astype(np.float32)}
    stats, outs = {}, {}
    for c, v in vols.items():
        v[1, 2, 3] = 0.0  # below the lowest landmark: the extended first segment
        outs[c], stats[c] = normalise_with(v, mask, params, c)
    zero = raw_zero(stats, ["T1w", "FLAIR"], params)
    for i, c in enumerate(("T1w", "FLAIR")):
        own = np.asarray(stats[c]["landmarks"])
        expect = piecewise_map(np.zeros(1), own, standard[c])[0]
        np.testing.assert_allclose(zero[i], expect, rtol=1e-12)
        np.testing.assert_allclose(zero[i], outs[c][1, 2, 3], rtol=1e-6)
        np.testing.assert_allclose(zero[i], histogram(vols[c], mask, own, standard[c])[1, 2, 3], rtol=1e-6)


# --------------------------------------------------------------------------------------------
# implants


def test_intensity_lesion_multiplies_the_raw_flair_signal(control):
    data, mask, stats, model, _ = control
    before = data.copy()
    lesion = plan_lesion(model, mask, "intensity", radius_mm=8, level=0.2, voxel_mm=VOXEL_MM,
                         rng=np.random.default_rng(1))
    assert lesion.kind == "flair" and lesion.flair_gain == 0.2 and lesion.radius_vox == 8 / VOXEL_MM
    assert lesion.blur_sigma_vox == 0 and lesion.thickening_vox == 0
    imp = implant(data, mask, model, lesion, flair_channel=FLAIR)
    assert np.array_equal(data, before)  # the input is not modified
    assert imp.values.dtype == np.float32
    assert imp.values.shape == (2, *(s.stop - s.start for s in imp.box))
    new = full(data, imp)
    assert np.array_equal(new[T1], data[T1])
    assert np.array_equal(new[:, ~mask], data[:, ~mask])
    # The definition (synth module docstring): FLAIR x (1 + a w), w the raised-cosine weight.
    # Checked over the whole grid, so a change missing from the box would fail here.
    w = synth.lesion_weight(mask.shape, lesion.centre_vox, lesion.radius_vox)
    raw_before, raw_after = to_raw(data[FLAIR], stats, FLAIR), to_raw(new[FLAIR], stats, FLAIR)
    np.testing.assert_allclose(raw_after[mask], (raw_before * (1 + 0.2 * w))[mask], rtol=1e-4)
    assert np.any(raw_after[mask] > raw_before[mask] * 1.19)  # the flat core really rose by 20 %
    _, _, truth = synth.inject_lesion(model.tissue, np.ones(mask.shape), mask, lesion)
    assert np.array_equal(imp.lesion, truth) and imp.lesion[lesion.centre_vox]
    assert imp.record["kind"] == "intensity" and imp.record["n_voxels"] == int(truth.sum())
    assert tuple(imp.record["centre_vox"]) == lesion.centre_vox


def expected_by_model(data, mask, model, lesion):
    """The module docstring's formula with no FLAIR gain, over the whole grid: image + model' - model."""
    new_tissue, _, _ = synth.inject_lesion(model.tissue, np.ones(mask.shape), mask, lesion)
    out = data.astype(np.float64)
    for c in range(data.shape[0]):
        delta = sum((new_tissue[k] - model.tissue[k]) * model.means[c, i] for i, k in enumerate(("csf", "gm", "wm")))
        out[c] = np.where(mask, out[c] + delta, out[c])
    return out


def test_texture_lesion_changes_pattern_not_mean(control):
    data, mask, _, model, _ = control
    lesion = plan_lesion(model, mask, "texture", radius_mm=12, level=6, voxel_mm=VOXEL_MM,
                         rng=np.random.default_rng(0))
    assert lesion.kind == "blurring" and lesion.blur_sigma_vox == 6 / VOXEL_MM and lesion.flair_gain == 0
    imp = implant(data, mask, model, lesion, flair_channel=FLAIR)
    new = full(data, imp)
    np.testing.assert_allclose(new, expected_by_model(data, mask, model, lesion), atol=1e-5)
    assert np.array_equal(new[:, ~mask], data[:, ~mask])
    inside = np.zeros(mask.shape, bool)
    inside[imp.box] = True
    assert np.array_equal(new[:, ~inside], data[:, ~inside])
    d = (new - data)[:, inside & mask]
    for c in (T1, FLAIR):
        assert np.abs(d[c]).mean() > 0.05  # both channels really change
        # Blurring moves tissue fractions across the grey-white boundary, up on one side and down
        # on the other, so the changes mostly cancel; not exactly (a curved boundary, the mask
        # edge, the weight), observed ratio <= 0.28 over 6 seeds at this radius. A shift, by
        # contrast, has ratio 1. Loose bound.
        assert abs(d[c].mean()) < 0.5 * np.abs(d[c]).mean()


def test_geometry_lesion_turns_wm_into_gm(control):
    data, mask, _, model, _ = control
    lesion = plan_lesion(model, mask, "geometry", radius_mm=12, level=4, voxel_mm=VOXEL_MM,
                         rng=np.random.default_rng(0))
    assert lesion.kind == "thickening" and lesion.thickening_vox == 1.0
    imp = implant(data, mask, model, lesion, flair_channel=FLAIR)
    new = full(data, imp)
    np.testing.assert_allclose(new, expected_by_model(data, mask, model, lesion), atol=1e-5)
    inside = np.zeros(mask.shape, bool)
    inside[imp.box] = True
    assert np.array_equal(new[:, ~(inside & mask)], data[:, ~(inside & mask)])
    d = new - data
    # GM replaces WM, and nominally T1w GM < WM while FLAIR GM > WM (synth.NOMINAL_INTENSITY):
    # every voxel's T1w goes down or stays, its FLAIR up or stays, and clearly so in the lesion.
    assert np.all(d[T1] <= 0) and np.all(d[FLAIR] >= 0)
    assert d[T1][imp.lesion].mean() < -0.1 and d[FLAIR][imp.lesion].mean() > 0.1


def test_mixed_lesion_is_texture_plus_rise(control):
    data, mask, stats, model, _ = control
    level = 6.0
    mixed = plan_lesion(model, mask, "mixed", radius_mm=12, level=level, voxel_mm=VOXEL_MM, rng=np.random.default_rng(3))
    texture = plan_lesion(model, mask, "texture", radius_mm=12, level=level, voxel_mm=VOXEL_MM,
                          rng=np.random.default_rng(3))
    assert mixed.kind == "mixed" and mixed.flair_gain == pytest.approx(MIXED_RISE_PER_MM * level)
    assert texture == dataclasses.replace(mixed, kind="blurring", flair_gain=0.0)  # same site, same blur
    new_m = full(data, implant(data, mask, model, mixed, flair_channel=FLAIR))
    new_t = full(data, implant(data, mask, model, texture, flair_channel=FLAIR))
    assert np.array_equal(new_m[T1], new_t[T1])
    w = synth.lesion_weight(mask.shape, mixed.centre_vox, mixed.radius_vox)
    raw_m, raw_t = to_raw(new_m[FLAIR], stats, FLAIR), to_raw(new_t[FLAIR], stats, FLAIR)
    np.testing.assert_allclose(raw_m[mask], (raw_t * (1 + mixed.flair_gain * w))[mask], rtol=1e-4)
    assert np.array_equal(new_m[:, ~mask], data[:, ~mask])


# --------------------------------------------------------------------------------------------
# errors


def test_unknown_kind(control):
    _, mask, _, model, _ = control
    with pytest.raises(InputError, match="lesion kind 'bogus' is unknown; use one of intensity"):
        plan_lesion(model, mask, "bogus", 8, 0.2, VOXEL_MM, np.random.default_rng(0))


def test_intensity_lesion_needs_a_flair_channel(control):
    data, mask, _, model, _ = control
    for kind, level in (("intensity", 0.2), ("mixed", 4.0)):
        lesion = plan_lesion(model, mask, kind, 8, level, VOXEL_MM, np.random.default_rng(0))
        with pytest.raises(InputError, match="no FLAIR-like contrast"):
            implant(data, mask, model, lesion, flair_channel=None)
    lesion = plan_lesion(model, mask, "texture", 8, 4.0, VOXEL_MM, np.random.default_rng(0))
    assert implant(data, mask, model, lesion, flair_channel=None).values.shape[0] == 2  # allowed without one


def test_tissue_model_bad_input():
    rng = np.random.default_rng(0)
    data = rng.normal(size=(2, 6, 6, 6))
    mask = np.ones((6, 6, 6), bool)
    with pytest.raises(InputError, match=r"data \(6, 6, 6\) and mask .* must be \(C, X, Y, Z\)"):
        tissue_model(data[0], mask, [0.0])
    with pytest.raises(InputError, match=r"data \(2, 6, 6, 6\) and mask \(6, 6, 5\)"):
        tissue_model(data, mask[:, :, :5], [0.0, 0.0])
    for channel in (2, -1):
        with pytest.raises(InputError, match=f"tissue channel {channel} is not one of the 2 contrasts"):
            tissue_model(data, mask, [0.0, 0.0], tissue_channel=channel)
    tiny = np.zeros_like(mask)
    tiny[:2, :2, :2] = True
    with pytest.raises(InputError, match="the brain mask holds 8 voxels; a tissue model needs at least 30"):
        tissue_model(data, tiny, [0.0, 0.0])
    with pytest.raises(InputError, match=r"zero must hold one value per contrast \(2\), got 1"):
        tissue_model(data, mask, 0.0)


def test_plan_lesion_without_room(control):
    _, mask, _, model, _ = control
    with pytest.raises(InputError, match="no room for an intensity lesion of radius 400 mm"):
        plan_lesion(model, mask, "intensity", 400, 0.2, VOXEL_MM, np.random.default_rng(0))

"""Tests of embed.features: per-voxel feature sets, their reach, and crop-based region features."""

import numpy as np
import pytest

import embed
from embed.bundle import load_encoder, write_bundle
from embed.dense import Encoder
from embed.features import (
    baseline_sets, encoder_reach, encoder_sets, intensity_features, region_features, texture_features,
)
from embed.model import build

SHAPE = (11, 12, 10)
C, P, CHANNELS, DIM = 2, 5, (4, 6), 3


def volume_and_mask(seed: int = 0):
    """(C, X, Y, Z) float32 with nonzero values outside the mask too (so a crop that dropped them
    would show), and a random mask holding every grid corner."""
    rng = np.random.default_rng(seed)
    vol = rng.normal(size=(C, *SHAPE)).astype(np.float32)
    mask = rng.random(SHAPE) < 0.6
    mask[tuple(np.array([[0, 0, 0], [-1, -1, -1], [0, -1, 0], [-1, 0, -1]]).T)] = True
    return vol, mask


def make_bundle(tmp_path, axis: int, p: int = P, seed: int = 0) -> Encoder:
    """A tiny random encoder written as a bundle and loaded back (as tests/test_bundle.py does)."""
    module = build(C, p, CHANNELS, DIM, seed).encoder
    plane = ("sagittal", "coronal", "axial")[axis]
    card = {"contrasts": ["T1w", "FLAIR"], "normalisation": {"method": "zscore", "within": "mask"},
            "patch": {"size": p, "plane": plane, "axis": axis, "padding": "zeros"},
            "architecture": {"kind": "valid-conv-encoder", "in_channels": C, "patch_size": p,
                             "channels": list(CHANNELS), "dim": DIM},
            "twinpatch_version": embed.__version__}
    return load_encoder(write_bundle(tmp_path / f"enc{axis}_{p}.safetensors", module.state_dict(), card))


# --------------------------------------------------------------------------------------------
# whole-volume features


def test_intensity_features_are_the_mask_voxels_in_argwhere_order():
    vol, mask = volume_and_mask()
    out = intensity_features(vol, mask)
    assert out.dtype == np.float32 and out.shape == (int(mask.sum()), C)
    idx = np.argwhere(mask)
    np.testing.assert_array_equal(out, vol[:, idx[:, 0], idx[:, 1], idx[:, 2]].T)
    np.testing.assert_array_equal(out, vol[:, mask].T)


def test_texture_features_against_brute_force():
    vol, mask = volume_and_mask(1)
    out = texture_features(vol, mask)
    assert out.dtype == np.float32 and out.shape == (int(mask.sum()), 3 * C)
    for c in range(C):
        v = vol[c].astype(np.float64)
        # local sd: numpy std (ddof=0) of each voxel's 3x3x3 window, zeros outside the grid
        windows = np.lib.stride_tricks.sliding_window_view(np.pad(v, 1), (3, 3, 3))
        sd = windows.std(axis=(-3, -2, -1))
        # gradient magnitude: numpy.gradient (central differences, one-sided at the edges)
        grad = np.sqrt(np.sum(np.square(np.gradient(v)), axis=0))
        np.testing.assert_array_equal(out[:, 3 * c], vol[c][mask])
        np.testing.assert_allclose(out[:, 3 * c + 1], sd[mask], rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(out[:, 3 * c + 2], grad[mask], rtol=1e-5, atol=1e-6)


def test_encoder_reach_and_sets(tmp_path):
    for p in (5, 7):
        for axis in range(3):
            enc = make_bundle(tmp_path, axis, p)
            reach = encoder_reach(enc)
            assert reach[axis] == 0
            assert [r for a, r in enumerate(reach) if a != axis] == [p // 2, p // 2]
    enc = make_bundle(tmp_path, 1)
    sets = encoder_sets("tiny", enc)
    assert [(s.name, s.family, s.dim, s.reach) for s in sets] == [
        ("tiny", "encoder", DIM, (P // 2, 0, P // 2)), ("tiny+intensities", "encoder", DIM + C, (P // 2, 0, P // 2))]
    vol, mask = volume_and_mask(2)
    emb, both = (s.compute(vol, mask) for s in sets)
    assert emb.shape == (int(mask.sum()), DIM) and both.shape == (int(mask.sum()), DIM + C)
    # embed_volume (the dense path, itself checked against per-patch embedding in test_dense.py)
    np.testing.assert_allclose(emb, enc.embed_volume(vol, mask)[:, mask].T, atol=1e-6)
    np.testing.assert_array_equal(both[:, :DIM], emb)
    np.testing.assert_array_equal(both[:, DIM:], vol[:, mask].T)


def test_baseline_sets():
    sets = baseline_sets(3)
    assert [(s.name, s.family, s.dim, s.reach) for s in sets] == [
        ("intensities", "baseline", 3, (0, 0, 0)), ("texture", "baseline", 9, (1, 1, 1))]


# --------------------------------------------------------------------------------------------
# region features


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """(feature sets: the baselines and two encoders with different patch planes, volume, mask,
    {set name: whole-volume features}); computed once, the encoder sets cost ~0.1 s a call."""
    tmp = tmp_path_factory.mktemp("enc")
    sets = baseline_sets(C) + encoder_sets("ax", make_bundle(tmp, 2)) + encoder_sets("sag", make_bundle(tmp, 0))
    vol, mask = volume_and_mask(3)
    return sets, vol, mask, {fs.name: fs.compute(vol, mask) for fs in sets}


BOXES = {
    "middle": (slice(4, 6), slice(5, 8), slice(4, 5)),
    "edges": (slice(0, 2), slice(9, 12), slice(3, 6)),  # touches x = 0 and the far y face
    "corner": (slice(9, 11), slice(0, 1), slice(8, 10)),  # touches three faces
}


def within_reach(box, reach) -> np.ndarray:
    """(X, Y, Z) bool: voxels at most ``reach[a]`` voxels from the box along every axis a."""
    idx = np.indices(SHAPE)
    ok = np.ones(SHAPE, bool)
    for a, (b, r) in enumerate(zip(box, reach)):
        dist = np.maximum(0, np.maximum(b.start - idx[a], idx[a] - (b.stop - 1)))
        ok &= dist <= r
    return ok


@pytest.mark.parametrize("where", sorted(BOXES))
def test_region_features_equal_the_whole_volume_features(base, where):
    sets, vol, mask, wholes = base
    box = BOXES[where]
    order = np.full(SHAPE, -1)
    order[mask] = np.arange(int(mask.sum()))
    for fs in sets:
        whole = wholes[fs.name]
        voxels, feats = region_features(fs, vol, mask, box)
        expect = np.argwhere(mask & within_reach(box, fs.reach))
        assert voxels.shape[1] == 3 and len(voxels) > 0
        np.testing.assert_array_equal(voxels, expect, err_msg=fs.name)
        assert feats.dtype == np.float32 and feats.shape == (len(voxels), fs.dim)
        np.testing.assert_allclose(feats, whole[order[tuple(voxels.T)]], atol=1e-5, err_msg=fs.name)


@pytest.mark.parametrize("where", sorted(BOXES))
def test_a_change_inside_the_box_alters_only_voxels_within_reach(base, where):
    # The reach a set declares must cover every voxel whose features can change (otherwise the
    # bench would miss some); with random weights and a random change, a real dependency shows.
    # region_features returns exactly the mask voxels within reach (test above). The
    # "+intensities" sets are skipped: embedding and intensities, each checked on its own.
    sets, vol, mask, wholes = base
    box = BOXES[where]
    changed = vol.copy()
    changed[(slice(None), *box)] += np.random.default_rng(5).normal(size=changed[(slice(None), *box)].shape)
    for fs in sets:
        if fs.name.endswith("+intensities"):
            continue
        differs = np.zeros(SHAPE, bool)
        differs[mask] = np.any(fs.compute(changed, mask) != wholes[fs.name], axis=1)
        assert differs.any() and not np.any(differs & ~within_reach(box, fs.reach)), fs.name
        if fs.name != "intensities":  # the reach is not larger than needed: its rim changes too
            rim = mask & within_reach(box, fs.reach) & ~within_reach(box, tuple(max(r - 1, 0) for r in fs.reach))
            assert differs[rim].any(), fs.name


def test_block_scales_give_each_part_unit_total_variance():
    """A concatenation's blocks weigh the same: after scaling, each block's total variance is 1."""
    from embed.features import FeatureSet, block_scales

    def part(name, dim):
        return FeatureSet(name, "baseline", "", dim, (0, 0, 0), lambda v, m: None)

    rng = np.random.default_rng(0)
    fit = np.concatenate([5 * rng.standard_normal((4, 30, 6)), 0.1 * rng.standard_normal((4, 30, 2))], axis=-1)
    cat = FeatureSet("a+b", "encoder", "", 8, (0, 0, 0), lambda v, m: None, parts=(part("a", 6), part("b", 2)))
    scaled = fit * block_scales(cat, fit)
    for block in (scaled[..., :6], scaled[..., 6:]):
        assert block.reshape(-1, block.shape[-1]).var(axis=0).sum() == pytest.approx(1.0, rel=1e-5)

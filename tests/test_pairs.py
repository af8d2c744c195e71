"""Tests of embed.pairs: patch gathering with zero padding, pair sampling, control split, fit check."""

import itertools
import re

import numpy as np
import pytest

from embed.errors import ConfigError
from embed.pairs import Pairs, check_patch_fits, gather_patches, sample_pairs, split_controls

GRID = (9, 11, 8)


def naive_patch(data: np.ndarray, subject: int, centre, p: int, axis: int) -> np.ndarray:
    """Reference: zero-pad the two in-plane axes with np.pad, then slice a p x p window.

    ``data: (S, C, X, Y, Z)`` -> ``(C, p, p)``; rows follow the lower in-plane axis.
    """
    h = p // 2
    vol = data[subject]
    pad = [(0, 0)] + [(0, 0) if i == axis else (h, h) for i in range(3)]
    padded = np.pad(vol, pad)  # zeros outside the grid
    # In padded coordinates, the window of centre c on an in-plane axis starts at (c + h) - h = c.
    index = [slice(None)] + [centre[i] if i == axis else slice(centre[i], centre[i] + p) for i in range(3)]
    return padded[tuple(index)]


def random_data(rng, s=4, c=2, grid=GRID) -> np.ndarray:
    return rng.normal(size=(s, c) + grid).astype(np.float32)


def border_and_random_centres(rng, grid=GRID, n_random=20) -> np.ndarray:
    """Every corner, a voxel on each face, and random voxels: (N, 3) int64."""
    corners = list(itertools.product(*[(0, g - 1) for g in grid]))
    faces = []
    for i in range(3):
        for v in (0, 1, grid[i] - 2, grid[i] - 1):
            c = [g // 2 for g in grid]
            c[i] = v
            faces.append(tuple(c))
    rand = [tuple(rng.integers(0, g) for g in grid) for _ in range(n_random)]
    return np.array(corners + faces + rand, dtype=np.int64)


@pytest.mark.parametrize("axis", [0, 1, 2])
@pytest.mark.parametrize("p", [1, 3, 5, 7])
def test_gather_patches_matches_naive_pad_and_slice(axis, p):
    rng = np.random.default_rng(axis * 10 + p)
    data = random_data(rng)
    centres = border_and_random_centres(rng)
    subjects = rng.integers(0, data.shape[0], size=len(centres))
    got = gather_patches(data, subjects, centres, p, axis)
    assert got.shape == (len(centres), data.shape[1], p, p)
    assert got.dtype == np.float32 and got.flags.c_contiguous
    want = np.stack([naive_patch(data, s, c, p, axis) for s, c in zip(subjects, centres)])
    np.testing.assert_array_equal(got, want)


def test_patch_larger_than_grid_is_zero_padded():
    # A 9 x 9 patch on a 4 x 5 plane: everything outside the grid reads as zero.
    rng = np.random.default_rng(0)
    data = rng.uniform(1, 2, size=(1, 1, 4, 5, 3)).astype(np.float32)
    centres = np.array([[0, 0, 1], [3, 4, 2], [2, 2, 0]])
    got = gather_patches(data, np.zeros(3, np.int64), centres, 9, axis=2)
    want = np.stack([naive_patch(data, 0, c, 9, 2) for c in centres])
    np.testing.assert_array_equal(got, want)
    # centre (0, 0): patch rows 4..7 are x = 0..3, columns 4..8 are y = 0..4; the rest is outside.
    inside = np.zeros((9, 9), bool)
    inside[4:8, 4:9] = True
    assert (got[0, 0][inside] > 0).all() and (got[0, 0][~inside] == 0).all()


def test_corner_patch_by_hand():
    # One channel, axis 2 held fixed, centre at voxel (0, 0, z): first row and column are padding.
    data = np.arange(1, 1 + 4 * 4 * 2, dtype=np.float32).reshape(1, 1, 4, 4, 2)
    got = gather_patches(data, np.array([0]), np.array([[0, 0, 1]]), 3, axis=2)[0, 0]
    want = np.array([[0, 0, 0],
                     [0, data[0, 0, 0, 0, 1], data[0, 0, 0, 1, 1]],
                     [0, data[0, 0, 1, 0, 1], data[0, 0, 1, 1, 1]]], dtype=np.float32)
    np.testing.assert_array_equal(got, want)


# --------------------------------------------------------------------------------------------
# sample_pairs


def mask_voxels(rng, grid=GRID) -> np.ndarray:
    mask = rng.random(grid) < 0.3
    return np.argwhere(mask)


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_sample_pairs_properties(axis):
    rng = np.random.default_rng(1)
    data = random_data(rng, s=7)
    pool = np.array([0, 2, 3, 6])
    voxels = mask_voxels(rng)
    pairs = sample_pairs(data, pool, voxels, 600, 5, axis, np.random.default_rng(42))
    assert isinstance(pairs, Pairs)
    assert pairs.a.shape == pairs.b.shape == (600, 2, 5, 5)
    assert pairs.a.dtype == pairs.b.dtype == np.float32
    assert pairs.centres.shape == (600, 3)
    # subjects always differ and come from the pool
    assert (pairs.subject_a != pairs.subject_b).all()
    assert set(pairs.subject_a) <= set(pool) and set(pairs.subject_b) <= set(pool)
    # every ordered pair of pool subjects shows up (uniform draw; 600 draws over 12 ordered pairs)
    assert set(zip(pairs.subject_a.tolist(), pairs.subject_b.tolist())) == set(itertools.permutations(pool.tolist(), 2))
    # centres come from the given voxels
    allowed = set(map(tuple, voxels.tolist()))
    assert all(tuple(c) in allowed for c in pairs.centres.tolist())
    # patches are the co-located patches of the two subjects
    np.testing.assert_array_equal(pairs.a, gather_patches(data, pairs.subject_a, pairs.centres, 5, axis))
    np.testing.assert_array_equal(pairs.b, gather_patches(data, pairs.subject_b, pairs.centres, 5, axis))


def test_sample_pairs_pool_of_two_always_swaps():
    rng = np.random.default_rng(2)
    data = random_data(rng, s=5)
    pairs = sample_pairs(data, np.array([1, 4]), mask_voxels(rng), 200, 3, 2, np.random.default_rng(0))
    assert (np.sort(np.stack([pairs.subject_a, pairs.subject_b], axis=1), axis=1) == [1, 4]).all()


def test_sample_pairs_deterministic_for_a_seed():
    rng = np.random.default_rng(3)
    data, voxels, pool = random_data(rng), mask_voxels(rng), np.arange(4)
    p1 = sample_pairs(data, pool, voxels, 50, 3, 1, np.random.default_rng(7))
    p2 = sample_pairs(data, pool, voxels, 50, 3, 1, np.random.default_rng(7))
    p3 = sample_pairs(data, pool, voxels, 50, 3, 1, np.random.default_rng(8))
    for f in ("a", "b", "centres", "subject_a", "subject_b"):
        np.testing.assert_array_equal(getattr(p1, f), getattr(p2, f))
    assert not np.array_equal(p1.centres, p3.centres)


# --------------------------------------------------------------------------------------------
# split_controls


@pytest.mark.parametrize("n_val", [2, 3, 5])
def test_split_controls_disjoint_and_covering(n_val):
    controls = np.array([0, 2, 3, 5, 7, 8, 9])
    train, val = split_controls(controls, n_val, np.random.default_rng(0))
    assert len(val) == n_val and len(train) == len(controls) - n_val
    assert set(train).isdisjoint(val)
    assert sorted(set(train) | set(val)) == controls.tolist()
    assert (np.diff(train) > 0).all() and (np.diff(val) > 0).all()  # sorted index arrays
    t2, v2 = split_controls(controls, n_val, np.random.default_rng(0))
    np.testing.assert_array_equal(train, t2)
    np.testing.assert_array_equal(val, v2)


def test_split_controls_depends_on_the_generator():
    controls = np.arange(20)
    vals = {tuple(split_controls(controls, 4, np.random.default_rng(s))[1]) for s in range(5)}
    assert len(vals) > 1


@pytest.mark.parametrize("n_controls, n_val, hint", [
    (7, 1, "between 2 and 5"),
    (7, 6, "between 2 and 5"),
    (7, 0, "between 2 and 5"),
    (3, 2, "between 2 and 1"),
])
def test_split_controls_errors(n_controls, n_val, hint):
    match = (rf"cohort\.val_controls={n_val} with {n_controls} controls: training and validation each need "
             rf"at least 2 controls; set cohort\.val_controls {hint} or add controls")
    with pytest.raises(ConfigError, match=match) as exc:
        split_controls(np.arange(n_controls), n_val, np.random.default_rng(0))
    assert "\n" not in str(exc.value)


# --------------------------------------------------------------------------------------------
# check_patch_fits


@pytest.mark.parametrize("axis, p", [(2, 9), (0, 7), (1, 5), (2, 3)])
def test_check_patch_fits_accepts(axis, p):
    check_patch_fits(GRID, p, axis)  # no error


@pytest.mark.parametrize("axis, p, inplane", [(2, 11, "[9, 11]"), (0, 9, "[11, 8]"), (1, 9, "[9, 8]")])
def test_check_patch_fits_rejects(axis, p, inplane):
    match = (rf"patch\.size={p} is larger than the grid's in-plane extent {re.escape(inplane)} "
             r"\(grid \(9, 11, 8\)\); choose a smaller patch\.size")
    with pytest.raises(ConfigError, match=match) as exc:
        check_patch_fits(GRID, p, axis)
    assert "larger than the grid" in str(exc.value) and "\n" not in str(exc.value)


# --------------------------------------------------------------------------------------------
# the sliding-window gather and the retrieval set


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_window_gather_equals_index_gather_inside_and_at_the_border(axis):
    from embed.pairs import _gather_padded

    rng = np.random.default_rng(20 + axis)
    data = random_data(rng, s=3, c=2, grid=(12, 13, 11))
    centres = np.concatenate([border_and_random_centres(rng, grid=(12, 13, 11), n_random=60)])
    subjects = rng.integers(0, 3, size=len(centres))
    got = gather_patches(data, subjects, centres, 5, axis)
    np.testing.assert_array_equal(got, _gather_padded(data, subjects, centres, 5, axis))
    want = np.stack([naive_patch(data, s, c, 5, axis) for s, c in zip(subjects, centres)])
    np.testing.assert_array_equal(got, want)


def test_retrieval_set():
    from embed.pairs import sample_retrieval

    rng = np.random.default_rng(5)
    data = random_data(rng, s=4, grid=(9, 10, 8))
    voxels = np.argwhere(np.ones((9, 10, 8), bool))
    ret = sample_retrieval(data, 1, 3, voxels, 30, 3, 2, np.random.default_rng(0))
    assert ret.query.shape == (30, 2, 3, 3) and ret.candidates.shape == (30, 27, 2, 3, 3)
    assert ret.true_index == 13  # the centre of the 3 x 3 x 3 cube, in C order
    assert len({tuple(c) for c in ret.centres.tolist()}) == 30  # drawn without replacement
    assert ((ret.centres >= 1) & (ret.centres < np.array([8, 9, 7]))).all()  # whole cube inside the grid
    np.testing.assert_array_equal(ret.query, gather_patches(data, np.full(30, 1), ret.centres, 3, 2))
    np.testing.assert_array_equal(ret.candidates[:, ret.true_index], gather_patches(data, np.full(30, 3), ret.centres, 3, 2))
    # candidate 0 sits at offset (-1, -1, -1)
    np.testing.assert_array_equal(ret.candidates[:, 0], gather_patches(data, np.full(30, 3), ret.centres - 1, 3, 2))

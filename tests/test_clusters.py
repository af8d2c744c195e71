"""Thresholds, connected components (checked against scipy.ndimage.label and our own flood fill),
ranking, the clusters table in voxel and world coordinates (nibabel), and clusters.csv."""

from __future__ import annotations

import csv
import itertools
from collections import deque

import numpy as np
import pytest
from nibabel.affines import apply_affine, from_matvec
from scipy import ndimage

from embed.clusters import CLUSTER_COLUMNS, find_clusters, threshold, write_clusters_csv
from embed.errors import ConfigError, InputError

AFFINE = from_matvec(np.array([[-2.0, 0.1, 0.0], [0.0, 2.5, 0.3], [0.2, 0.0, 3.0]]), [90.0, -126.0, -72.0])


def _flood_labels(binary, connectivity):
    """Independent reference: breadth-first flood fill with explicit neighbour offsets
    (6 = share a face, 18 = a face or an edge, 26 = a face, edge or corner; common practice, no source)."""
    max_nonzero = {6: 1, 18: 2, 26: 3}[connectivity]
    offsets = [o for o in itertools.product((-1, 0, 1), repeat=3) if 0 < sum(map(abs, o)) <= max_nonzero]
    labels = np.zeros(binary.shape, int)
    n = 0
    for start in zip(*np.nonzero(binary)):
        if labels[start]:
            continue
        n += 1
        labels[start] = n
        queue = deque([start])
        while queue:
            p = queue.popleft()
            for o in offsets:
                q = tuple(p[d] + o[d] for d in range(3))
                if all(0 <= q[d] < binary.shape[d] for d in range(3)) and binary[q] and not labels[q]:
                    labels[q] = n
                    queue.append(q)
    return labels, n


def _partition(labels):
    """Components as a set of frozensets of flat indices (label numbers ignored)."""
    flat = labels.ravel()
    return {frozenset(np.flatnonzero(flat == c)) for c in np.unique(flat[flat > 0])}


@pytest.mark.parametrize("connectivity", [6, 18, 26])
def test_components_match_scipy_and_flood_fill(connectivity):
    rng = np.random.default_rng(connectivity)
    for trial in range(4):
        binary = rng.random((9, 8, 7)) < 0.3
        scores = rng.normal(size=binary.shape) + 3
        labels, table = find_clusters(binary, scores, AFFINE, connectivity=connectivity, top_k=None)
        ref, n_ref = ndimage.label(binary, ndimage.generate_binary_structure(3, {6: 1, 18: 2, 26: 3}[connectivity]))
        flood, n_flood = _flood_labels(binary, connectivity)
        assert len(table) == n_ref == n_flood  # scipy.ndimage.label and our flood fill agree on the count
        assert _partition(labels) == _partition(ref) == _partition(flood)  # and on membership
        assert labels.dtype == np.int32 and set(np.unique(labels)) == set(range(len(table) + 1))


def test_table_values_ranking_and_world_coordinates():
    rng = np.random.default_rng(1)
    binary = rng.random((10, 9, 8)) < 0.35
    scores = rng.gamma(2.0, 1.5, size=binary.shape)
    labels, table = find_clusters(binary, scores, AFFINE, connectivity=18, top_k=None)
    voxel_mm3 = abs(np.linalg.det(AFFINE[:3, :3]))  # NIfTI-1: the affine maps voxel indices to mm
    masses = []
    for row in table:
        members = np.argwhere(labels == row["rank"])  # C order
        vals = scores[labels == row["rank"]]
        assert row["size_voxels"] == len(members)
        assert row["size_mm3"] == pytest.approx(len(members) * voxel_mm3)
        assert row["mean_score"] == pytest.approx(vals.mean())
        assert row["peak_score"] == vals.max()
        peak = members[np.argmax(vals)]  # first in C order among equal peaks
        assert (row["peak_i"], row["peak_j"], row["peak_k"]) == tuple(peak)
        cen = members.mean(0)
        assert [row["centroid_i"], row["centroid_j"], row["centroid_k"]] == pytest.approx(cen)
        # world mm: affine @ [i, j, k, 1] by hand, and nibabel.affines.apply_affine
        np.testing.assert_allclose([row["peak_x_mm"], row["peak_y_mm"], row["peak_z_mm"]],
                                   (AFFINE @ np.append(peak, 1.0))[:3])
        np.testing.assert_allclose([row["centroid_x_mm"], row["centroid_y_mm"], row["centroid_z_mm"]],
                                   apply_affine(AFFINE, cen))
        masses.append(row["mean_score"] * row["size_mm3"])
    assert masses == sorted(masses, reverse=True)  # ranked by mass = mean score x size in mm3
    assert [r["rank"] for r in table] == list(range(1, len(table) + 1))
    assert set(table[0]) == set(CLUSTER_COLUMNS)


def test_min_size_top_k_and_tie_breaks():
    binary = np.zeros((12, 12, 12), bool)
    scores = np.zeros(binary.shape)
    binary[1:3, 1:3, 1:3] = True  # 8 voxels, score 2 -> mass 16 * 8 mm3
    scores[1:3, 1:3, 1:3] = 2.0
    binary[6, 6, 6] = True  # 1 voxel, score 10 -> mass 10 * 8
    scores[6, 6, 6] = 10.0
    binary[9:11, 9, 9] = True  # 2 voxels, score 5 -> mass 10 * 8: tie with the single voxel ...
    scores[9:11, 9, 9] = 5.0
    binary[0, 11, 0] = True  # 1 voxel, score 1
    scores[0, 11, 0] = 1.0
    affine = np.diag([2.0, 2.0, 2.0, 1.0])  # 8 mm3 voxels
    _, table = find_clusters(binary, scores, affine, top_k=None)
    # ... broken by the higher peak
    assert [(r["size_voxels"], r["peak_score"]) for r in table] == [(8, 2.0), (1, 10.0), (2, 5.0), (1, 1.0)]
    labels, table = find_clusters(binary, scores, affine, min_size_mm3=16.0, top_k=None)
    assert [r["size_voxels"] for r in table] == [8, 2]
    assert labels[6, 6, 6] == 0 and labels[9, 9, 9] == 2 and labels[1, 1, 1] == 1
    labels, table = find_clusters(binary, scores, affine, top_k=2)
    assert len(table) == 2 and labels.max() == 2 and labels[9, 9, 9] == 0
    labels, table = find_clusters(np.zeros((3, 3, 3), bool), np.zeros((3, 3, 3)), affine)
    assert table == [] and not labels.any()


def test_threshold_value_and_top_fraction():
    rng = np.random.default_rng(2)
    scores = rng.normal(size=(6, 7, 8))
    mask = rng.random(scores.shape) < 0.7
    scores[0, 0, 0] = np.nan
    mask[0, 0, 0] = True
    hit = threshold(scores, mask, value=1.0)
    np.testing.assert_array_equal(hit, mask & (np.nan_to_num(scores, nan=-np.inf) >= 1.0))
    top = threshold(scores, mask, top_fraction=0.1)
    n_keep = int(np.ceil(0.1 * mask.sum()))
    assert top.sum() == n_keep and not (top & ~mask).any() and not top[0, 0, 0]
    assert np.nanmin(scores[top]) >= np.nanmax(scores[mask & ~top])
    assert threshold(scores, mask, top_fraction=1.0).sum() == mask.sum() - 1  # NaN never kept
    flat = np.ones((2, 2, 2))  # ties with the last kept voxel are kept
    assert threshold(flat, np.ones((2, 2, 2), bool), top_fraction=0.2).all()


def test_threshold_and_cluster_errors():
    s, m = np.zeros((3, 3, 3)), np.ones((3, 3, 3), bool)
    with pytest.raises(ConfigError, match="give exactly one of value= or top_fraction="):
        threshold(s, m)
    with pytest.raises(ConfigError, match="give exactly one of value= or top_fraction="):
        threshold(s, m, value=1.0, top_fraction=0.1)
    with pytest.raises(ConfigError, match=r"top_fraction must be in \(0, 1\], got 1.5"):
        threshold(s, m, top_fraction=1.5)
    with pytest.raises(ConfigError, match="value must be a finite number"):
        threshold(s, m, value=np.nan)
    with pytest.raises(InputError, match="mask must be a boolean array"):
        threshold(s, m.astype(np.uint8), value=0.0)
    with pytest.raises(InputError, match="must be the same 3-D grid"):
        threshold(s, m[:2], value=0.0)
    with pytest.raises(ConfigError, match="connectivity must be 6, 18 or 26, got 8"):
        find_clusters(m, s, np.eye(4), connectivity=8)
    with pytest.raises(ConfigError, match="min_size_mm3 must be a number >= 0"):
        find_clusters(m, s, np.eye(4), min_size_mm3=-1)
    with pytest.raises(ConfigError, match="top_k must be an integer >= 1 or None, got 0"):
        find_clusters(m, s, np.eye(4), top_k=0)
    with pytest.raises(InputError, match="binary map must be boolean"):
        find_clusters(s, s, np.eye(4))
    with pytest.raises(InputError, match="must be the same 3-D grid"):
        find_clusters(m, s[:, :2], np.eye(4))
    with pytest.raises(InputError, match=r"affine must be a finite 4x4 array .* got shape \(3, 3\)"):
        find_clusters(m, s, np.eye(3))
    with pytest.raises(InputError, match="singular 3x3 part"):
        find_clusters(m, s, np.diag([1.0, 0.0, 1.0, 1.0]))
    with pytest.raises(InputError, match="NaN or infinite values inside the binary map"):
        find_clusters(m, np.full((3, 3, 3), np.nan), np.eye(4))


def test_write_clusters_csv(tmp_path):
    rng = np.random.default_rng(3)
    binary = rng.random((8, 8, 8)) < 0.3
    scores = rng.normal(size=binary.shape) + 4
    _, table = find_clusters(binary, scores, AFFINE, top_k=5)
    out = write_clusters_csv(tmp_path / "clusters.csv", table)
    with open(out, newline="") as f:
        rows = list(csv.reader(f))
    assert tuple(rows[0]) == CLUSTER_COLUMNS  # header is exactly the column names, no caution line
    assert len(rows) == 1 + len(table)
    for row, want in zip(rows[1:], table):
        for name, text in zip(CLUSTER_COLUMNS, row):
            assert type(want[name])(text) == want[name]  # exact round trip
    assert sorted(p.name for p in tmp_path.iterdir()) == ["clusters.csv"]  # no temporary left behind
    write_clusters_csv(tmp_path / "empty.csv", [])
    assert (tmp_path / "empty.csv").read_text().strip() == ",".join(CLUSTER_COLUMNS)
    with pytest.raises(InputError, match="row 0 has keys"):
        write_clusters_csv(tmp_path / "bad.csv", [{"rank": 1}])
    assert not (tmp_path / "bad.csv").exists()

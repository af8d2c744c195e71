"""Thresholding, connected components and ranking of a novelty map; the clusters table.

Typical use::

    binary = threshold(z_map, brain_mask, value=3.0)          # or top_fraction=0.01
    labels, table = find_clusters(binary, z_map, affine)       # labels 1..K by rank
    write_clusters_csv(out_dir / "clusters.csv", table)

Coordinates: voxel indices ``(i, j, k)`` index the volume's axes; world coordinates in mm are
``affine @ (i, j, k, 1)`` (the NIfTI-1 convention that nibabel exposes as ``img.affine``).
"""

from __future__ import annotations

import csv
import os
from numbers import Integral, Real
from pathlib import Path

import numpy as np
from nibabel.affines import apply_affine
from scipy import ndimage

from .errors import ConfigError, InputError

CLUSTER_COLUMNS = ("rank", "size_voxels", "size_mm3", "mean_score", "peak_score",
                   "peak_i", "peak_j", "peak_k", "peak_x_mm", "peak_y_mm", "peak_z_mm",
                   "centroid_i", "centroid_j", "centroid_k", "centroid_x_mm", "centroid_y_mm", "centroid_z_mm")

_RANK_BY_CONNECTIVITY = {6: 1, 18: 2, 26: 3}  # neighbours -> generate_binary_structure(3, rank)


def threshold(score_map: np.ndarray, mask: np.ndarray, value: float | None = None,
              top_fraction: float | None = None) -> np.ndarray:
    """Voxels of ``mask`` whose score is at or above a threshold -> ``(X, Y, Z) bool``.

    ``score_map: (X, Y, Z)`` float, ``mask: (X, Y, Z)`` bool (brain voxels). Give exactly one of
    ``value`` (keep ``score >= value``) or ``top_fraction`` in (0, 1] (keep the
    ``ceil(top_fraction * n_mask)`` highest-scoring mask voxels; voxels tied with the last one
    kept are kept too). NaN scores are never kept.
    """
    score_map, mask = np.asarray(score_map), np.asarray(mask)
    if (value is None) == (top_fraction is None):
        raise ConfigError("threshold: give exactly one of value= or top_fraction=, got "
                          f"value={value!r}, top_fraction={top_fraction!r}")
    if score_map.ndim != 3 or mask.shape != score_map.shape:
        raise InputError(f"threshold: score map {score_map.shape} and mask {mask.shape} must be the same 3-D grid")
    if mask.dtype != bool:
        raise InputError(f"threshold: mask must be a boolean array, got dtype {mask.dtype}; pass mask > 0")
    ok = mask & ~np.isnan(score_map)
    if value is not None:
        if isinstance(value, bool) or not isinstance(value, Real) or not np.isfinite(value):
            raise ConfigError(f"threshold: value must be a finite number, got {value!r}")
        return ok & (np.where(ok, score_map, -np.inf) >= value)
    if isinstance(top_fraction, bool) or not isinstance(top_fraction, Real) or not 0 < top_fraction <= 1:
        raise ConfigError(f"threshold: top_fraction must be in (0, 1], got {top_fraction!r}; e.g. 0.01 for the top 1%")
    scores = score_map[ok]
    if scores.size == 0:
        return np.zeros(score_map.shape, bool)
    n_keep = min(scores.size, int(np.ceil(top_fraction * mask.sum())))
    cut = np.partition(scores, scores.size - n_keep)[scores.size - n_keep]
    return ok & (np.where(ok, score_map, -np.inf) >= cut)


def _voxel_mm3(affine: np.ndarray) -> float:
    """Voxel volume ``|det(affine[:3, :3])|`` in mm3, as a triple product (exact for diagonal affines)."""
    m = affine[:3, :3]
    return float(abs(np.dot(m[:, 0], np.cross(m[:, 1], m[:, 2]))))


def _check_affine(affine) -> np.ndarray:
    a = np.asarray(affine, dtype=np.float64)
    if a.shape != (4, 4) or not np.isfinite(a).all():
        raise InputError(f"find_clusters: affine must be a finite 4x4 array (NIfTI voxel-to-mm), got shape {a.shape}")
    if _voxel_mm3(a) == 0:
        raise InputError("find_clusters: affine has a singular 3x3 part (zero voxel volume); use the image's affine")
    return a


def find_clusters(binary: np.ndarray, score_map: np.ndarray, affine, connectivity: int = 26,
                  min_size_mm3: float = 0.0, top_k: int | None = 15) -> tuple[np.ndarray, list[dict]]:
    """Connected components of ``binary``, ranked; returns ``(labels (X, Y, Z) int32, table)``.

    ``binary: (X, Y, Z)`` bool, ``score_map: (X, Y, Z)`` float (finite inside ``binary``),
    ``affine: (4, 4)`` voxel-to-mm. Components use ``connectivity`` 6 (faces), 18 (faces and
    edges) or 26 (faces, edges and corners) neighbours. Components smaller than ``min_size_mm3``
    are dropped; voxel volume = ``|det(affine[:3, :3])|`` mm3.

    Ranking: by ``mass = mean_score * size_mm3`` (the sum of the scores times the voxel volume),
    highest first; ties by peak score, then size, then position in the volume. The mass counts
    both how unusual a cluster is and how much tissue it covers, so a large moderately unusual
    region and a small very unusual one can both rank high; in mm3 rather than voxels, so the
    ranking of a region does not depend on the grid. Only the ``top_k`` best are kept (None: all);
    ``labels`` numbers them 1..K by rank, 0 elsewhere.

    Table: one dict per kept cluster with the keys :data:`CLUSTER_COLUMNS`: size in voxels and
    mm3, mean and peak score, the peak voxel (first in C order among equal peaks) and the centroid
    (unweighted mean of the member voxel indices), each in voxel indices and world mm.
    """
    binary, score_map = np.asarray(binary), np.asarray(score_map)
    if binary.ndim != 3 or score_map.shape != binary.shape:
        raise InputError(f"find_clusters: binary map {binary.shape} and score map {score_map.shape} must be "
                         "the same 3-D grid")
    if binary.dtype != bool:
        raise InputError(f"find_clusters: binary map must be boolean, got dtype {binary.dtype}; use threshold()")
    if connectivity not in _RANK_BY_CONNECTIVITY or isinstance(connectivity, bool):
        raise ConfigError(f"find_clusters: connectivity must be 6, 18 or 26, got {connectivity!r}")
    if isinstance(min_size_mm3, bool) or not isinstance(min_size_mm3, Real) or not min_size_mm3 >= 0:
        raise ConfigError(f"find_clusters: min_size_mm3 must be a number >= 0, got {min_size_mm3!r}")
    if top_k is not None and (isinstance(top_k, bool) or not isinstance(top_k, Integral) or top_k < 1):
        raise ConfigError(f"find_clusters: top_k must be an integer >= 1 or None, got {top_k!r}")
    if not np.isfinite(score_map[binary]).all():
        raise InputError("find_clusters: score map has NaN or infinite values inside the binary map; "
                         "threshold with threshold(), which leaves NaN out")
    a = _check_affine(affine)
    voxel_mm3 = _voxel_mm3(a)

    structure = ndimage.generate_binary_structure(3, _RANK_BY_CONNECTIVITY[connectivity])
    comp, n = ndimage.label(binary, structure=structure)
    if n == 0:
        return np.zeros(binary.shape, np.int32), []
    flat = comp.ravel()
    scores = score_map.astype(np.float64).ravel()
    member = np.flatnonzero(flat)
    lab = flat[member]
    size = np.bincount(lab, minlength=n + 1)[1:]
    total = np.bincount(lab, weights=scores[member], minlength=n + 1)[1:]
    mean = total / size
    # peak: highest score, first in C order on ties (member is in C order; stable sort keeps it)
    order = np.lexsort((-scores[member], lab))  # by label, then score descending
    first = np.searchsorted(lab[order], np.arange(1, n + 1))
    peak_flat = member[order[first]]
    peak_ijk = np.stack(np.unravel_index(peak_flat, binary.shape), 1)
    ijk = np.stack(np.unravel_index(member, binary.shape), 1).astype(np.float64)
    centroid = np.stack([np.bincount(lab, weights=ijk[:, d], minlength=n + 1)[1:] for d in range(3)], 1) / size[:, None]

    size_mm3 = size * voxel_mm3
    keep = np.flatnonzero(size_mm3 >= min_size_mm3)
    peak = scores[peak_flat]
    # lexsort: last key is primary -> mass desc, peak desc, size desc, label (position) asc
    ranked = keep[np.lexsort((keep, -size[keep], -peak[keep], -(mean[keep] * size_mm3[keep])))]
    if top_k is not None:
        ranked = ranked[:top_k]

    relabel = np.zeros(n + 1, np.int32)
    relabel[ranked + 1] = np.arange(1, len(ranked) + 1, dtype=np.int32)
    labels = relabel[comp]
    peak_xyz = apply_affine(a, peak_ijk[ranked])
    cen_xyz = apply_affine(a, centroid[ranked])
    table = []
    for r, c in enumerate(ranked):
        table.append({
            "rank": r + 1, "size_voxels": int(size[c]), "size_mm3": float(size_mm3[c]),
            "mean_score": float(mean[c]), "peak_score": float(peak[c]),
            "peak_i": int(peak_ijk[c, 0]), "peak_j": int(peak_ijk[c, 1]), "peak_k": int(peak_ijk[c, 2]),
            "peak_x_mm": float(peak_xyz[r, 0]), "peak_y_mm": float(peak_xyz[r, 1]), "peak_z_mm": float(peak_xyz[r, 2]),
            "centroid_i": float(centroid[c, 0]), "centroid_j": float(centroid[c, 1]), "centroid_k": float(centroid[c, 2]),
            "centroid_x_mm": float(cen_xyz[r, 0]), "centroid_y_mm": float(cen_xyz[r, 1]),
            "centroid_z_mm": float(cen_xyz[r, 2]),
        })
    return labels, table


def write_clusters_csv(path, table: list[dict]) -> Path:
    """Write ``table`` (from :func:`find_clusters`) as CSV with header :data:`CLUSTER_COLUMNS`.

    Written to a temporary file in the same folder, then renamed over ``path`` (never half-written).
    Only data: any caution for readers belongs in the caller's output, not in this file.
    """
    path = Path(path)
    for n, row in enumerate(table):
        if set(row) != set(CLUSTER_COLUMNS):
            raise InputError(f"write_clusters_csv: row {n} has keys {sorted(row)}, expected {list(CLUSTER_COLUMNS)}; "
                             "pass the table from find_clusters")
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    try:
        with open(tmp, "w", newline="", encoding="utf-8") as f:
            w = csv.writer(f)
            w.writerow(CLUSTER_COLUMNS)
            for row in table:
                w.writerow([repr(row[c]) if isinstance(row[c], float) else row[c] for c in CLUSTER_COLUMNS])
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path

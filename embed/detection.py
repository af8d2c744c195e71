"""Detection metrics for the synthetic-lesion bench: voxel-wise scores, cluster ranks, intervals.

Scores are "higher = more unusual". For one lesion, ``scores: (V,)`` are the brain-voxel scores and
``truth: (V,) bool`` marks the lesion voxels (P positives, N negatives). Sorting once by descending
score, each distinct score value t is one threshold; at t, TP(t) and FP(t) count the voxels with
``score >= t`` (tied scores enter together), and ``R = TP / P``, ``Prec = TP / (TP + FP)``.

- AUROC: area under the ROC step points by the trapezoid rule, which equals the Mann-Whitney
  statistic ``P(s_lesion > s_other) + 0.5 P(s_lesion == s_other)`` (ties count half).
- AUPRC: average precision, ``sum_t (R(t) - R(t_prev)) Prec(t)`` over distinct thresholds (no
  interpolation; the definition scikit-learn's ``average_precision_score`` uses).
- Dice: best-threshold Dice, ``max_t 2 TP(t) / (TP(t) + FP(t) + P)``; its threshold is the largest
  t reaching the maximum.

Clusters: a score map thresholded and split into connected components gives a label volume with
clusters numbered 1..K by rank (1 = most unusual; see ``embed.clusters``). A lesion's rank is the
best-ranked cluster that overlaps it by at least one voxel, and a lesion counts as found at k
(``sens@k``) when one of the top-k clusters overlaps it, i.e. when its rank is <= k.

Small n is the norm: a bench has a few dozen lesions on a handful of held-out controls, often
split further by kind, size and contrast. Every summary carries a percentile-bootstrap 95 %
interval over lesions; read the intervals, not only the means.
"""

from __future__ import annotations

import math
from numbers import Integral, Real

import numpy as np

from .errors import InputError

METRIC_KEYS = ("auroc", "auprc", "dice", "rank", "signal_ratio")
LESION_KEYS = ("id", "kind", "size_bin", "contrast_bin")


def voxel_metrics(scores: np.ndarray, truth: np.ndarray) -> dict:
    """AUROC, AUPRC and best-threshold Dice of one score map against one lesion mask.

    ``scores: (V,)`` finite float, ``truth: (V,) bool`` with at least one lesion voxel and at
    least one other voxel. One descending sort and cumulative sums; O(V log V).
    Returns ``{"auroc", "auprc", "dice", "dice_threshold"}`` (floats).
    """
    scores, truth = np.asarray(scores), np.asarray(truth)
    if scores.ndim != 1 or truth.shape != scores.shape:
        raise InputError(f"voxel_metrics: scores {scores.shape} and truth {truth.shape} must be 1-D "
                         "arrays of the same length; pass map[mask] and lesion[mask]")
    if truth.dtype != bool:
        raise InputError(f"voxel_metrics: truth must be a boolean array, got dtype {truth.dtype}; pass lesion > 0")
    if not np.issubdtype(scores.dtype, np.number) or not np.all(np.isfinite(scores)):
        raise InputError("voxel_metrics: scores must be finite numbers; drop NaN/inf voxels (outside the mask) first")
    n_pos = int(truth.sum())
    n_neg = truth.size - n_pos
    if n_pos == 0 or n_neg == 0:
        raise InputError(f"voxel_metrics: need at least one lesion voxel and one other voxel, got {n_pos} "
                         f"lesion and {n_neg} other voxels; check the lesion mask lies inside the brain mask")
    scores = scores.astype(np.float64, copy=False)
    order = np.argsort(-scores, kind="stable")
    s, y = scores[order], truth[order]
    ends = np.flatnonzero(np.diff(s) != 0)            # last index of each tie group but the final one
    ends = np.append(ends, s.size - 1)
    tp = np.cumsum(y, dtype=np.int64)[ends]           # (T,) lesion voxels at score >= t
    fp = ends + 1 - tp                                 # (T,) other voxels at score >= t
    tp0, fp0 = np.concatenate(([0], tp)), np.concatenate(([0], fp))
    auroc = float(np.sum(np.diff(fp0) * (tp0[1:] + tp0[:-1])) / (2.0 * n_pos * n_neg))
    auprc = float(np.sum(np.diff(tp0) / n_pos * (tp / (tp + fp))))
    dice = 2.0 * tp / (tp + fp + n_pos)
    best = int(np.argmax(dice))                        # first maximum = largest threshold
    return {"auroc": auroc, "auprc": auprc, "dice": float(dice[best]), "dice_threshold": float(s[ends[best]])}


def first_hit_rank(labels: np.ndarray, lesion: np.ndarray) -> int | None:
    """Rank of the best cluster overlapping a lesion, or None when no cluster touches it.

    ``labels: (X, Y, Z)`` int, clusters numbered 1..K by rank, 0 = background;
    ``lesion: (X, Y, Z) bool``.
    """
    labels, lesion = np.asarray(labels), np.asarray(lesion)
    if labels.shape != lesion.shape:
        raise InputError(f"first_hit_rank: labels {labels.shape} and lesion {lesion.shape} must be the same grid")
    if not np.issubdtype(labels.dtype, np.integer):
        raise InputError(f"first_hit_rank: labels must be integers (0 = none, 1..K by rank), got dtype {labels.dtype}")
    if lesion.dtype != bool:
        raise InputError(f"first_hit_rank: lesion must be a boolean array, got dtype {lesion.dtype}; pass lesion > 0")
    hits = labels[lesion]
    hits = hits[hits > 0]
    return int(hits.min()) if hits.size else None


def _check_ks(ks, where: str) -> tuple[int, ...]:
    ks = tuple(ks)
    if not ks or any(isinstance(k, bool) or not isinstance(k, Integral) or k < 1 for k in ks):
        raise InputError(f"{where}: ks must be positive integers, got {ks!r}; e.g. (1, 3, 5, 10)")
    return tuple(int(k) for k in ks)


def _check_rank(rank, where: str) -> int | None:
    if rank is not None and (isinstance(rank, bool) or not isinstance(rank, Integral) or rank < 1):
        raise InputError(f"{where}: a rank must be a positive integer or None (not found), got {rank!r}")
    return rank


def sensitivity_at(ranks: list, ks=(1, 3, 5, 10)) -> dict[int, float]:
    """Fraction of lesions found within the top-k clusters, for each k in ``ks``.

    ``ranks``: one entry per lesion, its first-hit rank (int >= 1) or None (never hit).
    """
    ranks = list(ranks)
    if not ranks:
        raise InputError("sensitivity_at: no lesions (empty list of ranks); run the bench on at least one lesion")
    ks = _check_ks(ks, "sensitivity_at")
    ranks = [_check_rank(r, "sensitivity_at") for r in ranks]
    return {k: sum(r is not None and r <= k for r in ranks) / len(ranks) for k in ks}


def bootstrap_ci(values, rng: np.random.Generator, n_boot: int = 2000,
                 level: float = 0.95) -> tuple[float, float | None, float | None]:
    """Mean of ``values`` and its percentile-bootstrap interval ``(mean, lo, hi)``.

    ``values: (n,)`` float; NaN entries are dropped first. Resamples the values with replacement
    (one ``(n_boot, n)`` index draw from ``rng``) and takes the ``(1 - level) / 2`` and
    ``(1 + level) / 2`` quantiles of the resampled means. n == 0 -> ``(nan, None, None)``;
    n == 1 -> ``(mean, None, None)``.
    """
    if not isinstance(rng, np.random.Generator):
        raise InputError(f"bootstrap_ci: rng must be a numpy Generator, got {type(rng).__name__}; "
                         "pass np.random.default_rng(seed)")
    if isinstance(n_boot, bool) or not isinstance(n_boot, Integral) or n_boot < 1:
        raise InputError(f"bootstrap_ci: n_boot must be a positive integer, got {n_boot!r}; e.g. 2000")
    if isinstance(level, bool) or not isinstance(level, Real) or not 0 < level < 1:
        raise InputError(f"bootstrap_ci: level must be in (0, 1), got {level!r}; e.g. 0.95")
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[~np.isnan(v)]
    if np.isinf(v).any():
        raise InputError("bootstrap_ci: values contain +/-inf; only finite numbers or NaN (missing) are allowed")
    if v.size == 0:
        return float("nan"), None, None
    mean = float(v.mean())
    if v.size == 1:
        return mean, None, None
    means = v[rng.integers(0, v.size, size=(int(n_boot), v.size))].mean(axis=1)
    lo, hi = np.quantile(means, [(1 - level) / 2, (1 + level) / 2])
    return mean, float(lo), float(hi)


def _as_float(x) -> float:
    return float("nan") if x is None else float(x)


def _triple(values, rng, n_boot) -> list:
    mean, lo, hi = bootstrap_ci(values, rng, n_boot)
    return [None if math.isnan(mean) else mean, lo, hi]


def summarise(lesions: list[dict], per_lesion: dict, ks, rng: np.random.Generator,
              n_boot: int = 2000) -> list[dict]:
    """Summary rows of one method: mean and bootstrap interval of every metric, per group.

    ``lesions``: dicts with at least ``id``, ``kind``, ``size_bin``, ``contrast_bin``;
    ``per_lesion``: ``{lesion id: {"auroc", "auprc", "dice", "rank", "signal_ratio"}}``.
    For kind in ("all", kinds in order of first appearance): one row for group "all" (bin "all"),
    one per size bin (group "size") and one per contrast bin (group "contrast"), bins in order of
    first appearance in ``lesions`` and only those holding a lesion of that kind. Metric values
    are ``[mean, lo, hi]``; None metric values (and a mean over no values) become None;
    ``sens@k`` bootstraps the 0/1 found-within-top-k indicators; ``signal_ratio`` is None when
    every lesion's ratio is None. The bootstraps draw from ``rng`` in row order.
    """
    ks = _check_ks(ks, "summarise")
    lesions = list(lesions)
    if not lesions:
        raise InputError("summarise: no lesions; run the bench on at least one lesion")
    for les in lesions:
        missing = [key for key in LESION_KEYS if key not in les]
        if missing:
            raise InputError(f"summarise: lesion {les.get('id', les)!r} lacks keys {missing}; "
                             f"each lesion needs {list(LESION_KEYS)}")
        if les["id"] not in per_lesion:
            raise InputError(f"summarise: lesion {les['id']!r} has no entry in per_lesion; "
                             "score every lesion with this method before summarising")
        absent = [key for key in METRIC_KEYS if key not in per_lesion[les["id"]]]
        if absent:
            raise InputError(f"summarise: per_lesion[{les['id']!r}] lacks keys {absent}; "
                             f"each entry needs {list(METRIC_KEYS)}")
        _check_rank(per_lesion[les["id"]]["rank"], f"summarise: lesion {les['id']!r}")

    def first_seen(key):
        return list(dict.fromkeys(les[key] for les in lesions))

    rows = []
    for kind in ("all", *first_seen("kind")):
        subset = [les for les in lesions if kind == "all" or les["kind"] == kind]
        groups = [("all", "all", subset)]
        for group, key in (("size", "size_bin"), ("contrast", "contrast_bin")):
            for b in first_seen(key):
                members = [les for les in subset if les[key] == b]
                if members:
                    groups.append((group, b, members))
        for group, b, members in groups:
            m = [per_lesion[les["id"]] for les in members]
            row = {"kind": kind, "group": group, "bin": b, "n": len(members)}
            for key in ("auroc", "auprc", "dice"):
                row[key] = _triple([_as_float(e[key]) for e in m], rng, n_boot)
            for k in ks:
                found = [float(e["rank"] is not None and e["rank"] <= k) for e in m]
                row[f"sens@{k}"] = _triple(found, rng, n_boot)
            ratios = [_as_float(e["signal_ratio"]) for e in m]
            all_none = all(e["signal_ratio"] is None for e in m)
            row["signal_ratio"] = None if all_none else _triple(ratios, rng, n_boot)
            rows.append(row)
    return rows


def _cell(x) -> str:
    return ("" if x is None else str(x)).replace("|", "\\|").replace("\n", " ")


def markdown_table(header: list[str], rows: list[list]) -> str:
    """A Markdown (GitHub-flavoured) pipe table; cells are ``str()``-ed, None becomes empty."""
    header = list(header)
    if not header:
        raise InputError("markdown_table: header is empty; give at least one column name")
    lines = ["| " + " | ".join(_cell(h) for h in header) + " |", "|" + "---|" * len(header)]
    for i, row in enumerate(rows):
        row = list(row)
        if len(row) != len(header):
            raise InputError(f"markdown_table: row {i} has {len(row)} cells but the header has "
                             f"{len(header)} columns; give one cell per column")
        lines.append("| " + " | ".join(_cell(c) for c in row) + " |")
    return "\n".join(lines) + "\n"


def format_ci(triple, digits: int = 2) -> str:
    """``[mean, lo, hi]`` -> "0.71 [0.65, 0.78]"; "0.71" without an interval; "n/a" without a mean."""
    if triple is None:
        return "n/a"
    mean, lo, hi = triple
    if mean is None or math.isnan(mean):
        return "n/a"
    if lo is None or hi is None:
        return f"{mean:.{digits}f}"
    return f"{mean:.{digits}f} [{lo:.{digits}f}, {hi:.{digits}f}]"

"""Detection metrics: AUROC / AUPRC checked against scikit-learn (and AUROC against scipy's
Mann-Whitney U), best-threshold Dice against a brute-force loop, cluster ranks, sensitivity,
bootstrap intervals, the summary rows and the Markdown helpers."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.stats import bootstrap, mannwhitneyu
from sklearn.metrics import average_precision_score, roc_auc_score

from embed.detection import (bootstrap_ci, first_hit_rank, format_ci, markdown_table, sensitivity_at,
                             summarise, voxel_metrics)
from embed.errors import InputError


def _brute_dice(scores, truth):
    """Independent reference: loop over every distinct score as a threshold (keep score >= t),
    largest threshold wins ties (definition of the brief; common practice, no source)."""
    best, best_t = -1.0, None
    for t in sorted(set(scores.tolist()), reverse=True):
        sel = scores >= t
        d = 2.0 * np.sum(sel & truth) / (sel.sum() + truth.sum())
        if d > best:
            best, best_t = d, t
    return best, best_t


def _check_against_references(scores, truth):
    m = voxel_metrics(scores, truth)
    # scikit-learn roc_auc_score / average_precision_score are the references named in the brief.
    assert m["auroc"] == pytest.approx(roc_auc_score(truth, scores), abs=1e-12)
    assert m["auprc"] == pytest.approx(average_precision_score(truth, scores), abs=1e-12)
    # scipy.stats.mannwhitneyu: U of the first sample (ties count half) / (P * N) is the AUROC.
    u = mannwhitneyu(scores[truth], scores[~truth]).statistic
    assert m["auroc"] == pytest.approx(u / (truth.sum() * (~truth).sum()), abs=1e-12)
    dice, t = _brute_dice(scores, truth)
    assert m["dice"] == pytest.approx(dice, abs=1e-12)
    assert m["dice_threshold"] == t
    return m


@pytest.mark.parametrize("seed", range(6))
def test_voxel_metrics_random_with_many_ties(seed):
    rng = np.random.default_rng(seed)
    v = int(rng.integers(50, 3000))
    truth = rng.random(v) < rng.uniform(0.005, 0.5)
    truth[rng.integers(v)] = True
    truth[rng.integers(v)] = False
    if truth.all():
        truth[0] = False
    raw = rng.normal(size=v) + 1.5 * truth
    scores = np.round(raw, int(rng.integers(0, 2)))            # 0 or 1 decimal: heavy ties
    _check_against_references(scores, truth)
    _check_against_references(raw, truth)                      # no ties


def test_voxel_metrics_float32_scores_match_float64():
    rng = np.random.default_rng(7)
    truth = rng.random(500) < 0.1
    scores = rng.normal(size=500).astype(np.float32) + truth
    a, b = voxel_metrics(scores, truth), voxel_metrics(scores.astype(np.float64), truth)
    assert a == b


def test_voxel_metrics_all_ties():
    truth = np.zeros(40, bool)
    truth[[3, 9, 20]] = True
    m = _check_against_references(np.full(40, 2.5), truth)
    assert m["auroc"] == 0.5
    assert m["auprc"] == pytest.approx(3 / 40)
    assert m["dice"] == pytest.approx(2 * 3 / (40 + 3))
    assert m["dice_threshold"] == 2.5


def test_voxel_metrics_perfect_and_inverted():
    truth = np.zeros(30, bool)
    truth[:5] = True
    scores = np.where(truth, 5.0, 0.0) + np.arange(30) * 0.01
    m = _check_against_references(scores, truth)
    assert (m["auroc"], m["auprc"], m["dice"]) == (1.0, 1.0, 1.0)
    assert m["dice_threshold"] == scores[truth].min()
    inv = _check_against_references(-scores, truth)
    assert inv["auroc"] == 0.0
    assert inv["auprc"] < 0.5


def test_voxel_metrics_dice_tie_takes_largest_threshold():
    # P = 3: the top voxel alone gives 2*1/(1+3) = 0.5, the top five give 2*2/(5+3) = 0.5 too.
    truth = np.array([1, 0, 0, 0, 1] + [0] * 10 + [1], bool)
    scores = np.arange(truth.size, 0, -1).astype(float)
    m = _check_against_references(scores, truth)
    assert m["dice"] == 0.5
    assert m["dice_threshold"] == scores[0]


def test_voxel_metrics_bad_input():
    truth = np.array([True, False, False])
    with pytest.raises(InputError, match="same length"):
        voxel_metrics(np.zeros(4), truth)
    with pytest.raises(InputError, match="same length"):
        voxel_metrics(np.zeros((3, 1)), truth)
    with pytest.raises(InputError, match="boolean"):
        voxel_metrics(np.zeros(3), truth.astype(int))
    with pytest.raises(InputError, match="finite"):
        voxel_metrics(np.array([0.0, np.nan, 1.0]), truth)
    with pytest.raises(InputError, match="0 lesion"):
        voxel_metrics(np.zeros(3), np.zeros(3, bool))
    with pytest.raises(InputError, match="0 other"):
        voxel_metrics(np.zeros(3), np.ones(3, bool))


def test_first_hit_rank_matches_loop_over_labels():
    rng = np.random.default_rng(1)
    for _ in range(20):
        labels = rng.integers(0, 6, size=(6, 5, 4)) * (rng.random((6, 5, 4)) < 0.3)
        lesion = rng.random((6, 5, 4)) < 0.05
        # reference: walk the ranks 1..K in order, first one that touches the lesion
        expected = next((k for k in range(1, 6) if np.any((labels == k) & lesion)), None)
        assert first_hit_rank(labels, lesion) == expected


def test_first_hit_rank_cases():
    labels = np.zeros((4, 4, 4), int)
    labels[0, 0, :2] = 1
    labels[2, 2, :] = 3
    labels[3, 3, 3] = 5
    lesion = np.zeros((4, 4, 4), bool)
    lesion[1, 1, 1] = True
    assert first_hit_rank(labels, lesion) is None             # touches only background
    lesion[2, 2, 0] = lesion[3, 3, 3] = True
    assert first_hit_rank(labels, lesion) == 3
    lesion[0, 0, 1] = True
    assert first_hit_rank(labels, lesion) == 1
    assert first_hit_rank(labels, np.zeros((4, 4, 4), bool)) is None


def test_first_hit_rank_bad_input():
    with pytest.raises(InputError, match="same grid"):
        first_hit_rank(np.zeros((4, 4, 4), int), np.zeros((4, 4, 3), bool))
    with pytest.raises(InputError, match="integers"):
        first_hit_rank(np.zeros((2, 2, 2)), np.zeros((2, 2, 2), bool))
    with pytest.raises(InputError, match="boolean"):
        first_hit_rank(np.zeros((2, 2, 2), int), np.zeros((2, 2, 2), int))


def test_sensitivity_at():
    # hand count: ranks <= 1: one of five; <= 3: three; <= 5: three; <= 10: four.
    assert sensitivity_at([1, 2, None, 7, 3]) == {1: 0.2, 3: 0.6, 5: 0.6, 10: 0.8}
    assert sensitivity_at([None, None], ks=[2]) == {2: 0.0}


def test_sensitivity_at_bad_input():
    with pytest.raises(InputError, match="empty list"):
        sensitivity_at([])
    with pytest.raises(InputError, match="positive integer or None"):
        sensitivity_at([1, 0])
    with pytest.raises(InputError, match="ks must be positive integers"):
        sensitivity_at([1], ks=(0, 3))


def test_bootstrap_ci_contains_mean_reproducible_and_narrows():
    rng = np.random.default_rng(0)
    small, large = rng.exponential(size=20), rng.exponential(size=500)
    m, lo, hi = bootstrap_ci(small, np.random.default_rng(5))
    assert m == pytest.approx(small.mean())
    assert lo < m < hi
    assert bootstrap_ci(small, np.random.default_rng(5)) == (m, lo, hi)
    assert bootstrap_ci(small, np.random.default_rng(6)) != (m, lo, hi)
    _, lo_l, hi_l = bootstrap_ci(large, np.random.default_rng(5))
    assert hi_l - lo_l < (hi - lo) / 2                          # width ~ 1/sqrt(n): ratio ~ 5 expected
    _, lo90, hi90 = bootstrap_ci(small, np.random.default_rng(5), level=0.9)
    assert lo <= lo90 < hi90 <= hi


def test_bootstrap_ci_near_normal_approximation():
    # Normal-approximation (Wald) interval of a mean, mean +- 1.96 sd / sqrt(n), from the central
    # limit theorem (any statistics textbook; from memory). The bootstrap endpoints carry Monte
    # Carlo error of roughly 0.06 standard errors at n_boot = 2000, so allow 0.25 of one.
    x = np.random.default_rng(2).normal(3.0, 2.0, size=2000)
    m, lo, hi = bootstrap_ci(x, np.random.default_rng(3))
    se = x.std(ddof=1) / np.sqrt(x.size)
    assert lo == pytest.approx(m - 1.96 * se, abs=0.25 * se)
    assert hi == pytest.approx(m + 1.96 * se, abs=0.25 * se)


def test_bootstrap_ci_near_scipy_percentile_bootstrap():
    # scipy.stats.bootstrap(method="percentile") as an outside reference (own draws, so approx).
    x = np.random.default_rng(4).gamma(2.0, size=60)
    _, lo, hi = bootstrap_ci(x, np.random.default_rng(8), n_boot=4000)
    ref = bootstrap((x,), np.mean, method="percentile", n_resamples=4000, rng=np.random.default_rng(9)).confidence_interval
    se = x.std(ddof=1) / np.sqrt(x.size)
    assert lo == pytest.approx(ref.low, abs=0.15 * se)
    assert hi == pytest.approx(ref.high, abs=0.15 * se)


def test_bootstrap_ci_nan_and_small_n():
    x = np.array([0.2, np.nan, 0.8, 0.5, np.nan])
    assert bootstrap_ci(x, np.random.default_rng(1)) == bootstrap_ci(x[~np.isnan(x)], np.random.default_rng(1))
    m, lo, hi = bootstrap_ci([np.nan, np.nan], np.random.default_rng(0))
    assert np.isnan(m) and lo is None and hi is None
    assert bootstrap_ci([], np.random.default_rng(0))[1:] == (None, None)
    assert bootstrap_ci([0.4, np.nan], np.random.default_rng(0)) == (0.4, None, None)
    assert bootstrap_ci([1.0, 1.0, 1.0], np.random.default_rng(0)) == (1.0, 1.0, 1.0)


def test_bootstrap_ci_bad_input():
    with pytest.raises(InputError, match="numpy Generator"):
        bootstrap_ci([1.0, 2.0], 0)
    with pytest.raises(InputError, match="n_boot"):
        bootstrap_ci([1.0, 2.0], np.random.default_rng(0), n_boot=0)
    with pytest.raises(InputError, match="level"):
        bootstrap_ci([1.0, 2.0], np.random.default_rng(0), level=95)
    with pytest.raises(InputError, match="inf"):
        bootstrap_ci([1.0, np.inf], np.random.default_rng(0))


LESIONS = [
    {"id": "L1", "kind": "texture", "size_bin": "small", "contrast_bin": "low"},
    {"id": "L2", "kind": "intensity", "size_bin": "large", "contrast_bin": "high"},
    {"id": "L3", "kind": "texture", "size_bin": "small", "contrast_bin": "high"},
    {"id": "L4", "kind": "intensity", "size_bin": "small", "contrast_bin": "low"},
    {"id": "L5", "kind": "texture", "size_bin": "small", "contrast_bin": "low"},
]
PER_LESION = {
    "L1": {"auroc": 0.9, "auprc": 0.3, "dice": 0.4, "rank": 1, "signal_ratio": None},
    "L2": {"auroc": 0.7, "auprc": 0.1, "dice": 0.2, "rank": None, "signal_ratio": 1.5},
    "L3": {"auroc": 0.8, "auprc": 0.2, "dice": 0.3, "rank": 4, "signal_ratio": None},
    "L4": {"auroc": None, "auprc": 0.05, "dice": 0.1, "rank": 12, "signal_ratio": 1.1},
    "L5": {"auroc": 0.6, "auprc": 0.4, "dice": 0.0, "rank": 2, "signal_ratio": None},
}


def test_summarise_rows_and_values():
    rows = summarise(LESIONS, PER_LESION, (1, 3, 10), np.random.default_rng(0), n_boot=200)
    keys = [(r["kind"], r["group"], r["bin"], r["n"]) for r in rows]
    assert keys == [
        ("all", "all", "all", 5), ("all", "size", "small", 4), ("all", "size", "large", 1),
        ("all", "contrast", "low", 3), ("all", "contrast", "high", 2),
        ("texture", "all", "all", 3), ("texture", "size", "small", 3),
        ("texture", "contrast", "low", 2), ("texture", "contrast", "high", 1),
        ("intensity", "all", "all", 2), ("intensity", "size", "small", 1), ("intensity", "size", "large", 1),
        ("intensity", "contrast", "low", 1), ("intensity", "contrast", "high", 1)]   # bins in global first-seen order
    by = {k[:3]: r for k, r in zip(keys, rows)}
    top = by["all", "all", "all"]
    assert set(top) == {"kind", "group", "bin", "n", "auroc", "auprc", "dice",
                        "sens@1", "sens@3", "sens@10", "signal_ratio"}
    assert top["auroc"][0] == pytest.approx(np.mean([0.9, 0.7, 0.8, 0.6]))   # L4's None dropped
    assert top["auprc"][0] == pytest.approx(np.mean([0.3, 0.1, 0.2, 0.05, 0.4]))
    assert top["sens@1"][0] == pytest.approx(1 / 5)
    assert top["sens@3"][0] == pytest.approx(2 / 5)
    assert top["sens@10"][0] == pytest.approx(3 / 5)
    assert top["signal_ratio"][0] == pytest.approx(1.3)
    for r in rows:
        for key in ("auroc", "auprc", "dice", "sens@1", "sens@3", "sens@10"):
            mean, lo, hi = r[key]
            assert (lo is None) == (hi is None)
            if lo is not None:
                assert lo <= mean <= hi
    assert by["texture", "all", "all"]["signal_ratio"] is None                 # every ratio None
    assert by["all", "size", "large"]["dice"] == [0.2, None, None]            # n == 1: no interval
    assert by["intensity", "size", "small"]["auroc"] == [None, None, None]    # only value None
    json.dumps(rows, allow_nan=False)                                          # valid JSON for metrics.json
    again = summarise(LESIONS, PER_LESION, (1, 3, 10), np.random.default_rng(0), n_boot=200)
    assert again == rows


def test_summarise_bad_input():
    rng = np.random.default_rng(0)
    with pytest.raises(InputError, match="'L3' has no entry in per_lesion"):
        summarise(LESIONS, {k: v for k, v in PER_LESION.items() if k != "L3"}, (1,), rng)
    with pytest.raises(InputError, match="no lesions"):
        summarise([], PER_LESION, (1,), rng)
    with pytest.raises(InputError, match=r"lacks keys \['size_bin'\]"):
        summarise([{"id": "L1", "kind": "texture", "contrast_bin": "low"}], PER_LESION, (1,), rng)
    with pytest.raises(InputError, match=r"per_lesion\['L1'\] lacks keys \['rank'\]"):
        summarise(LESIONS[:1], {"L1": {"auroc": 1, "auprc": 1, "dice": 1, "signal_ratio": None}}, (1,), rng)
    with pytest.raises(InputError, match="positive integer or None"):
        summarise(LESIONS[:1], {"L1": dict(PER_LESION["L1"], rank=0)}, (1,), rng)
    with pytest.raises(InputError, match="ks must be"):
        summarise(LESIONS, PER_LESION, (), rng)


def test_markdown_table():
    text = markdown_table(["method", "sens@10"], [["embedding", "0.71 [0.65, 0.78]"], ["a|b", None]])
    assert text == ("| method | sens@10 |\n|---|---|\n| embedding | 0.71 [0.65, 0.78] |\n"
                    "| a\\|b |  |\n")
    with pytest.raises(InputError, match="row 0 has 1 cells but the header has 2"):
        markdown_table(["a", "b"], [["x"]])
    with pytest.raises(InputError, match="header is empty"):
        markdown_table([], [])


def test_format_ci():
    assert format_ci([0.714, 0.6512, 0.7799]) == "0.71 [0.65, 0.78]"
    assert format_ci((0.714, None, None)) == "0.71"
    assert format_ci([0.5, 0.26, 0.74], digits=1) == "0.5 [0.3, 0.7]"
    assert format_ci([float("nan"), None, None]) == "n/a"
    assert format_ci([None, None, None]) == "n/a"
    assert format_ci(None) == "n/a"

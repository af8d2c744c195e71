"""Bench figures (embed.figures) on the small invented metrics of tests/test_report.py."""

from __future__ import annotations

import matplotlib.axes
import numpy as np
import pytest
from scipy import ndimage

from embed import figures
from embed.errors import InputError

from .test_report import HAND, ODD, _png, _row, make_metrics


def test_sensitivity_curve_equals_hand_count():
    metrics = make_metrics()
    for (method, kind), expected in HAND.items():
        assert figures.sensitivity_curve(metrics, method, kind) == pytest.approx(expected)
    assert all(np.isnan(figures.sensitivity_curve(metrics, "embedding", "geometry")))  # no such lesion


def test_contrast_curve_bins_in_order_and_summary_first():
    metrics = make_metrics()
    # texture: L1 low (rank 1), L2 high (none), L3 low (rank 4) -> low 2/2, high 0/1 at k = 10
    assert figures.contrast_curve(metrics, "embedding", "texture", 10) == (["low", "high"], [1.0, 0.0])
    assert figures.contrast_curve(metrics, ODD, "texture", 3) == (["low", "high"], [0.0, 1.0])
    metrics["summary"].append(_row("embedding", "texture", "contrast", "low", sens=(0.1, 0.2, 0.3, 0.4)))
    assert figures.contrast_curve(metrics, "embedding", "texture", 10) == (["low", "high"], [0.4, 0.0])


def test_sensitivity_figure_plots_the_hand_counts(tmp_path, monkeypatch):
    drawn = []
    original = matplotlib.axes.Axes.errorbar

    def spy(ax, x, y, *args, **kwargs):
        drawn.append((kwargs.get("label"), list(y), kwargs.get("yerr")))
        return original(ax, x, y, *args, **kwargs)

    monkeypatch.setattr(matplotlib.axes.Axes, "errorbar", spy)
    out = figures.sensitivity_figure(make_metrics(), tmp_path / "sensitivity.png")
    _png(out)
    order = [(m, kind) for kind in ("texture", "intensity", "all") for m in ("embedding", ODD)]
    assert [d[0] for d in drawn] == [m for m, _ in order]
    for (method, kind), (_, ys, yerr) in zip(order, drawn):
        assert ys == pytest.approx(HAND[method, kind])
        if (method, kind) == (ODD, "all"):
            assert yerr is None  # no summary row -> no error bars
        else:  # interval mean -/+ 0.2 clipped to [0, 1] (see _ci)
            lo = [min(s, 0.2) for s in HAND[method, kind]]
            hi = [min(0.2, 1 - s) for s in HAND[method, kind]]
            assert np.asarray(yerr) == pytest.approx(np.array([lo, hi]))
    assert not list(tmp_path.glob(".*partial*"))  # written atomically, nothing left behind


def test_contrast_figure_bars(tmp_path, monkeypatch):
    heights = []
    original = matplotlib.axes.Axes.bar

    def spy(ax, x, height, *args, **kwargs):
        heights.append(list(height))
        return original(ax, x, height, *args, **kwargs)

    monkeypatch.setattr(matplotlib.axes.Axes, "bar", spy)
    out = figures.contrast_figure(make_metrics(), tmp_path / "contrast.png", k=10)
    _png(out)
    # texture (low, high) then intensity (low, high); hand counts at k = 10 from RANKS
    assert heights == [[1.0, 0.0], [0.5, 1.0], [1.0, 0.0], [0.0, 1.0]]


def _volumes():
    shape = (20, 24, 18)
    rng = np.random.default_rng(0)
    grid = np.indices(shape)
    brain = ((grid[0] - 10) / 7) ** 2 + ((grid[1] - 12) / 9) ** 2 + ((grid[2] - 9) / 6) ** 2 <= 1
    background = np.where(brain, 1.0 + rng.random(shape), 0.0)
    lesion = ((grid[0] - 10) ** 2 + (grid[1] - 12) ** 2 + (grid[2] - 9) ** 2) <= 4
    labels = np.zeros(shape, int)
    labels[9:12, 11:15, 8:11] = 1
    labels[5:7, 6:8, 9:11] = 2
    score = rng.normal(size=shape)
    return background, score, lesion, labels


def test_example_figure_png_and_crop(tmp_path):
    background, score, lesion, labels = _volumes()
    out = figures.example_figure(tmp_path / "ex.png", background, score, lesion, labels, (10, 12, 9), "L1 <embedding>")
    _png(out)
    # the crop box is the brain's bounding box (reference: scipy.ndimage.find_objects)
    (box,) = ndimage.find_objects((background != 0).astype(int))
    assert figures._brain_box(background, (10, 12, 9)) == [(s.start, s.stop) for s in box]


def test_example_figure_bad_input(tmp_path):
    background, score, lesion, labels = _volumes()
    with pytest.raises(InputError, match="labels has shape .* but background has"):
        figures.example_figure(tmp_path / "ex.png", background, score, lesion, labels[:-1], (10, 12, 9), "t")
    with pytest.raises(InputError, match=r"centre \(10, 30, 9\) is outside the grid"):
        figures.example_figure(tmp_path / "ex.png", background, score, lesion, labels, (10, 30, 9), "t")

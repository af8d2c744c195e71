"""Bench / sweep figures and the static HTML page (embed.report), on small invented metrics."""

from __future__ import annotations

import base64
import io
import json
import re

import matplotlib.axes
import numpy as np
import pytest
from PIL import Image
from scipy import ndimage

from embed import figures, report
from embed.errors import InputError

ODD = "x<y & z"  # a method name that must be escaped in the page
KS = [1, 3, 5, 10]
# (id, kind, contrast bin, level); invented lesions
LESIONS = [("L1", "texture", "low", 0.5), ("L2", "texture", "high", 2.0), ("L3", "texture", "low", 0.8),
           ("L4", "intensity", "low", 0.05), ("L5", "intensity", "high", 0.2)]
RANKS = {"embedding": {"L1": 1, "L2": None, "L3": 4, "L4": 2, "L5": 12},
         ODD: {"L1": None, "L2": 3, "L3": 10, "L4": None, "L5": 1}}
# Hand count of sensitivity at k = 1, 3, 5, 10 (share of the kind's lesions with rank <= k):
HAND = {("embedding", "texture"): [1 / 3, 1 / 3, 2 / 3, 2 / 3],   # ranks 1, -, 4
        ("embedding", "intensity"): [0, 1 / 2, 1 / 2, 1 / 2],     # ranks 2, 12
        ("embedding", "all"): [1 / 5, 2 / 5, 3 / 5, 3 / 5],       # ranks 1, -, 4, 2, 12
        (ODD, "texture"): [0, 1 / 3, 1 / 3, 2 / 3],               # ranks -, 3, 10
        (ODD, "intensity"): [1 / 2, 1 / 2, 1 / 2, 1 / 2],         # ranks -, 1
        (ODD, "all"): [1 / 5, 2 / 5, 2 / 5, 3 / 5]}               # ranks -, 3, 10, -, 1


def _ci(mean):
    return [mean, max(mean - 0.2, 0.0), min(mean + 0.2, 1.0)]


def _row(method, kind, group="all", bin_="all", n=2, sens=(0.5, 0.5, 0.5, 0.5)):
    row = {"method": method, "kind": kind, "group": group, "bin": bin_, "n": n, "auroc": [0.81, 0.7, 0.9],
           "auprc": [0.12, None, None], "dice": [0.2, 0.1, 0.3], "signal_ratio": None}
    row.update({f"sens@{k}": _ci(s) for k, s in zip(KS, sens)})
    return row


def make_metrics():
    lesions = [{"id": i, "subject": "ctl03", "kind": kind, "radius_mm": 4.0, "size_bin": "small", "level": level,
                "level_name": "blur sigma (mm)" if kind == "texture" else "intensity shift", "contrast_bin": cb,
                "n_voxels": 33, "centre_vox": [10, 12, 9]} for i, kind, cb, level in LESIONS]
    results = {m: {"per_lesion": {i: {"auroc": 0.8, "auprc": 0.1, "dice": 0.2, "rank": r, "signal_ratio": 1.1}
                                  for i, r in ranks.items()},
                   "fp_clusters": [4, 7] if m == "embedding" else [2, 9], "fp_clusters_per_control": 5.5}
               for m, ranks in RANKS.items()}
    # every (method, kind) has a group-"all" row except (ODD, "all"): no error bars there
    summary = [_row(m, kind, n=3 if kind == "texture" else 2 if kind == "intensity" else 5, sens=HAND[m, kind])
               for (m, kind) in HAND if (m, kind) != (ODD, "all")]
    summary.append(_row("embedding", "texture", "size", "small", n=3, sens=HAND["embedding", "texture"]))
    return {"kind": "twinpatch bench", "caution": "Research only; not for diagnosis.",
            "small_n": "Only 5 lesions and 2 controls: read the intervals.", "twinpatch_version": "0.1",
            "settings": {"seed": 0, "scorer": "ocsvm", "top_fraction": 0.01}, "seconds": 12.5,
            "heldout": ["ctl03", "ctl04"], "fit_controls": ["ctl01", "ctl02"], "ks": KS,
            "lesion_kinds": ["texture", "intensity"],
            "methods": [{"name": "embedding", "family": "encoder", "description": "frozen encoder"},
                        {"name": ODD, "family": "baseline", "description": "raw intensities"}],
            "lesions": lesions, "results": results, "summary": summary,
            "figures": ["sensitivity.png", "contrast.png", "missing.png"]}


def _png(path):
    with Image.open(path) as im:
        im.verify()
    with Image.open(path) as im:
        assert im.format == "PNG" and im.size[0] > 0 and im.size[1] > 0


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


def _images(page):
    return re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)


def test_bench_page(tmp_path):
    metrics = make_metrics()
    figures.sensitivity_figure(metrics, tmp_path / "sensitivity.png")
    figures.contrast_figure(metrics, tmp_path / "contrast.png")
    (tmp_path / "metrics.json").write_text(json.dumps(metrics))
    out = report.write_html(tmp_path)
    assert out == tmp_path / "report.html"
    page = out.read_text(encoding="utf-8")
    assert '<p class="caution">Research only; not for diagnosis.</p>' in page
    assert page.index("caution") < page.index("<h2>")  # the caution comes first
    assert "Only 5 lesions and 2 controls" in page
    assert "<td>top_fraction</td><td>0.01</td>" in page
    # main table: embedding x texture row, n = 3, AUROC, AUPRC (no interval), then sens@1..10 = hand counts
    row = ("<tr><td>embedding</td><td>texture</td><td>3</td><td>0.810 [0.700, 0.900]</td>"
           "<td>0.120 [–, –]</td><td>0.200 [0.100, 0.300]</td><td>0.333 [0.133, 0.533]</td>"
           "<td>0.333 [0.133, 0.533]</td><td>0.667 [0.467, 0.867]</td><td>0.667 [0.467, 0.867]</td><td>–</td></tr>")
    assert row in page
    assert "<tr><td>embedding</td><td>4</td><td>7</td><td>5.50</td></tr>" in page  # FP clusters per control
    assert "<details><summary>By lesion size</summary>" in page and "<td>small</td>" in page
    assert "x&lt;y &amp; z" in page and ODD not in page
    assert "http://" not in page and "https://" not in page
    images = _images(page)
    assert len(images) == 2  # missing.png is skipped
    for data in images:
        _png(io.BytesIO(base64.b64decode(data)))


def test_sweep_page(tmp_path):
    Image.new("RGB", (8, 6), "white").save(tmp_path / "metric_vs_size.png")
    summary = {"kind": "twinpatch sweep", "caution": "Research only.", "twinpatch_version": "0.1",
               "metric": "sens@10", "lesion_kinds": ["texture", "mixed"], "keys": ["patch.size"], "seeds": [0, 1],
               "runs": [{"id": "size-7_seed-0", "config": {"patch.size": 7}, "seed": 0, "status": "benched",
                         "error": None, "values": {"embedding": 0.61}, "seconds_train": 60.0, "seconds_bench": 20.5},
                        {"id": "size-9_seed-0", "config": {"patch.size": 9}, "seed": 0, "status": "failed",
                         "error": "ran out of <memory>", "values": {}, "seconds_train": None,
                         "seconds_bench": None}],
               "ranking": [{"label": "size=7 / embedding", "config": {"patch.size": 7}, "method": "embedding",
                            "n_seeds": 2, "mean": 0.63, "sd": 0.02, "values": [0.61, 0.65]}],
               "baselines": [{"name": "intensities", "value": 0.71}],
               "figures": ["metric_vs_size.png"]}
    (tmp_path / "summary.json").write_text(json.dumps(summary))
    page = report.write_html(tmp_path).read_text(encoding="utf-8")
    assert '<p class="caution">Research only.</p>' in page
    assert "Metric: sens@10; lesion kinds: texture, mixed" in page
    assert ("<tr><td>size=7 / embedding</td><td>embedding</td><td>2</td><td>0.630</td><td>0.020</td>"
            "<td>0.610, 0.650</td></tr>") in page
    assert "<tr><td>intensities</td><td>0.710</td></tr>" in page
    assert "<tr><td>size-7_seed-0</td><td>benched</td><td>embedding: 0.610</td><td>80.5</td><td>–</td></tr>" in page
    assert "<td>failed</td><td></td><td>–</td><td>ran out of &lt;memory&gt;</td>" in page
    assert len(_images(page)) == 1
    assert "http://" not in page and "https://" not in page


def test_write_html_bad_folders(tmp_path):
    with pytest.raises(InputError, match="is neither a bench folder .metrics.json. nor a sweep folder"):
        report.write_html(tmp_path)
    (tmp_path / "summary.json").write_text(json.dumps({"kind": "something else"}))
    with pytest.raises(InputError, match="is neither a bench folder"):
        report.write_html(tmp_path)
    (tmp_path / "metrics.json").write_text('{"ks": [1, 3,')
    with pytest.raises(InputError, match=r"metrics\.json in .*: damaged JSON"):
        report.write_html(tmp_path)
    (tmp_path / "metrics.json").write_text("[1, 2]")
    with pytest.raises(InputError, match=r"metrics\.json in .*: damaged JSON \(found a JSON list"):
        report.write_html(tmp_path)
    (tmp_path / "metrics.json").write_text(json.dumps({"ks": [1], "methods": []}))
    with pytest.raises(InputError, match="missing keys lesion_kinds, lesions, results, summary"):
        report.write_html(tmp_path)
    assert not (tmp_path / "report.html").exists()

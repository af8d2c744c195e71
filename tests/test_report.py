"""The static HTML page of a bench or sweep folder (embed.report), on small invented metrics
(shared with tests/test_figures.py)."""

from __future__ import annotations

import base64
import io
import json
import re

import pytest
from PIL import Image

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

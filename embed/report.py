"""Figures (PNG). Draws what other modules computed; computes no metrics.

``cluster_figure``: three orthogonal slices through a cluster's peak, over a background image (the
case's first contrast), the score map shown where it is above the threshold, the cluster outlined,
and a colour bar. Voxel axes are shown as stored; for RAS+ images (the usual template grids) the
panels are sagittal (y, z), coronal (x, z) and axial (x, y), anterior / superior upwards and the
subject's right on the right ("neurological" view). The caption carries the research caution.

``write_html``: the one-file static page of a bench or sweep folder (figures embedded as ``data:``
URIs, nothing fetched from a network). The bench's own figures are drawn by :mod:`embed.figures`.
"""

from __future__ import annotations

import base64
import html
import json
from pathlib import Path

import matplotlib
import numpy as np

from .errors import InputError
from .figures import pyplot, save_figure
from .files import write_text

CAUTION = ("Research software, not a diagnostic device: findings need expert review "
           "under local clinical practice.")


def _panel(ax, background, overlay, outline, title, vmin, vmax, lo, hi):
    shown_bg = np.ma.masked_where(background == 0, background)  # outside the brain: black
    gray = matplotlib.colormaps["gray"].with_extremes(bad="black")
    ax.imshow(shown_bg.T, cmap=gray, origin="lower", vmin=lo, vmax=hi, interpolation="nearest")
    shown = np.ma.masked_where(~np.isfinite(overlay), overlay)
    im = ax.imshow(shown.T, cmap="plasma", origin="lower", vmin=vmin, vmax=vmax, alpha=0.7,
                   interpolation="nearest")
    if outline.any():
        ax.contour(outline.T.astype(float), levels=[0.5], colors=["#00e5ff"], linewidths=1.2, origin="lower")
    ax.set_title(title, fontsize=9)
    ax.set_xticks([])
    ax.set_yticks([])
    return im


def cluster_figure(path: str | Path, background: np.ndarray, score: np.ndarray, labels: np.ndarray,
                   row: dict, threshold: float, subject: str = "") -> Path:
    """Write a PNG for one cluster (``row``: a ``clusters.csv`` row with ``rank`` and peak voxel).

    ``background, score: (X, Y, Z) float``; ``labels: (X, Y, Z) int`` (cluster ``rank`` is label
    ``rank``). Written under a temporary name, then renamed.
    """
    plt = pyplot()

    path = Path(path)
    rank = int(row["rank"])
    i, j, k = (int(row[f"peak_{a}"]) for a in ("i", "j", "k"))
    overlay = np.where(score >= threshold, score, np.nan)
    outline = labels == rank
    finite = score[np.isfinite(score)]
    vmin, vmax = float(threshold), float(max(finite.max(), threshold + 1e-6)) if finite.size else 1.0
    brain = background[background != 0]
    lo, hi = (np.percentile(brain, [1, 99]) if brain.size else (0.0, 1.0))
    fig, axes = plt.subplots(1, 3, figsize=(11, 4.2), constrained_layout=True)
    views = [
        (background[i], overlay[i], outline[i], f"voxel axis 0 = {i}"),
        (background[:, j], overlay[:, j], outline[:, j], f"voxel axis 1 = {j}"),
        (background[:, :, k], overlay[:, :, k], outline[:, :, k], f"voxel axis 2 = {k}"),
    ]
    im = None
    for ax, (bg, ov, ol, title) in zip(axes, views):
        im = _panel(ax, bg, ov, ol, title, vmin, vmax, lo, hi)
    fig.colorbar(im, ax=axes, shrink=0.8, label="standardised score")
    size = f"{row['size_voxels']} voxels, {float(row['size_mm3']):.0f} mm3"
    peak = f"peak {float(row['peak_score']):.2f} at ({float(row['peak_x_mm']):.0f}, {float(row['peak_y_mm']):.0f}, " \
           f"{float(row['peak_z_mm']):.0f}) mm"
    fig.suptitle(f"{subject} cluster {rank}: {size}, mean {float(row['mean_score']):.2f}, {peak}", fontsize=10)
    fig.supxlabel(CAUTION, fontsize=8, color="#444444")
    return save_figure(fig, path)


# ----- the static HTML page ------------------------------------------------------------------

_CSS = ("body{font-family:sans-serif;max-width:72em;margin:1em auto;padding:0 1em;color:#222}"
        ".caution{border:2px solid #a34700;background:#fff3e0;padding:.6em 1em;font-weight:bold}"
        "table{border-collapse:collapse;margin:.5em 0;font-size:.9em}th,td{border:1px solid #bbb;"
        "padding:.2em .5em;text-align:left}th{background:#eee}img{max-width:100%}summary{cursor:pointer}")


def _e(value) -> str:
    if isinstance(value, (list, tuple)):
        value = ", ".join(str(v) for v in value)
    return html.escape("–" if value is None else str(value))


def _table(header: list, rows: list) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{_e(c)}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


def _num(v, digits: int = 3) -> str:
    return "–" if v is None else f"{float(v):.{digits}f}"


def _ci(v) -> str:
    """``[mean, lo, hi]`` -> ``"mean [lo, hi]"`` (``–`` where null)."""
    mean, lo, hi = (list(v or []) + [None] * 3)[:3]
    return "–" if mean is None else f"{_num(mean)} [{_num(lo)}, {_num(hi)}]"


def _figures(folder: Path, names) -> str:
    """Every listed PNG that exists in ``folder``, embedded as a base64 ``data:`` URI."""
    parts = []
    for name in map(str, names or []):
        p = folder / name
        if Path(name).name == name and p.suffix.lower() == ".png" and p.is_file():
            data = base64.b64encode(p.read_bytes()).decode("ascii")
            parts.append(f'<figure><img src="data:image/png;base64,{data}" alt="{_e(name)}">'
                         f"<figcaption>{_e(name)}</figcaption></figure>")
    return "<h2>Figures</h2>" + ("".join(parts) or "<p>No figure files found.</p>")


def _load(path: Path, needed: tuple[str, ...]) -> dict:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        why = f"found a JSON {type(data).__name__}, expected an object"
    except ValueError as err:  # JSONDecodeError and UnicodeDecodeError
        data, why = None, str(err)
    if not isinstance(data, dict):
        raise InputError(f"{path.name} in {path.parent}: damaged JSON ({why}); re-run the bench or sweep that wrote it")
    missing = [k for k in needed if k not in data]
    if missing:
        raise InputError(f"{path.name} in {path.parent}: missing keys {', '.join(missing)}; "
                         "re-run the bench with this version of twinpatch")
    return data


def _bench_body(folder: Path, m: dict) -> str:
    ks, names = [int(k) for k in m["ks"]], [str(x["name"]) for x in m["methods"]]
    keys = ["auroc", "auprc", "dice", *(f"sens@{k}" for k in ks), "signal_ratio"]
    heads = ["AUROC", "AUPRC", "Dice", *(f"sens@{k}" for k in ks), "signal ratio"]

    def rows(group: str) -> list:
        return [[r.get("method"), r.get("kind"), *([] if group == "all" else [r.get("bin")]), r.get("n"),
                 *(_ci(r.get(key)) for key in keys)] for r in m["summary"] if r.get("group") == group]

    heldout = list(m.get("heldout", []))
    fp_rows = []
    for name in names:
        res = m["results"].get(name, {})
        fp = list(res.get("fp_clusters", []))
        fp_rows.append([name, *fp, *[None] * (len(heldout) - len(fp)), _num(res.get("fp_clusters_per_control"), 2)])
    settings = [[k, v] for k, v in m.get("settings", {}).items()] + [["run time (s)", _num(m.get("seconds"), 1)]]
    return "".join([
        f"<h1>twinpatch bench (version {_e(m.get('twinpatch_version'))})</h1>",
        f'<p class="caution">{_e(m.get("caution") or CAUTION)}</p>',
        f"<p>{_e(m.get('small_n', ''))}</p>",
        "<h2>Settings</h2>", _table(["setting", "value"], settings),
        f"<p>Held-out controls (scored): {_e(heldout)}<br>Fit controls (scorer trained on): "
        f"{_e(m.get('fit_controls', []))}</p>",
        "<h2>Methods</h2>", _table(["method", "family", "description"],
                                   [[d.get("name"), d.get("family"), d.get("description")] for d in m["methods"]]),
        "<h2>Results by method and lesion kind</h2><p>Each cell: mean [95 % percentile-bootstrap interval over "
        "lesions]. sens@k: share of lesions overlapped by one of the top-k clusters.</p>",
        _table(["method", "kind", "n", *heads], rows("all")),
        "<h2>False-positive clusters per lesion-free control</h2>",
        _table(["method", *heldout, "mean"], fp_rows),
        "<details><summary>By lesion size</summary>", _table(["method", "kind", "size", "n", *heads], rows("size")),
        "</details><details><summary>By lesion contrast</summary>",
        _table(["method", "kind", "contrast", "n", *heads], rows("contrast")), "</details>",
        _figures(folder, m.get("figures"))])


def _sweep_body(folder: Path, s: dict) -> str:
    def seconds(run: dict) -> str:
        parts = [run.get(k) for k in ("seconds_train", "seconds_bench") if run.get(k) is not None]
        return _num(sum(parts), 1) if parts else "–"

    runs = [[r.get("id"), r.get("status"), "; ".join(f"{k}: {_num(v)}" for k, v in (r.get("values") or {}).items()),
             seconds(r), r.get("error")] for r in s.get("runs", [])]
    ranking = [[r.get("label"), r.get("method"), r.get("n_seeds"), _num(r.get("mean")), _num(r.get("sd")),
                ", ".join(_num(v) for v in r.get("values", []))] for r in s.get("ranking", [])]
    return "".join([
        f"<h1>twinpatch sweep (version {_e(s.get('twinpatch_version'))})</h1>",
        f'<p class="caution">{_e(s.get("caution") or CAUTION)}</p>',
        f"<p>Metric: {_e(s.get('metric'))}; lesion kinds: {_e(s.get('lesion_kinds', []))}; "
        f"keys: {_e(s.get('keys', []))}; seeds: {_e(s.get('seeds', []))}</p>",
        "<h2>Ranking (best first)</h2>", _table(["label", "method", "n_seeds", "mean", "sd", "values"], ranking),
        "<h2>Baselines</h2>", _table(["baseline", "value"], [[b.get("name"), _num(b.get("value"))]
                                                           for b in s.get("baselines", [])]),
        "<h2>Runs</h2>", _table(["id", "status", "values", "seconds", "error"], runs),
        _figures(folder, s.get("figures"))])


def write_html(folder) -> Path:
    """Write ``folder/report.html`` (one self-contained file) for a bench or sweep folder."""
    folder = Path(folder)
    bench, sweep = folder / "metrics.json", folder / "summary.json"
    body = None
    if bench.is_file():
        body = _bench_body(folder, _load(bench, ("ks", "lesion_kinds", "methods", "lesions", "results", "summary")))
    elif sweep.is_file() and (data := _load(sweep, ())).get("kind") == "twinpatch sweep":
        body = _sweep_body(folder, data)
    if body is None:
        raise InputError(f"{folder} is neither a bench folder (metrics.json) nor a sweep folder (summary.json); "
                         "pass the output folder of a bench or a sweep")
    title = f"twinpatch {'bench' if bench.is_file() else 'sweep'}: {folder.name}"
    page = (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>{_e(title)}</title>'
            f"<style>{_CSS}</style></head><body>{body}</body></html>\n")
    return write_text(folder / "report.html", page)

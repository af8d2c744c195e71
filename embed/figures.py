"""Bench figures (PNG), drawn from what the bench computed; no metric is computed here.

``sensitivity_figure`` / ``contrast_figure``: sensitivity at k from a bench ``metrics.json`` dict
(counted from per-lesion cluster ranks; bootstrap intervals taken from its summary rows).
``example_figure``: one lesion, one method, three cropped slices through the lesion centre.
"""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib
import numpy as np

from .errors import InputError
from .files import atomic


def pyplot():
    """matplotlib's pyplot on the file-only Agg backend (no display needed)."""
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


def save_figure(fig, path, dpi: int = 110) -> Path:
    """Write ``fig`` as PNG under a temporary name, rename it to ``path``, close the figure."""
    path = Path(path)
    try:
        with atomic(path) as tmp:
            fig.savefig(tmp, dpi=dpi)
    finally:
        pyplot().close(fig)
    return path


def _names(metrics: dict) -> list[str]:
    return [str(m["name"]) for m in metrics["methods"]]


def _lesions(metrics: dict, kind: str) -> list[dict]:
    return [les for les in metrics["lesions"] if kind == "all" or les.get("kind") == kind]


def _found(metrics: dict, method: str, lesions: list[dict], k: int) -> float:
    """Share of ``lesions`` whose rank (best-ranked overlapping cluster) is not null and <= k."""
    if not lesions:
        return math.nan
    per = metrics["results"].get(method, {}).get("per_lesion", {})
    ranks = [per.get(les["id"], {}).get("rank") for les in lesions]
    return sum(r is not None and r <= k for r in ranks) / len(lesions)


def _row(metrics: dict, method: str, kind: str, group: str, bin_: str) -> dict | None:
    for r in metrics.get("summary", []):
        if (r.get("method"), r.get("kind"), r.get("group"), r.get("bin", "all")) == (method, kind, group, bin_):
            return r
    return None


def _yerr(rows: list, keys: list[str], ys: list[float]) -> np.ndarray | None:
    """(2, len(ys)) distances from each plotted value to the bootstrap interval ``rows[n][keys[n]]``
    of a summary row; None when no interval is known."""
    err = np.zeros((2, len(ys)))
    for n, (row, key, y) in enumerate(zip(rows, keys, ys)):
        v = row.get(key) if row else None
        if v and len(v) == 3 and v[1] is not None and v[2] is not None and math.isfinite(y):
            err[:, n] = max(y - float(v[1]), 0.0), max(float(v[2]) - y, 0.0)
    return err if err.any() else None


def _panels(n: int, width: float):
    fig, axes = pyplot().subplots(1, n, figsize=(width * n + 1.6, 3.9), sharey=True, squeeze=False,
                                   layout="constrained")
    return fig, axes[0]


def _finish(fig, axes, ylabel: str, title: str, path) -> Path:
    axes[0].set_ylabel(ylabel)
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncol=min(len(labels), 4) or 1, fontsize=8)
    fig.suptitle(title, fontsize=11)
    return save_figure(fig, path)


def sensitivity_curve(metrics: dict, method: str, kind: str) -> list[float]:
    """Sensitivity at each k of ``metrics["ks"]`` for one method and lesion kind (``"all"``: every
    lesion): the summary row's mean when present (the bench computed it), else the share of that
    kind's lesions whose per-lesion ``rank`` is not null and <= k. NaN when no lesion has that kind."""
    lesions = _lesions(metrics, kind)
    row = _row(metrics, method, kind, "all", "all") or {}
    out = []
    for k in metrics["ks"]:
        v = row.get(f"sens@{int(k)}")
        out.append(float(v[0]) if lesions and v and v[0] is not None else _found(metrics, method, lesions, int(k)))
    return out


def contrast_curve(metrics: dict, method: str, kind: str, k: int = 10) -> tuple[list, list[float]]:
    """(bins, values): the contrast bins of one kind's lesions in order of first appearance, and the
    sensitivity at k in each (the summary row's mean when present, else counted from ranks)."""
    lesions = _lesions(metrics, kind)
    bins = list(dict.fromkeys(les.get("contrast_bin") for les in lesions))
    values = []
    for b in bins:
        v = (_row(metrics, method, kind, "contrast", b) or {}).get(f"sens@{k}")
        in_bin = [les for les in lesions if les.get("contrast_bin") == b]
        values.append(float(v[0]) if v and v[0] is not None else _found(metrics, method, in_bin, k))
    return bins, values


def sensitivity_figure(metrics: dict, path) -> Path:
    """One panel per lesion kind plus "all": sensitivity at each k, one line per method, with the
    summary's bootstrap interval as error bars where it has one."""
    kinds, ks, names = list(metrics["lesion_kinds"]) + ["all"], [int(k) for k in metrics["ks"]], _names(metrics)
    fig, axes = _panels(len(kinds), 2.9)
    step = 0.08 * (max(ks) - min(ks) or 1)  # small sideways offset so the error bars do not overlap
    for ax, kind in zip(axes, kinds):
        for n, name in enumerate(names):
            ys = sensitivity_curve(metrics, name, kind)
            err = _yerr([_row(metrics, name, kind, "all", "all")] * len(ks), [f"sens@{k}" for k in ks], ys)
            xs = [k + step * (n - (len(names) - 1) / 2) for k in ks]
            ax.errorbar(xs, ys, yerr=err, marker="o", capsize=3, label=name.replace("$", r"\$"))
        ax.set(title=f"{kind} (n = {len(_lesions(metrics, kind))})", xticks=ks, ylim=(-0.03, 1.05),
               xlabel="k (top clusters inspected)")
        ax.grid(alpha=0.3)
    return _finish(fig, axes, "sensitivity", "Sensitivity at k (lesion found = one of the top-k clusters "
                   "overlaps it)", path)


def contrast_figure(metrics: dict, path, k: int = 10) -> Path:
    """One panel per lesion kind: sensitivity at k per contrast bin (bars, one per method), with the
    summary's bootstrap interval as error bars where it has one."""
    kinds, names = list(metrics["lesion_kinds"]), _names(metrics)
    fig, axes = _panels(len(kinds), 3.4)
    width = 0.8 / max(len(names), 1)
    for ax, kind in zip(axes, kinds):
        lesions = _lesions(metrics, kind)
        level_name = next((les["level_name"] for les in lesions if les.get("level_name")), "level")
        bins = []
        for n, name in enumerate(names):
            bins, ys = contrast_curve(metrics, name, kind, k)
            err = _yerr([_row(metrics, name, kind, "contrast", b) for b in bins], [f"sens@{k}"] * len(bins), ys)
            bars = ax.bar(np.arange(len(bins)) + width * (n - (len(names) - 1) / 2), ys, width, yerr=err,
                          capsize=3, label=name.replace("$", r"\$"))
            ax.bar_label(bars, fmt="%.2f", fontsize=7)
        ticks = []
        for b in bins:
            levels = sorted({float(les["level"]) for les in lesions
                             if les.get("contrast_bin") == b and les.get("level") is not None})
            span = "" if not levels else f"{levels[0]:g}" if len(levels) == 1 else f"{levels[0]:g}-{levels[-1]:g}"
            ticks.append(f"{b}\n{level_name} {span}".strip())
        ax.set_xticks(np.arange(len(bins)), ticks, fontsize=8)
        ax.set(title=f"{kind} (n = {len(lesions)})", ylim=(0, 1.05))
        ax.grid(axis="y", alpha=0.3)
    return _finish(fig, axes, f"sensitivity at k = {k}", f"Sensitivity at k = {k} by lesion contrast "
                   f"(lesion found = one of the top-{k} clusters overlaps it)", path)


_LESION_COLOUR, _CLUSTER_COLOUR = "#ff2d7a", "#2fd158"


def _brain_box(background: np.ndarray, centre) -> list[tuple[int, int]]:
    """Per axis, [lo, hi) of the voxels where background != 0, widened to contain ``centre``."""
    box = []
    for axis in range(3):
        idx = np.flatnonzero(np.any(background, axis=tuple(a for a in range(3) if a != axis)))
        lo, hi = (int(idx[0]), int(idx[-1]) + 1) if idx.size else (0, background.shape[axis])
        box.append((min(lo, centre[axis]), max(hi, centre[axis] + 1)))
    return box


def example_figure(path, background, score, lesion, labels, centre, title) -> Path:
    """Three orthogonal slices through ``centre`` (i, j, k), cropped to the brain's bounding box.

    ``background, score: (X, Y, Z) float``; ``lesion: (X, Y, Z) bool``; ``labels: (X, Y, Z) int``
    (top clusters 1..K, 0 elsewhere). The score is shown only inside the clusters; the lesion and
    the clusters are outlined in two colours. Only 2D slices are copied.
    """
    shape = np.shape(background)
    for name, arr in (("score", score), ("lesion", lesion), ("labels", labels)):
        if np.shape(arr) != shape:
            raise InputError(f"example_figure: {name} has shape {np.shape(arr)} but background has {shape}; "
                             "pass maps on one grid")
    centre = tuple(int(c) for c in centre)
    if len(centre) != 3 or not all(0 <= c < s for c, s in zip(centre, shape)):
        raise InputError(f"example_figure: centre {centre} is outside the grid {shape}; pass a voxel index inside it")
    from matplotlib.lines import Line2D
    from matplotlib.ticker import MaxNLocator
    box = _brain_box(background, centre)
    views = []  # (axis, the two shown axes, then the four cropped 2D slices)
    for axis in range(3):
        cut = tuple(centre[a] if a == axis else slice(*box[a]) for a in range(3))
        views.append((axis, *(d for d in range(3) if d != axis), *(np.asarray(vol[cut], t) for vol, t in
                      ((background, float), (score, float), (lesion, bool), (labels, int)))))
    inside = np.concatenate([v[4][(v[6] > 0) & np.isfinite(v[4])] for v in views])
    vmin, vmax = (float(inside.min()), float(inside.max())) if inside.size else (0.0, 1.0)
    vmax = max(vmax, vmin + 1e-6)
    brain = np.concatenate([v[3][v[3] != 0] for v in views])
    lo, hi = np.percentile(brain, [1, 99]) if brain.size else (0.0, 1.0)
    grey = matplotlib.colormaps["gray"].with_extremes(bad=(1, 1, 1, 0))
    fig, axes = pyplot().subplots(1, 3, figsize=(11, 4.3), layout="constrained")
    for ax, (axis, d0, d1, bg, sc, les, lab) in zip(axes, views):
        extent = (box[d0][0] - 0.5, box[d0][1] - 0.5, box[d1][0] - 0.5, box[d1][1] - 0.5)
        ax.imshow(np.ma.masked_equal(bg, 0).T, cmap=grey, origin="lower", vmin=lo, vmax=hi, extent=extent,
                  interpolation="nearest")
        im = ax.imshow(np.ma.masked_where(lab <= 0, sc).T, cmap="cividis", origin="lower", vmin=vmin, vmax=vmax,
                       extent=extent, interpolation="nearest", alpha=0.85)
        xs, ys = np.arange(*box[d0]), np.arange(*box[d1])
        if les.any() and min(les.shape) > 1:
            ax.contour(xs, ys, les.T.astype(float), levels=[0.5], colors=[_LESION_COLOUR], linewidths=1.6)
        for value in np.unique(lab[lab > 0]) if min(lab.shape) > 1 else []:
            ax.contour(xs, ys, (lab == value).T.astype(float), levels=[0.5], colors=[_CLUSTER_COLOUR],
                       linewidths=1.2, linestyles="dashed")
            at = np.argwhere(lab == value).mean(axis=0)
            ax.text(xs[0] + at[0], ys[0] + at[1], str(value), color=_CLUSTER_COLOUR, fontsize=8, ha="center",
                    va="center", fontweight="bold", bbox=dict(boxstyle="round,pad=0.1", fc="black", alpha=0.5, lw=0))
        ax.set(title=f"voxel axis {axis} = {centre[axis]}", xlabel=f"voxel axis {d0}", ylabel=f"voxel axis {d1}")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    fig.colorbar(im, ax=axes, shrink=0.8, label="score (shown inside the top clusters)")
    handles = [Line2D([], [], color=_LESION_COLOUR, lw=1.6, label="injected lesion"),
               Line2D([], [], color=_CLUSTER_COLOUR, lw=1.2, ls="--", label="top clusters (number = rank)")]
    fig.legend(handles=handles, loc="outside lower center", ncol=2, fontsize=8, frameon=False)
    fig.suptitle(str(title), fontsize=10)
    return save_figure(fig, path)



"""Figures (PNG). Draws what other modules computed; computes no metrics.

``cluster_figure``: three orthogonal slices through a cluster's peak, over a background image (the
case's first contrast), the score map shown where it is above the threshold, the cluster outlined,
and a colour bar. Voxel axes are shown as stored; for RAS+ images (the usual template grids) the
panels are sagittal (y, z), coronal (x, z) and axial (x, y), anterior / superior upwards and the
subject's right on the right ("neurological" view). The caption carries the research caution.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib
import numpy as np

from .files import atomic

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
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

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
    try:
        with atomic(path) as tmp:
            fig.savefig(tmp, dpi=110)
    finally:
        plt.close(fig)
    return path

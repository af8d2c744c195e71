"""Quality control of a cohort: similarity of each subject to the controls, outlier flags, a montage.

Per subject and contrast, inside the cohort mask:

- ``ncc``: normalised cross-correlation (Pearson correlation over the cohort-mask voxels) of the
  subject's intensities with the voxel-wise median of the controls' intensities. Intensities are
  z-scores inside each subject's mask (0 outside), so the median compares like with like; the
  correlation itself ignores each subject's own offset and scale.
- ``dice``: Dice overlap 2|A n B| / (|A| + |B|) of the subject's mask A with the cohort mask B.
- intensity statistics of the raw image inside its mask: mean, std, 1st and 99th percentiles.

Outlier rule: a robust z-score of each metric against the controls,
``z = (x - median) / (1.4826 * MAD)`` (median and median absolute deviation over the controls;
1.4826 makes the MAD estimate the standard deviation of normal data). A subject is flagged when
``z < -QC_THRESHOLD`` for its ``ncc`` in any contrast or for its ``dice``: one-sided, since only a
low similarity to the cohort signals a misregistration, a wrong header or a swapped file.
QC_THRESHOLD = 3.5 is the cut-off Iglewicz and Hoaglin (1993) recommend for this "modified
z-score" (from memory). The spread 1.4826 * MAD is floored at ``MIN_SPREAD`` so that a cohort of
near-identical controls does not flag a tiny difference: with MIN_SPREAD = 0.01, a subject within
3.5 * 0.01 = 0.035 of the controls' median NCC or Dice is never flagged (our choice; on synthetic
4 mm cohorts the controls' Dice spread is ~0.001, which without the floor flagged normal controls).

The controls' median includes the subject itself when it is a control; with many controls its
weight is small, and a misregistered control still stands out.
"""

from __future__ import annotations

import csv
import io
import math
import pathlib
import struct
import zlib
from dataclasses import dataclass
from typing import Callable

import nibabel as nib
import numpy as np
from scipy import ndimage
from tqdm import tqdm

from .checks import pread_array
from .files import atomic
from .errors import InputError

QC_THRESHOLD = 3.5
MAD_TO_SD = 1.4826
MIN_SPREAD = 0.01       # floor of 1.4826 * MAD for ncc and dice (both in [-1, 1]); our choice
SLAB_BYTES = 64 << 20   # bytes of intensities held at once while computing the median image
QC_COLUMNS = ("subject", "role", "contrast", "ncc", "ncc_z", "dice", "dice_z", "mask_voxels",
              "mean", "std", "p01", "p99", "flagged", "reason", "excluded")


@dataclass(frozen=True)
class QcRow:
    """One subject and contrast. ncc, dice in [-1, 1]; *_z robust z-scores against the controls;
    mean, std, p01, p99 of the raw image inside its mask; flagged/reason are per subject."""

    subject: str
    role: str
    contrast: str
    ncc: float
    ncc_z: float
    dice: float
    dice_z: float
    mask_voxels: int
    mean: float
    std: float
    p01: float
    p99: float
    flagged: bool
    reason: str
    excluded: bool = False


@dataclass(frozen=True)
class QcReport:
    rows: tuple[QcRow, ...]
    flagged: tuple[str, ...]   # subjects, in cohort order
    threshold: float


def robust_z(values: np.ndarray, reference: np.ndarray, floor: float = MIN_SPREAD) -> np.ndarray:
    """values: (S,) float; reference: indices of the controls. Returns (S,) float64
    (x - median) / max(1.4826 * MAD, floor), median and MAD over ``values[reference]``."""
    values = np.asarray(values, dtype=np.float64)
    ref = values[np.asarray(reference, dtype=np.int64)]
    med = float(np.median(ref))
    spread = max(MAD_TO_SD * float(np.median(np.abs(ref - med))), floor)
    return (values - med) / spread


def similarity(read_slab: Callable, n_subjects: int, n_contrasts: int, controls: np.ndarray, mask: np.ndarray,
               slab_bytes: int = SLAB_BYTES, progress: bool = False) -> np.ndarray:
    """NCC of every subject with the controls' voxel-wise median, inside ``mask``.

    read_slab(s, c, x0, x1) -> (x1 - x0, Y, Z) float32 intensities of subject s, contrast c.
    mask: (X, Y, Z) bool cohort mask. Reads slabs of x-planes of all subjects at a time, about
    ``slab_bytes`` in total (at least one plane), so memory does not grow with the cohort's size
    beyond one plane per subject. Returns (S, C) float64 (0 where a subject is constant).
    """
    controls = np.asarray(controls, dtype=np.int64)
    plane = int(np.prod(mask.shape[1:])) * 4
    step = max(1, slab_bytes // max(1, n_subjects * plane))
    sums = np.zeros((n_subjects, n_contrasts, 5), dtype=np.float64)  # a, m, aa, mm, am
    slabs = [(c, x0) for c in range(n_contrasts) for x0 in range(0, mask.shape[0], step)]
    for c, x0 in tqdm(slabs, desc="qc similarity", unit="slab", disable=not progress):
        m = mask[x0:x0 + step]
        if not m.any():
            continue
        vals = np.empty((n_subjects, int(m.sum())), dtype=np.float64)
        for s in range(n_subjects):
            vals[s] = read_slab(s, c, x0, x0 + m.shape[0])[m]
        med = np.median(vals[controls], axis=0)
        sums[:, c] += np.stack([vals.sum(1), np.full(n_subjects, med.sum()), (vals ** 2).sum(1),
                                np.full(n_subjects, (med ** 2).sum()), vals @ med], axis=1)
    n = float(mask.sum())
    a, md, aa, mm, am = np.moveaxis(sums, 2, 0)
    cov, va, vm = am - a * md / n, aa - a * a / n, mm - md * md / n
    den = np.sqrt(np.clip(va, 0, None) * np.clip(vm, 0, None))
    return np.where(den > 0, cov / np.where(den > 0, den, 1.0), 0.0)


def dice(a: np.ndarray, b: np.ndarray) -> float:
    """Dice overlap of two (X, Y, Z) bool masks: 2|A n B| / (|A| + |B|) (1.0 when both are empty)."""
    total = int(a.sum()) + int(b.sum())
    return 2.0 * int(np.logical_and(a, b).sum()) / total if total else 1.0


def assess(subjects, roles, contrasts, ncc: np.ndarray, dices: np.ndarray, stats: dict, landmarks: dict,
           mask_voxels, threshold: float = QC_THRESHOLD) -> QcReport:
    """Apply the outlier rule (module docstring). ncc: (S, C); dices: (S,); stats: subject ->
    contrast -> {"mean", "std"}; landmarks: subject -> contrast -> raw percentiles 1..99."""
    if not (isinstance(threshold, (int, float)) and threshold > 0):
        raise InputError(f"qc threshold must be a number > 0 (robust z-score cut-off), got {threshold!r}; use e.g. 3.5")
    controls = np.array([i for i, r in enumerate(roles) if r == "control"], dtype=np.int64)
    ncc_z = np.stack([robust_z(ncc[:, c], controls) for c in range(len(contrasts))], axis=1)
    dice_z = robust_z(dices, controls)
    rows, flagged = [], []
    for s, subject in enumerate(subjects):
        why = [f"ncc_z={ncc_z[s, c]:.1f} ({contrast})" for c, contrast in enumerate(contrasts) if ncc_z[s, c] < -threshold]
        if dice_z[s] < -threshold:
            why.append(f"dice_z={dice_z[s]:.1f}")
        if why:
            flagged.append(subject)
        for c, contrast in enumerate(contrasts):
            st, lm = stats[subject][contrast], landmarks[subject][contrast]
            rows.append(QcRow(subject, roles[s], contrast, float(ncc[s, c]), float(ncc_z[s, c]), float(dices[s]),
                              float(dice_z[s]), int(mask_voxels[s]), st["mean"], st["std"], float(lm[0]),
                              float(lm[-1]), bool(why), "; ".join(why)))
    return QcReport(tuple(rows), tuple(flagged), float(threshold))


def qc_csv(rows) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(QC_COLUMNS)
    for r in rows:
        w.writerow([r.subject, r.role, r.contrast, f"{r.ncc:.6f}", f"{r.ncc_z:.3f}", f"{r.dice:.6f}", f"{r.dice_z:.3f}",
                    r.mask_voxels, f"{r.mean:.6g}", f"{r.std:.6g}", f"{r.p01:.6g}", f"{r.p99:.6g}",
                    int(r.flagged), r.reason, int(r.excluded)])
    return buf.getvalue()


def _replace(path: pathlib.Path, write) -> None:
    with atomic(path) as tmp:
        write(tmp)


def write_csv(path, rows) -> pathlib.Path:
    path = pathlib.Path(path)
    text = qc_csv(rows)
    _replace(path, lambda p: p.write_text(text, encoding="utf-8", newline="\n"))
    return path


def mid_slices(vol: np.ndarray, mask: np.ndarray, affine: np.ndarray) -> list[np.ndarray]:
    """Three orthogonal slices through the centre of the mask's bounding box, in RAS+ order
    (reoriented with nibabel.orientations): [sagittal (A, S), coronal (R, S), axial (R, A)],
    each transposed so rows run from inferior/posterior (row 0) upwards."""
    ornt = nib.orientations.io_orientation(affine)
    v = nib.orientations.apply_orientation(vol, ornt)
    m = nib.orientations.apply_orientation(mask, ornt)
    idx = np.argwhere(m)
    centre = ((idx.min(0) + idx.max(0)) // 2) if len(idx) else np.array(v.shape) // 2
    x, y, z = (int(c) for c in centre)
    return [v[x, :, :].T, v[:, y, :].T, v[:, :, z].T]


def _tile(slices, outline, bad: bool, pad: int = 2) -> np.ndarray:
    """(H, W, 3) float RGB tile: three grey slices (1-99 % window), cohort-mask outline in yellow,
    a red frame when flagged. Rows are flipped so that superior/anterior is up."""
    inside = np.concatenate([sl[sl != 0] for sl in slices])
    lo, hi = np.percentile(inside, [1, 99]) if inside.size else (0.0, 1.0)
    h = max(sl.shape[0] for sl in slices) + 2 * pad
    w = sum(sl.shape[1] for sl in slices) + (len(slices) + 1) * pad
    tile = np.zeros((h, w, 3))
    x = pad
    for sl, ol in zip(slices, outline):
        grey = np.where(sl != 0, np.clip((sl - lo) / max(hi - lo, 1e-12), 0, 1), 0.0)[::-1]  # 0 = outside: black
        edge = (ol > 0.5)[::-1]
        edge &= ~ndimage.binary_erosion(edge)
        rgb = np.repeat(grey[..., None], 3, axis=2)
        rgb[edge] = (1.0, 0.85, 0.0)
        tile[pad:pad + sl.shape[0], x:x + sl.shape[1]] = rgb
        x += sl.shape[1] + pad
    if bad:
        tile[:pad], tile[-pad:], tile[:, :pad], tile[:, -pad:] = (1, 0, 0), (1, 0, 0), (1, 0, 0), (1, 0, 0)
    return tile


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def write_png(path, width: int, height: int, bands) -> pathlib.Path:
    """Write an 8-bit RGB PNG from ``bands``, an iterable of (h, width, 3) uint8 arrays from top to
    bottom, holding one band at a time (PNG specification: signature, IHDR, IDAT, IEND; filter 0)."""
    path = pathlib.Path(path)

    def write(tmp):
        rows = 0
        with open(tmp, "wb") as f:
            f.write(b"\x89PNG\r\n\x1a\n")
            f.write(_png_chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)))
            z = zlib.compressobj(6)
            for band in bands:
                assert band.dtype == np.uint8 and band.shape[1:] == (width, 3), (band.dtype, band.shape)
                lines = np.concatenate([np.zeros((len(band), 1), np.uint8), band.reshape(len(band), -1)], axis=1)
                data = z.compress(lines.tobytes())
                if data:
                    f.write(_png_chunk(b"IDAT", data))
                rows += len(band)
            f.write(_png_chunk(b"IDAT", z.flush()))
            f.write(_png_chunk(b"IEND", b""))
        assert rows == height, (rows, height)
    _replace(path, write)
    return path


def _label(band: np.ndarray, xy, text: str, colour) -> np.ndarray:
    from PIL import Image, ImageDraw, ImageFont

    img = Image.fromarray(band)
    ImageDraw.Draw(img).text(xy, text, fill=colour, font=ImageFont.load_default(size=13))
    return np.asarray(img)


def montage(path, subjects, roles, flagged, read_volume: Callable, mask: np.ndarray, affine: np.ndarray,
            contrast: str, progress: bool = False, per_row: int = 4) -> pathlib.Path:
    """PNG of three mid-slices per subject (``read_volume(s) -> (X, Y, Z)``; one pixel per voxel,
    or an integer zoom for coarse grids) with the cohort mask's outline in yellow; flagged subjects
    get a red frame and a red label. Written one row of subjects at a time, so memory does not
    grow with the number of subjects."""
    path = pathlib.Path(path)
    outline = mid_slices(mask.astype(np.float32), mask, affine)
    zoom = max(1, 180 // max(sl.shape[0] for sl in outline))
    th, tw = (v * zoom for v in _tile([np.ones_like(o) for o in outline], outline, False).shape[:2])
    gap, label_h, title_h = 6, 18, 24
    width, rows = per_row * (tw + gap), math.ceil(len(subjects) / per_row)
    bar = tqdm(total=len(subjects), desc="qc montage", unit="subject", disable=not progress)

    def bands():
        title = np.full((title_h, width, 3), 255, np.uint8)
        yield _label(title, (4, 4), f"{contrast}: sagittal, coronal, axial mid-slices; yellow = cohort mask outline; "
                                    "red = flagged by QC", (0, 0, 0))
        for r in range(rows):
            band = np.full((label_h + th, width, 3), 255, np.uint8)
            labels = []
            for c, s in enumerate(range(r * per_row, min((r + 1) * per_row, len(subjects)))):
                bad = subjects[s] in flagged
                tile = _tile(mid_slices(read_volume(s), mask, affine), outline, bad)
                tile = np.repeat(np.repeat(np.round(tile * 255).astype(np.uint8), zoom, 0), zoom, 1)
                band[label_h:, c * (tw + gap):c * (tw + gap) + tw] = tile
                labels.append(((c * (tw + gap) + 2, 2), f"{subjects[s]} ({roles[s]})" + (" FLAGGED" if bad else ""),
                               (220, 0, 0) if bad else (0, 0, 0)))
                bar.update()
            for xy, text, colour in labels:
                band = _label(band, xy, text, colour)
            yield band
    try:
        return write_png(path, width, title_h + rows * (label_h + th), bands())
    finally:
        bar.close()


def run_qc(read_slab: Callable, read_mask: Callable, read_volume: Callable, subjects, roles, contrasts, stats: dict,
           landmarks: dict, mask_voxels, mask: np.ndarray, affine: np.ndarray, threshold: float = QC_THRESHOLD,
           montage_path=None, progress: bool = False) -> QcReport:
    """Metrics, flags and (when ``montage_path`` is given) the montage of the first contrast.

    read_slab(s, c, x0, x1) -> (x1 - x0, Y, Z) float32 intensities (see :func:`similarity`);
    read_mask(s) -> (X, Y, Z) bool subject mask; read_volume(s) -> (X, Y, Z) of the first
    contrast, for the montage. Other arguments as in :func:`assess` and :func:`montage`.
    """
    controls = np.array([s for s in range(len(subjects)) if roles[s] == "control"], dtype=np.int64)
    ncc = similarity(read_slab, len(subjects), len(contrasts), controls, mask, progress=progress)
    dices = np.array([dice(read_mask(s), mask) for s in range(len(subjects))])
    report = assess(subjects, roles, contrasts, ncc, dices, stats, landmarks, mask_voxels, threshold)
    if montage_path is not None:
        montage(montage_path, subjects, roles, report.flagged, read_volume, mask, affine, contrasts[0], progress)
    return report


def qc_files(data_fd: int, masks_fd: int, shape: tuple, affine: np.ndarray, subjects, roles, contrasts, stats: dict,
             landmarks: dict, mask_voxels, mask: np.ndarray, threshold: float = QC_THRESHOLD, montage_path=None,
             progress: bool = False, zscore_on_the_fly: bool = False) -> QcReport:
    """:func:`run_qc` on arrays in open files: ``data_fd`` float32 (S, C, X, Y, Z), ``masks_fd`` uint8
    (S, X, Y, Z), read with ``pread`` one slab or volume at a time (no memory map). With
    ``zscore_on_the_fly`` the data are raw intensities, z-scored inside each subject's mask with
    ``stats`` exactly as :func:`embed.normalise.zscore` does."""
    C, V = len(contrasts), int(np.prod(shape))
    plane = int(np.prod(shape[1:]))

    def read_slab(s, c, x0, x1):
        part = (x1 - x0,) + tuple(shape[1:])
        raw = pread_array(data_fd, part, "<f4", ((s * C + c) * V + x0 * plane) * 4)
        if not zscore_on_the_fly:
            return raw
        m = pread_array(masks_fd, part, np.uint8, s * V + x0 * plane).view(np.bool_)
        st = stats[subjects[s]][contrasts[c]]
        z = np.zeros(part, dtype=np.float32)
        z[m] = ((raw[m].astype(np.float64) - st["mean"]) / st["std"]).astype(np.float32)
        return z

    return run_qc(read_slab, lambda s: pread_array(masks_fd, shape, np.uint8, s * V).view(np.bool_),
                  lambda s: pread_array(data_fd, shape, "<f4", s * C * V * 4), subjects, roles, contrasts,
                  stats, landmarks, mask_voxels, mask, affine, threshold, montage_path, progress)

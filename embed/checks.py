"""Checks of every subject of a cohort, reporting all problems at once (used by :mod:`embed.cache`).

Two passes. :func:`survey` reads only the NIfTI headers of every file (cheap) and checks: the
file exists and is NIfTI, 3D, a real-valued data type, has a spatial transform (NIfTI-1
``qform_code``/``sform_code``), agreeing qform and sform, and the cohort grid (shape, affine
within ``AFFINE_ATOL_MM``, orientation codes from ``nib.aff2axcodes``, voxel size). The cohort
grid is the (shape, affine) shared by the most contrast images, so one odd subject listed first
does not make every other subject look wrong. :func:`scan_subject` then decodes one subject's
images (finite values, non-empty mask, non-constant intensities, increasing histogram landmarks),
writes its raw intensities and mask into the cache's temporary arrays, and returns its statistics
and source checksums.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
import pathlib
from dataclasses import dataclass

import nibabel as nib
import numpy as np

from . import normalise as _norm
from .cohort import (AFFINE_ATOL_MM, CohortError, ManifestRow, Problem, _codes, _fmt, derive_mask,
                     load_image)

_GRID_FIX = "resample every scan onto the template grid first"
HASH_CHUNK = 1 << 20


@dataclass(frozen=True, eq=False)
class Grid:
    """The cohort grid. shape: (X, Y, Z); affine: (4, 4) float64; zooms: voxel size (mm);
    orientation: axis codes, e.g. "RAS"; header: the NIfTI header of ``source``;
    shared: how many of the ``total`` contrast images are on this grid."""

    shape: tuple[int, int, int]
    affine: np.ndarray
    zooms: tuple[float, float, float]
    orientation: str
    header: nib.Nifti1Header
    source: str
    shared: int
    total: int


@dataclass(frozen=True)
class SubjectScan:
    """What decoding one subject found. stats: contrast -> {"mean", "std"} of raw intensities in the
    mask; landmarks: contrast -> (K,) raw percentiles (``normalise.PERCENTILES``); files: key
    (contrast, "mask", "lesion") -> {"path", "size", "mtime_ns", "sha256"}."""

    subject: str
    problems: tuple[Problem, ...]
    stats: dict
    landmarks: dict
    mask_voxels: int
    files: dict
    has_lesion: bool


def _files(row: ManifestRow) -> list[tuple[str, pathlib.Path]]:
    out = list(row.images.items())
    out += [(k, p) for k, p in (("mask", row.mask), ("lesion", row.lesion)) if p is not None]
    return out


def _what(row: ManifestRow, key: str) -> str:
    return {"mask": f"mask of subject {row.subject}", "lesion": f"lesion mask of subject {row.subject}"}.get(
        key, f"{key} image of subject {row.subject}")


def _header_problems(img, path, what: str) -> tuple[list[tuple[str, str]], tuple | None]:
    """(problems as (check, message), shape or None)."""
    out = []
    if not isinstance(img.header, nib.Nifti1Header):
        return [("format", f"{what}: {path} is a {type(img).__name__}, not a NIfTI image; convert it to NIfTI (.nii.gz)")], None
    shape = tuple(int(s) for s in img.shape)
    while len(shape) > 3 and shape[-1] == 1:
        shape = shape[:-1]
    if len(shape) != 3:
        out.append(("shape", f"{what}: {path} has shape {tuple(img.shape)}, expected a 3D image (X, Y, Z); give one 3D volume per contrast"))
    dtype = img.get_data_dtype()
    if dtype.fields is not None or dtype.kind not in "biuf":
        kind = "RGB/structured" if dtype.fields is not None else {"c": "complex"}.get(dtype.kind, dtype.kind)
        out.append(("dtype", f"{what}: {path} stores {kind} voxels ({dtype}); give one real-valued (integer or float) volume per contrast"))
    h = img.header
    q, s = int(h["qform_code"]), int(h["sform_code"])
    if q == 0 and s == 0:
        out.append(("xform", f"{what}: {path} has qform_code 0 and sform_code 0 (NIfTI-1: no spatial transform, so its position in space is unknown); write it again with the template's affine and sform_code set"))
    elif q > 0 and s > 0:
        diff = float(np.max(np.abs(h.get_qform() - h.get_sform())))
        if diff > AFFINE_ATOL_MM:
            out.append(("xform", f"{what}: {path} has a qform and an sform that disagree by up to {diff:.4g} mm (orientation {_codes(h.get_qform())} vs {_codes(h.get_sform())}); viewers may place it differently: write it again with one transform (e.g. qform = sform)"))
    return out, (shape if len(shape) == 3 else None)


def survey(rows: list[ManifestRow], source: str) -> tuple[list[Problem], Grid | None]:
    """Check every file's header; return (problems, the cohort grid or None if no image is readable).

    ``source`` names the manifest or BIDS folder in messages.
    """
    problems: list[Problem] = []
    headers = []  # (row, key, path, img, shape) of files whose header is usable
    for row in rows:
        for key, path in _files(row):
            what = _what(row, key)
            if not path.is_file():
                problems.append(Problem(row.subject, str(path), "file", f"{what}: file {path} not found; fix the path in {source}"))
                continue
            try:
                img = nib.load(path)
            except Exception as e:  # nibabel raises several types for a damaged header
                msg = " ".join(str(e).split()) or type(e).__name__
                problems.append(Problem(row.subject, str(path), "format", f"{what}: cannot read {path} ({type(e).__name__}: {msg}); the file is corrupt or not NIfTI, write it again"))
                continue
            found, shape = _header_problems(img, path, what)
            problems += [Problem(row.subject, str(path), check, message) for check, message in found]
            if shape is not None:
                headers.append((row, key, path, img, shape))
    groups: list[list] = []  # [shape, affine, count, first item]
    for item in headers:
        if item[1] in ("mask", "lesion"):
            continue
        for g in groups:
            if g[0] == item[4] and np.max(np.abs(g[1] - item[3].affine)) <= AFFINE_ATOL_MM:
                g[2] += 1
                break
        else:
            groups.append([item[4], item[3].affine, 1, item])
    if not groups:
        return problems, None
    best = max(groups, key=lambda g: g[2])  # ties: the first seen
    ref_img = best[3][3]
    total = sum(g[2] for g in groups)
    grid = Grid(shape=best[0], affine=np.asarray(ref_img.affine, dtype=np.float64),
                zooms=tuple(float(z) for z in ref_img.header.get_zooms()[:3]), orientation=_codes(ref_img.affine),
                header=ref_img.header.copy(), source=str(best[3][2]), shared=best[2], total=total)
    name = f"the cohort grid ({grid.shared} of {grid.total} images, e.g. {grid.source})"
    for row, key, path, img, shape in headers:
        what = _what(row, key)
        if shape != grid.shape:
            problems.append(Problem(row.subject, str(path), "shape", f"{what}: {path} has shape {shape}, expected {grid.shape} as in {name}; {_GRID_FIX}"))
            continue
        diff = float(np.max(np.abs(img.affine - grid.affine)))
        if not diff <= AFFINE_ATOL_MM:
            found = _codes(img.affine)
            check = "orientation" if found != grid.orientation else "affine"
            orient = f"; orientation {found} vs {grid.orientation}" if found != grid.orientation else ""
            sizes = tuple(float(v) for v in np.sqrt((img.affine[:3, :3] ** 2).sum(axis=0)))
            ref_sizes = tuple(float(v) for v in np.sqrt((grid.affine[:3, :3] ** 2).sum(axis=0)))
            vox = f"; voxel size {_mm(sizes)} vs {_mm(ref_sizes)}" if not np.allclose(sizes, ref_sizes, atol=AFFINE_ATOL_MM) else ""
            problems.append(Problem(row.subject, str(path), check, f"{what}: {path} has an affine that differs from {name} by up to {diff:.4g} (tolerance AFFINE_ATOL_MM={AFFINE_ATOL_MM:g}{orient}{vox}): expected {_fmt(grid.affine)}, found {_fmt(img.affine)}; {_GRID_FIX}"))
            continue
        zooms = tuple(float(z) for z in img.header.get_zooms()[:3])
        if not np.allclose(zooms, grid.zooms, rtol=0, atol=AFFINE_ATOL_MM):
            problems.append(Problem(row.subject, str(path), "voxel_size", f"{what}: {path} has voxel size (pixdim) {_mm(zooms)}, expected {_mm(grid.zooms)} as in {name}, although its affine matches; fix pixdim in the header (write the image again with nibabel)"))
    return problems, grid


def _mm(sizes) -> str:
    return "x".join(f"{v:g}" for v in sizes) + " mm"


def file_record(path: pathlib.Path) -> dict:
    """{"path", "size", "mtime_ns", "sha256"} of a source file (SHA-256 of its bytes, hashlib)."""
    st = os.stat(path)
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(HASH_CHUNK), b""):
            digest.update(chunk)
    return {"path": str(path), "size": st.st_size, "mtime_ns": st.st_mtime_ns, "sha256": digest.hexdigest()}


def pwrite_array(fd: int, arr: np.ndarray, offset: int) -> None:
    """Write a C-contiguous array's bytes at ``offset`` of an open file (no memory map)."""
    view = memoryview(np.ascontiguousarray(arr)).cast("B")
    done = 0
    while done < len(view):
        done += os.pwrite(fd, view[done:], offset + done)


def pread_array(fd: int, shape: tuple, dtype, offset: int) -> np.ndarray:
    """Read an array of ``shape`` and ``dtype`` at ``offset`` of an open file into a new array."""
    out = np.empty(shape, dtype=dtype)
    view = memoryview(out).cast("B")
    done = 0
    while done < len(view):
        n = os.preadv(fd, [view[done:]], offset + done)
        if n == 0:
            raise CohortError(f"cache file ended early at byte {offset + done}; run prepare again")  # truncated cache
        done += n
    return out


def scan_subject(row: ManifestRow, contrasts: tuple, grid: Grid, slot: int, raw_path: pathlib.Path,
                 masks_path: pathlib.Path, lesion_path: pathlib.Path, method: str) -> SubjectScan:
    """Decode one subject, check its data, and write it into slot ``slot`` of the temporary arrays.

    raw_path: float32 (S, C, X, Y, Z) file, receiving z-scores when ``method`` is "zscore" (they
    depend on the subject alone) and raw intensities otherwise (histogram landmarks need every
    control first; landmarks that are not strictly increasing are refused); masks_path: uint8
    (S, X, Y, Z) file; the lesion mask (uint8 (X, Y, Z)) goes to ``lesion_path`` when the row has
    one. Holds one subject in memory.
    """
    problems = []
    files = {key: file_record(path) for key, path in _files(row)}
    vox = int(np.prod(grid.shape))
    raw = np.empty((len(contrasts),) + grid.shape, dtype="<f4")
    try:
        for c, contrast in enumerate(contrasts):
            img = load_image(row.images[contrast], _what(row, contrast))
            raw[c] = img.get_fdata(dtype=np.float32)
            del img
    except CohortError as e:
        return SubjectScan(row.subject, (Problem(row.subject, str(row.images[contrast]), "finite" if "non-finite" in str(e) else "file", str(e)),), {}, {}, 0, files, False)
    try:
        if row.mask is not None:
            mask = load_image(row.mask, _what(row, "mask")).get_fdata(dtype=np.float32) != 0
            if not mask.any():
                raise CohortError(f"mask of subject {row.subject}: {row.mask} has no nonzero voxel; give a brain mask (nonzero = brain) or leave the mask out to derive one")
        else:
            mask = derive_mask(raw, what=f"subject {row.subject}")
    except CohortError as e:
        return SubjectScan(row.subject, (Problem(row.subject, str(row.mask or ""), "mask", str(e)),), {}, {}, 0, files, False)
    stats, marks = {}, {}
    for c, contrast in enumerate(contrasts):
        what = f"{contrast} image of subject {row.subject} ({row.images[contrast]})"
        try:
            inside = raw[c][mask].astype(np.float64)
            stats[contrast] = _norm._mean_std(inside, what)
            marks[contrast] = np.percentile(inside, _norm.PERCENTILES)
            if method == "histogram":
                _norm.check_increasing(marks[contrast], what)
            elif not problems:
                raw[c], stats[contrast] = _norm.zscore(raw[c], mask, what=what)  # as load_cohort does
        except CohortError as e:
            problems.append(Problem(row.subject, str(row.images[contrast]), "intensity", str(e)))
    has_lesion = False
    if row.lesion is not None:
        try:
            lesion = load_image(row.lesion, _what(row, "lesion")).get_fdata(dtype=np.float32) != 0
        except CohortError as e:
            problems.append(Problem(row.subject, str(row.lesion), "file", str(e)))
        else:
            has_lesion = True
            _write_new(lesion_path, lesion.astype(np.uint8))
    if not problems:
        for path, arr, offset in ((raw_path, raw, slot * len(contrasts) * vox * 4), (masks_path, mask.astype(np.uint8), slot * vox)):
            fd = os.open(path, os.O_WRONLY)
            try:
                pwrite_array(fd, arr, offset)
            finally:
                os.close(fd)
    return SubjectScan(row.subject, tuple(problems), stats, {c: [float(v) for v in m] for c, m in marks.items()},
                       int(mask.sum()), files, has_lesion)


def _write_new(path: pathlib.Path, arr: np.ndarray) -> None:
    with open(path, "wb") as f:
        f.write(memoryview(np.ascontiguousarray(arr)).cast("B"))


PROBLEM_COLUMNS = ("subject", "file", "check", "message")


def problems_csv(problems: list[Problem]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(PROBLEM_COLUMNS)
    w.writerows((p.subject, p.file, p.check, p.message) for p in problems)
    return buf.getvalue()


def summary(problems: list[Problem], source: str, table: pathlib.Path, shown: int = 8) -> str:
    """One line: how many problems in how many subjects, a short list (subject, check, file), the
    first problem's full message (with its fix), and where the full table is."""
    subjects = sorted({p.subject for p in problems if p.subject})
    short = [f"{p.subject or 'cohort'} {p.check}" + (f" ({pathlib.Path(p.file).name})" if p.file else "")
             for p in problems[:shown]]
    more = f", and {len(problems) - shown} more" if len(problems) > shown else ""
    n = len(problems)
    return (f"{n} problem{'s' * (n != 1)} in {source} ({len(subjects)} subject{'s' * (len(subjects) != 1)}): "
            f"{', '.join(short)}{more}; first: {problems[0].message}; every problem with its fix is listed in {table}")

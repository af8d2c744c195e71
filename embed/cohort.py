"""Cohort loading and validation: manifest, NIfTI images, grid checks, masks, normalisation.

A manifest is a CSV file with columns ``subject``, ``role`` (``control`` or ``case``), one column
per contrast (the column name is the contrast name; contrast order = column order) and optional
``mask`` and ``lesion`` columns (cells may be empty). Paths are relative to the manifest's folder;
absolute paths are accepted. Every scan must already be on one template grid (same shape and
affine), skull-stripped, bias-corrected and co-registered across contrasts.

The cohort is held in RAM as float32; :func:`load_subject` loads one subject at a time so a
memory-mapped cache can replace the in-RAM stack later without touching the per-subject code.
"""

from __future__ import annotations

import csv
import pathlib
import zlib
from dataclasses import dataclass

import nibabel as nib
import numpy as np
from scipy import ndimage
from tqdm import tqdm

from .errors import CohortError, ConfigError, InputError

# Two affines are "the same grid" when every element differs by at most this much (absolute;
# mm for the translation column, mm per voxel for the 3x3 part). NIfTI-1 stores the sform rows
# (srow_x/y/z) and the qform quaternion as float32 (NIfTI-1 standard, nifti1.h), so a float64
# affine saved and re-read moves by float32 rounding: ~1e-5 mm at a 100 mm offset. 1e-3 mm is far
# above that rounding and far below any real misregistration (voxels are ~1 mm).
AFFINE_ATOL_MM = 1e-3

ROLES = ("control", "case")
RESERVED_COLUMNS = ("subject", "role", "mask", "lesion")
NORMALISATIONS = ("zscore",)
PLANE_CODES = {"axial": ("I", "S"), "coronal": ("A", "P"), "sagittal": ("L", "R")}
_GRID_FIX = "resample every scan onto the template grid first"


@dataclass(frozen=True)
class ManifestRow:
    """One manifest line; ``images`` maps contrast -> absolute path, in contrast order."""

    subject: str
    role: str
    images: dict[str, pathlib.Path]
    mask: pathlib.Path | None
    lesion: pathlib.Path | None


@dataclass(frozen=True, eq=False)
class Subject:
    """One subject's images on the grid, normalised.

    data: (C, X, Y, Z) float32, normalised inside ``mask``, 0 outside.
    mask: (X, Y, Z) bool.  lesion: (X, Y, Z) bool or None.  affine: (4, 4) float64.
    header: header of the first contrast (to copy sform/qform codes to outputs).
    stats: contrast -> {"mean", "std"} of the raw intensities inside the mask.
    """

    subject: str
    role: str
    data: np.ndarray
    mask: np.ndarray
    lesion: np.ndarray | None
    affine: np.ndarray
    header: nib.Nifti1Header
    stats: dict[str, dict[str, float]]


@dataclass(frozen=True, eq=False)
class Cohort:
    """All subjects of a manifest on one grid.

    data: (S, C, X, Y, Z) float32 normalised.  masks: (S, X, Y, Z) bool.
    mask: (X, Y, Z) bool, the cohort mask: voxels inside the masks of at least half of the
    controls (2 * count >= number of controls).  lesions: subject -> (X, Y, Z) bool, only where
    given.  affine: (4, 4) float64.  voxel_size: header zooms of the first three axes (mm).
    stats: subject -> contrast -> {"mean", "std"} of raw intensities inside that subject's mask.
    """

    subjects: tuple[str, ...]
    roles: tuple[str, ...]
    contrasts: tuple[str, ...]
    data: np.ndarray
    masks: np.ndarray
    mask: np.ndarray
    lesions: dict[str, np.ndarray]
    affine: np.ndarray
    header: nib.Nifti1Header
    voxel_size: tuple[float, float, float]
    stats: dict[str, dict[str, dict[str, float]]]
    normalisation: str
    manifest: pathlib.Path

    def indices(self, role: str) -> np.ndarray:
        """(K,) int64 indices of the subjects with ``role``, in manifest order."""
        if role not in ROLES:
            raise InputError(f"Cohort.indices: unknown role {role!r}; use one of {', '.join(ROLES)}")
        return np.array([i for i, r in enumerate(self.roles) if r == role], dtype=np.int64)


# ---------------------------------------------------------------------------------------------
# manifest


def read_manifest(path) -> tuple[list[ManifestRow], tuple[str, ...]]:
    """Read and check a manifest; return (rows, contrast names in column order)."""
    path = pathlib.Path(path).expanduser()
    if not path.is_file():
        raise CohortError(f"manifest {path} not found; give the path of an existing manifest.csv")
    with open(path, newline="", encoding="utf-8-sig") as f:
        lines = [(n, [c.strip() for c in cells]) for n, cells in enumerate(csv.reader(f), 1)]
    lines = [(n, cells) for n, cells in lines if any(cells)]
    if not lines:
        raise CohortError(f"manifest {path} is empty; write a header line 'subject,role,<contrast>...' and one line per subject")
    header_line, header = lines[0]
    found = ", ".join(header)
    for i, name in enumerate(header, 1):
        if not name:
            raise CohortError(f"manifest {path}: column {i} of the header has no name (found columns: {found}); name it or delete it")
    dups = sorted({h for h in header if header.count(h) > 1})
    if dups:
        raise CohortError(f"manifest {path}: column {dups[0]!r} appears more than once (found columns: {found}); keep one")
    for required in ("subject", "role"):
        if required not in header:
            raise CohortError(f"manifest {path} has no {required!r} column (found columns: {found}); add it to the header line")
    contrasts = tuple(h for h in header if h not in RESERVED_COLUMNS)
    if not contrasts:
        raise CohortError(f"manifest {path} has no contrast column (found columns: {found}); add one column per contrast, e.g. 'T1w'")
    base = path.resolve().parent

    def resolve(cell: str) -> pathlib.Path:
        p = pathlib.Path(cell).expanduser()
        return p if p.is_absolute() else base / p

    rows: list[ManifestRow] = []
    seen: dict[str, int] = {}
    for n, cells in lines[1:]:
        where = f"manifest {path}, line {n}"
        if len(cells) != len(header):
            raise CohortError(f"{where}: {len(cells)} cells but the header has {len(header)} columns; give every line one cell per column (empty cells allowed for mask/lesion)")
        cell = dict(zip(header, cells))
        subject, role = cell["subject"], cell["role"]
        if not subject:
            raise CohortError(f"{where}: empty 'subject' cell; give every line a subject id")
        where = f"{where} (subject {subject})"
        if subject in seen:
            raise CohortError(f"{where}: subject id {subject!r} already used on line {seen[subject]}; make subject ids unique")
        seen[subject] = n
        if role not in ROLES:
            raise CohortError(f"{where}: unknown role {role!r} in column 'role'; use 'control' or 'case'")
        images = {}
        for c in contrasts:
            if not cell[c]:
                raise CohortError(f"{where}: empty cell in contrast column {c!r}; give the path of the {c} image")
            images[c] = resolve(cell[c])
        rows.append(ManifestRow(
            subject=subject, role=role, images=images,
            mask=resolve(cell["mask"]) if cell.get("mask") else None,
            lesion=resolve(cell["lesion"]) if cell.get("lesion") else None,
        ))
    if not rows:
        raise CohortError(f"manifest {path} has a header line but no subjects; add one line per subject")
    return rows, contrasts


# ---------------------------------------------------------------------------------------------
# images


def load_image(path, what: str) -> nib.Nifti1Image:
    """Load a 3D NIfTI image with its data read into memory and checked.

    ``what`` names the image in messages (e.g. "T1w image of subject ctl01"). A trailing
    singleton 4th dimension (X, Y, Z, 1) is squeezed. The returned image caches its data as
    float32, so ``img.get_fdata(dtype=np.float32)`` does not read the file again.
    """
    path = pathlib.Path(path).expanduser()
    if not path.is_file():
        raise CohortError(f"{what}: file {path} not found; fix the path in the manifest (relative paths start at the manifest's folder)")
    try:
        img = nib.load(path)
        if not isinstance(img.header, nib.Nifti1Header):
            raise CohortError(f"{what}: {path} is a {type(img).__name__}, not a NIfTI image; convert it to NIfTI (.nii.gz)")
        shape = img.shape
        if len(shape) > 3 and all(s == 1 for s in shape[3:]):
            shape = shape[:3]
        if len(shape) != 3:
            raise CohortError(f"{what}: {path} has shape {tuple(img.shape)}, expected a 3D image (X, Y, Z); give one 3D volume per contrast")
        data = img.get_fdata(dtype=np.float32)  # reads the file; corrupt data fails here
    except (nib.filebasedimages.ImageFileError, nib.spatialimages.HeaderDataError, OSError, EOFError, zlib.error) as e:
        msg = " ".join(str(e).split()) or type(e).__name__
        raise CohortError(f"{what}: cannot read {path} ({type(e).__name__}: {msg}); the file is corrupt or not NIfTI, write it again") from None
    if data.shape != shape:
        img = type(img)(data.reshape(shape), img.affine, img.header)
        data = img.get_fdata(dtype=np.float32)  # fills the cache of the squeezed image
    bad = ~np.isfinite(data)
    if bad.any():
        first = tuple(int(i) for i in np.argwhere(bad)[0])
        raise CohortError(f"{what}: {path} has {int(bad.sum())} non-finite voxels (NaN or inf), the first at voxel {first}; replace them (e.g. by 0 outside the brain) before loading")
    return img


def derive_mask(data: np.ndarray, *, what: str = "image") -> np.ndarray:
    """Brain mask of skull-stripped data: (C, X, Y, Z) -> (X, Y, Z) bool.

    Rule: skull-stripped scans are exactly zero outside the brain (common practice, no source),
    so the mask is the voxels where every contrast is > 0, reduced to its largest 26-connected
    component (ties: the lowest label) with holes filled (scipy.ndimage.binary_fill_holes, 3D).
    """
    assert data.ndim == 4, data.shape
    positive = np.all(data > 0, axis=0)
    labels, n = ndimage.label(positive, structure=np.ones((3, 3, 3), dtype=bool))
    if n == 0:
        raise CohortError(f"{what}: no voxel is > 0 in every contrast, so no brain mask can be derived; give a mask file in the manifest's 'mask' column")
    sizes = np.bincount(labels.ravel())[1:]
    return ndimage.binary_fill_holes(labels == int(np.argmax(sizes)) + 1)


def _check_method(method: str) -> None:
    if method not in NORMALISATIONS:
        raise ConfigError(f"cohort.normalisation: unknown method {method!r}; use one of {', '.join(NORMALISATIONS)}")


def normalise(vol: np.ndarray, mask: np.ndarray, method: str = "zscore", *, what: str = "image") -> tuple[np.ndarray, dict[str, float]]:
    """Normalise one volume inside a mask.

    vol: (X, Y, Z) float; mask: (X, Y, Z) bool. Returns ((X, Y, Z) float32 with 0 outside the
    mask, {"mean", "std"} of the raw voxels inside the mask, float64 accumulation, ddof=0).
    """
    _check_method(method)
    if vol.shape != mask.shape:
        raise CohortError(f"{what}: volume shape {vol.shape} differs from mask shape {mask.shape}; {_GRID_FIX}")
    inside = vol[mask].astype(np.float64)
    if inside.size == 0:
        raise CohortError(f"{what}: the mask is empty; give a mask with at least one brain voxel")
    mean, std = float(inside.mean()), float(inside.std())
    if std == 0.0:
        raise CohortError(f"{what}: intensity is constant ({mean:g}) inside the mask (std 0), cannot z-score; check that the file holds a real scan")
    out = np.zeros(vol.shape, dtype=np.float32)
    out[mask] = ((inside - mean) / std).astype(np.float32)
    return out, {"mean": mean, "std": std}


def _codes(affine: np.ndarray) -> str:
    return "".join(c or "?" for c in nib.aff2axcodes(affine))


def _fmt(affine: np.ndarray) -> str:
    return np.array2string(np.asarray(affine), precision=4, suppress_small=True, separator=",",
                           max_line_width=10**6).replace("\n", "").replace(" ", "")


def _check_grid(img, path, what: str, ref_affine: np.ndarray, ref_shape: tuple, ref_name: str) -> None:
    """Raise CohortError unless ``img`` has ``ref_shape`` and an affine within AFFINE_ATOL_MM."""
    if tuple(img.shape) != tuple(ref_shape):
        raise CohortError(f"{what}: {path} has shape {tuple(img.shape)}, expected {tuple(ref_shape)} as in {ref_name}; {_GRID_FIX}")
    diff = float(np.max(np.abs(img.affine - ref_affine)))
    if not diff <= AFFINE_ATOL_MM:
        found, expected = _codes(img.affine), _codes(ref_affine)
        orient = f"; orientation {found} vs {expected}" if found != expected else ""
        raise CohortError(f"{what}: {path} has an affine that differs from {ref_name} by up to {diff:.4g} (tolerance AFFINE_ATOL_MM={AFFINE_ATOL_MM:g}{orient}): expected {_fmt(ref_affine)}, found {_fmt(img.affine)}; {_GRID_FIX}")


def load_subject(images: dict, *, subject: str = "case", role: str = "case", mask=None, lesion=None,
                 normalisation: str = "zscore", reference: tuple | None = None,
                 reference_name: str = "the reference grid") -> Subject:
    """Load, check and normalise one subject.

    images: contrast -> path, in contrast order. reference: (affine (4, 4), shape (X, Y, Z)) that
    every image must match; without it the first contrast sets the grid. mask: path (nonzero =
    brain) or None (derive_mask). lesion: path (nonzero = lesion) or None.
    """
    if not images:
        raise CohortError(f"subject {subject}: no images given; give at least one contrast")
    _check_method(normalisation)  # fail before reading any file
    ref = None
    if reference is not None:
        ref = (np.asarray(reference[0], dtype=np.float64), tuple(int(s) for s in reference[1]))
    raw, header = [], None
    for contrast, path in images.items():
        what = f"{contrast} image of subject {subject}"
        img = load_image(path, what)
        if ref is None:
            ref, reference_name = (img.affine, tuple(img.shape)), f"the {what} ({path})"
        _check_grid(img, path, what, *ref, reference_name)
        if header is None:
            header, affine = img.header.copy(), img.affine.astype(np.float64)
        raw.append(img.get_fdata(dtype=np.float32))  # cached by load_image: no second read

    def read_label(path, kind: str) -> np.ndarray:
        what = f"{kind} of subject {subject}"
        img = load_image(path, what)
        _check_grid(img, path, what, *ref, reference_name)
        return img.get_fdata(dtype=np.float32) != 0

    if mask is not None:
        mask_arr = read_label(mask, "mask")
        if not mask_arr.any():
            raise CohortError(f"mask of subject {subject}: {mask} has no nonzero voxel; give a brain mask (nonzero = brain) or leave the cell empty to derive one")
    else:
        mask_arr = derive_mask(np.stack(raw), what=f"subject {subject}")
    lesion_arr = read_label(lesion, "lesion mask") if lesion is not None else None

    data = np.empty((len(raw),) + ref[1], dtype=np.float32)
    stats = {}
    for c, (contrast, vol) in enumerate(zip(images, raw)):
        data[c], stats[contrast] = normalise(vol, mask_arr, normalisation,
                                             what=f"{contrast} image of subject {subject} ({images[contrast]})")
    return Subject(subject=subject, role=role, data=data, mask=mask_arr, lesion=lesion_arr,
                   affine=affine, header=header, stats=stats)


def load_cohort(manifest, *, normalisation: str = "zscore", min_controls: int = 3, progress: bool = True) -> Cohort:
    """Read a manifest and load every subject onto the grid of the first subject."""
    if min_controls < 1:
        raise ConfigError(f"cohort.min_controls: got {min_controls}, need at least 1; set it to 3 or more")
    rows, contrasts = read_manifest(manifest)
    manifest = pathlib.Path(manifest).expanduser().resolve()
    n_controls = sum(r.role == "control" for r in rows)
    if n_controls < min_controls:
        raise CohortError(f"manifest {manifest}: {n_controls} controls found, at least {min_controls} needed; add healthy controls with role 'control'")
    data = masks = None
    reference, reference_name = None, "the reference grid"
    lesions, stats = {}, {}
    for s, row in enumerate(tqdm(rows, desc="load cohort", unit="subject", disable=not progress)):
        sub = load_subject(row.images, subject=row.subject, role=row.role, mask=row.mask, lesion=row.lesion,
                           normalisation=normalisation, reference=reference, reference_name=reference_name)
        if data is None:
            first = sub
            reference = (sub.affine, sub.mask.shape)
            reference_name = f"the grid of subject {sub.subject} (first in the manifest)"
            data = np.empty((len(rows),) + sub.data.shape, dtype=np.float32)
            masks = np.empty((len(rows),) + sub.mask.shape, dtype=bool)
        data[s], masks[s] = sub.data, sub.mask
        stats[row.subject] = sub.stats
        if sub.lesion is not None:
            lesions[row.subject] = sub.lesion
    roles = tuple(r.role for r in rows)
    controls = np.array([r == "control" for r in roles])
    cohort_mask = 2 * masks[controls].sum(axis=0, dtype=np.int64) >= n_controls
    if not cohort_mask.any():
        raise CohortError(f"manifest {manifest}: the masks of the {n_controls} controls share no voxel, so the cohort mask (voxels in at least half of the control masks) is empty; check the masks are on the template grid")
    return Cohort(
        subjects=tuple(r.subject for r in rows), roles=roles, contrasts=contrasts, data=data,
        masks=masks, mask=cohort_mask, lesions=lesions, affine=first.affine, header=first.header,
        voxel_size=tuple(float(z) for z in first.header.get_zooms()[:3]), stats=stats,
        normalisation=normalisation, manifest=manifest,
    )


def plane_axis(affine: np.ndarray, plane: str) -> int:
    """Voxel axis held fixed by a 2D patch in ``plane`` (from nib.aff2axcodes).

    "axial" -> the voxel axis along I/S, "coronal" -> A/P, "sagittal" -> L/R.
    """
    if plane not in PLANE_CODES:
        raise ConfigError(f"patch.plane: unknown plane {plane!r}; use one of {', '.join(PLANE_CODES)}")
    codes = nib.aff2axcodes(affine)
    for axis, code in enumerate(codes):
        if code in PLANE_CODES[plane]:
            return axis
    raise CohortError(f"affine {_fmt(affine)} has no voxel axis along {'/'.join(PLANE_CODES[plane])} (axis codes {codes}); give images with a non-degenerate affine")

"""Cohort loading and validation: NIfTI images, grid checks, masks, normalisation.

The manifest (:mod:`embed.manifest`, re-exported here) lists the scans. Every scan must already be
on one template grid (same shape and affine), skull-stripped, bias-corrected and co-registered
across contrasts.

:func:`load_cohort` holds the cohort in RAM as float32 and stops at the first problem; for a large
cohort use :func:`embed.cache.prepare` (every problem reported at once, arrays memory-mapped from
disk) and :func:`embed.cache.load_cache`. Normalisation methods live in :mod:`embed.normalise`.
"""

from __future__ import annotations

import dataclasses
import pathlib
import zlib
from dataclasses import dataclass

import nibabel as nib
import numpy as np
from scipy import ndimage
from tqdm import tqdm

from . import normalise as _norm
from .errors import CohortError, ConfigError, InputError
from .manifest import RESERVED_COLUMNS, ROLES, ManifestRow, Problem, read_manifest  # noqa: F401 (re-exported)

# Two affines are "the same grid" when every element differs by at most this much (absolute;
# mm for the translation column, mm per voxel for the 3x3 part). NIfTI-1 stores the sform rows
# (srow_x/y/z) and the qform quaternion as float32 (NIfTI-1 standard, nifti1.h), so a float64
# affine saved and re-read moves by float32 rounding: ~1e-5 mm at a 100 mm offset. 1e-3 mm is far
# above that rounding and far below any real misregistration (voxels are ~1 mm).
AFFINE_ATOL_MM = 1e-3

NORMALISATIONS = _norm.METHODS
PLANE_CODES = {"axial": ("I", "S"), "coronal": ("A", "P"), "sagittal": ("L", "R")}
_GRID_FIX = "resample every scan onto the template grid first"


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
    stats: subject -> contrast -> {"mean", "std"} of raw intensities inside that subject's mask
    (plus "landmarks", its raw percentiles, with ``histogram`` normalisation).
    normalisation_params: the parameters that reproduce the normalisation on a new subject
    (see :mod:`embed.normalise`; put them in a bundle card). cache: the cohort cache folder when
    the cohort was read by :func:`embed.cache.load_cache` (then ``data`` and ``masks`` are
    read-only ``np.memmap`` arrays), else None.
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
    normalisation_params: dict | None = None
    cache: pathlib.Path | None = None

    def indices(self, role: str) -> np.ndarray:
        """(K,) int64 indices of the subjects with ``role``, in manifest order."""
        if role not in ROLES:
            raise InputError(f"Cohort.indices: unknown role {role!r}; use one of {', '.join(ROLES)}")
        return np.array([i for i, r in enumerate(self.roles) if r == role], dtype=np.int64)


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


def _check_method(method) -> None:
    if isinstance(method, dict):
        return  # stored parameters: checked by normalise.check_params where they are used
    _norm.check_method(method)


def normalise(vol: np.ndarray, mask: np.ndarray, method: str = "zscore", *, what: str = "image") -> tuple[np.ndarray, dict[str, float]]:
    """Normalise one volume inside a mask (z-score; histogram standardisation needs learned
    landmarks: use :func:`embed.normalise.normalise_with`).

    vol: (X, Y, Z) float; mask: (X, Y, Z) bool. Returns ((X, Y, Z) float32 with 0 outside the
    mask, {"mean", "std"} of the raw voxels inside the mask, float64 accumulation, ddof=0).
    """
    _check_method(method)
    if method != "zscore":
        raise ConfigError(f"cohort.normalisation: method {method!r} needs landmarks learned on the controls; "
                          "use load_cohort / prepare, or normalise_with(vol, mask, params, contrast) with stored parameters")
    return _norm.zscore(vol, mask, what=what)


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


def read_subject(images: dict, *, subject: str = "case", mask=None, lesion=None, reference: tuple | None = None,
                 reference_name: str = "the reference grid") -> tuple:
    """Load and check one subject's raw images, without normalising.

    Returns (raw: (C, X, Y, Z) float32, mask: (X, Y, Z) bool, lesion: (X, Y, Z) bool or None,
    affine: (4, 4) float64, header of the first contrast). See :func:`load_subject`.
    """
    if not images:
        raise CohortError(f"subject {subject}: no images given; give at least one contrast")
    ref = None
    if reference is not None:
        ref = (np.asarray(reference[0], dtype=np.float64), tuple(int(s) for s in reference[1]))
    raw, header = None, None
    for c, (contrast, path) in enumerate(images.items()):
        what = f"{contrast} image of subject {subject}"
        img = load_image(path, what)
        if ref is None:
            ref, reference_name = (img.affine, tuple(img.shape)), f"the {what} ({path})"
        _check_grid(img, path, what, *ref, reference_name)
        if header is None:
            header, affine = img.header.copy(), img.affine.astype(np.float64)
            raw = np.empty((len(images),) + ref[1], dtype=np.float32)
        raw[c] = img.get_fdata(dtype=np.float32)  # cached by load_image: no second read
        del img

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
        mask_arr = derive_mask(raw, what=f"subject {subject}")
    lesion_arr = read_label(lesion, "lesion mask") if lesion is not None else None
    return raw, mask_arr, lesion_arr, affine, header


def load_subject(images: dict, *, subject: str = "case", role: str = "case", mask=None, lesion=None,
                 normalisation: str | dict = "zscore", reference: tuple | None = None,
                 reference_name: str = "the reference grid") -> Subject:
    """Load, check and normalise one subject.

    images: contrast -> path, in contrast order. reference: (affine (4, 4), shape (X, Y, Z)) that
    every image must match; without it the first contrast sets the grid. mask: path (nonzero =
    brain) or None (derive_mask). lesion: path (nonzero = lesion) or None. normalisation:
    "zscore", or stored parameters (a dict, see :mod:`embed.normalise`, e.g. a bundle card's
    ``normalisation`` or ``Cohort.normalisation_params``) to normalise exactly as the cohort was.
    """
    if not images:
        raise CohortError(f"subject {subject}: no images given; give at least one contrast")
    _check_method(normalisation)  # fail before reading any file
    params = normalisation if isinstance(normalisation, dict) else None
    if params is None and normalisation != "zscore":
        raise ConfigError(f"cohort.normalisation: method {normalisation!r} needs landmarks learned on the controls; "
                          "pass the stored parameters (a cache's or bundle card's 'normalisation' dict) instead of the name")
    if params is not None:
        _norm.check_params(params, tuple(images), f"subject {subject}: normalisation")
    raw, mask_arr, lesion_arr, affine, header = read_subject(
        images, subject=subject, mask=mask, lesion=lesion, reference=reference, reference_name=reference_name)
    stats = {}
    for c, contrast in enumerate(images):
        what = f"{contrast} image of subject {subject} ({images[contrast]})"
        if params is None:
            raw[c], stats[contrast] = _norm.zscore(raw[c], mask_arr, what=what)
        else:
            raw[c], stats[contrast] = _norm.normalise_with(raw[c], mask_arr, params, contrast, what=what)
    return Subject(subject=subject, role=role, data=raw, mask=mask_arr, lesion=lesion_arr,
                   affine=affine, header=header, stats=stats)


def cohort_mask(counts: np.ndarray, n_controls: int, where: str) -> np.ndarray:
    """The cohort mask from per-voxel counts of control masks: (X, Y, Z) int -> (X, Y, Z) bool.

    Rule: voxels inside the masks of at least half of the controls (2 * count >= n_controls).
    """
    mask = 2 * counts.astype(np.int64) >= n_controls
    if not mask.any():
        raise CohortError(f"{where}: the masks of the {n_controls} controls share no voxel, so the cohort mask (voxels in at least half of the control masks) is empty; check the masks are on the template grid")
    return mask


def load_cohort(manifest, *, normalisation: str = "zscore", min_controls: int = 3, progress: bool = True) -> Cohort:
    """Read a manifest and load every subject onto the grid of the first subject (held in RAM).

    normalisation: "zscore" or "histogram" (landmarks learned on the manifest's controls).
    """
    if min_controls < 1:
        raise ConfigError(f"cohort.min_controls: got {min_controls}, need at least 1; set it to 3 or more")
    _norm.check_method(normalisation)
    rows, contrasts = read_manifest(manifest)
    manifest = pathlib.Path(manifest).expanduser().resolve()
    n_controls = sum(r.role == "control" for r in rows)
    if n_controls < min_controls:
        raise CohortError(f"manifest {manifest}: {n_controls} controls found, at least {min_controls} needed; add healthy controls with role 'control'")
    data = masks = None
    reference, reference_name = None, "the reference grid"
    lesions, marks = {}, {}
    for s, row in enumerate(tqdm(rows, desc="load cohort", unit="subject", disable=not progress)):
        raw, mask, lesion, affine, header = read_subject(
            row.images, subject=row.subject, mask=row.mask, lesion=row.lesion, reference=reference,
            reference_name=reference_name)
        if data is None:
            first_affine, first_header = affine, header
            reference = (affine, mask.shape)
            reference_name = f"the grid of subject {row.subject} (first in the manifest)"
            data = np.empty((len(rows),) + raw.shape, dtype=np.float32)
            masks = np.empty((len(rows),) + mask.shape, dtype=bool)
        data[s], masks[s] = raw, mask
        if lesion is not None:
            lesions[row.subject] = lesion
        if normalisation == "histogram":
            for c, contrast in enumerate(contrasts):
                what = f"{contrast} image of subject {row.subject} ({row.images[contrast]})"
                marks[row.subject, contrast] = _norm.landmarks(raw[c], mask, what=what)
                _norm.check_increasing(marks[row.subject, contrast], what)
    roles = tuple(r.role for r in rows)
    controls = np.array([r == "control" for r in roles])
    mask = cohort_mask(masks[controls].sum(axis=0, dtype=np.int64), n_controls, f"manifest {manifest}")
    params = _norm.zscore_params()
    if normalisation == "histogram":
        standard = {c: _norm.learn_standard(np.stack([marks[r.subject, c] for r in rows if r.role == "control"]))
                    for c in contrasts}
        params = _norm.histogram_params(standard, n_controls)
    stats = {}
    for s, row in enumerate(rows):
        stats[row.subject] = {}
        for c, contrast in enumerate(contrasts):
            what = f"{contrast} image of subject {row.subject} ({row.images[contrast]})"
            data[s, c], stats[row.subject][contrast] = _norm.normalise_with(data[s, c], masks[s], params, contrast, what=what)
    return Cohort(
        subjects=tuple(r.subject for r in rows), roles=roles, contrasts=contrasts, data=data,
        masks=masks, mask=mask, lesions=lesions, affine=first_affine, header=first_header,
        voxel_size=tuple(float(z) for z in first_header.get_zooms()[:3]), stats=stats,
        normalisation=normalisation, manifest=manifest, normalisation_params=params,
    )


def select_contrasts(cohort: Cohort, names) -> Cohort:
    """The cohort restricted to the contrasts ``names`` (in that order); ``()`` keeps every contrast.

    One contrast, or a run of neighbouring ones in order, is a view of ``cohort.data`` (a memory-mapped
    cache stays on disk); other selections copy it.
    """
    names = tuple(names)
    if not names or names == tuple(cohort.contrasts):
        return cohort
    missing = [n for n in names if n not in cohort.contrasts]
    if missing:
        raise ConfigError(f"cohort.contrasts: {missing[0]!r} is not a contrast of the cohort "
                          f"({', '.join(cohort.contrasts)}); pick among those names")
    idx = [cohort.contrasts.index(n) for n in names]
    if idx == list(range(idx[0], idx[0] + len(idx))):
        data = cohort.data[:, idx[0]:idx[0] + len(idx)]
    else:
        data = np.ascontiguousarray(cohort.data[:, idx])
    stats = {s: {c: v for c, v in st.items() if c in names} for s, st in cohort.stats.items()}
    return dataclasses.replace(cohort, contrasts=names, data=data, stats=stats)


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

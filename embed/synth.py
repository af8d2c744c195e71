"""Synthetic cohorts on the MNI152 2009 grid, and subtle-lesion injection (demo data and bench).

Every subject is built from the MNI152 2009 templates bundled with nilearn (no network): the grey-
and white-matter probability maps and the brain mask are warped by a smooth random displacement
(RMS 1-2 mm), tissue fractions are turned into a T1-weighted-like and a FLAIR-like image, then a
multiplicative smooth bias field (+-5-10 %) and Gaussian noise (2.5 % of the subject's WM value)
are applied. Images are zero outside the brain mask and strictly positive inside it.

Nominal tissue intensities (arbitrary units; each subject draws its own, relative jitter sd 3 %,
clipped at 2 sd):

    contrast   WM     GM     CSF
    T1w        1.00   0.62   0.25
    FLAIR      0.60   0.78   0.12

Lesions (cases) are injected into the tissue maps / FLAIR gain before bias and noise, centred on
a grey-white boundary voxel (GM and WM both in 0.2..0.8). Their weight ``w`` is flat (1) up to
r = R/2 and falls as a raised cosine to 0 at r = R; the ground-truth mask is the 6-connected part,
holding the centre, of voxels with w >= 0.5 (r <= 3R/4) inside the brain mask. Kinds:
``thickening`` (WM within t voxels of GM turns into GM, t in 1..2), ``blurring`` (tissue maps blended
with a Gaussian-smoothed copy, sigma 1..2 voxels, weight w), ``flair`` (FLAIR x (1 + a w), a in
0.05..0.25) and ``mixed`` (blurring + flair).
"""

from __future__ import annotations

import csv
import functools
import io
import json
import pathlib
from dataclasses import dataclass

import nibabel as nib
import numpy as np
from scipy import ndimage
from tqdm import tqdm

from . import __version__
from .errors import InputError
from .files import atomic

CONTRASTS = ("T1w", "FLAIR")
TISSUES = ("gm", "wm", "csf")
LESION_KINDS = ("thickening", "blurring", "flair", "mixed")
NOMINAL_INTENSITY = {"T1w": {"wm": 1.00, "gm": 0.62, "csf": 0.25},
                     "FLAIR": {"wm": 0.60, "gm": 0.78, "csf": 0.12}}
INTENSITY_JITTER = 0.03        # sd of the per-subject relative intensity jitter
WARP_RMS_MM = (1.0, 2.0)       # RMS displacement of the random warp
WARP_SPACING_MM = 20.0         # node spacing of the coarse lattice the warp is drawn on
BIAS_RANGE = (0.05, 0.10)      # max |log bias| inside the brain
BIAS_SPACING_MM = 60.0
NOISE_FRACTION = 0.025         # noise sd as a fraction of the subject's WM intensity
RADIUS_MM = (3.0, 10.0)
MIN_RADIUS_VOX = 1.5           # radius clipped up to this so coarse grids still get a lesion
FLAIR_GAIN = (0.05, 0.25)
BLUR_SIGMA_VOX = (1.0, 2.0)
THICKENING_VOX = (1.0, 2.0)
VOXEL_SIZES = (1, 2, 3, 4)     # mm; integer resolutions nilearn resamples the templates to
EPSILON = 1e-3                 # floor of image values inside the brain
NIFTI_XFORM_MNI_152 = 4        # NIfTI-1 standard xform code
MANIFEST_COLUMNS = ("subject", "role", *CONTRASTS, "mask", "lesion")


@dataclass(frozen=True)
class Template:
    """MNI152 2009 priors on one grid. gm, wm: (X, Y, Z) float32 in [0, 1]; mask: (X, Y, Z) float32
    0/1; affine: (4, 4) float64; voxel_size in mm. Arrays are read-only (shared by a cache)."""
    gm: np.ndarray
    wm: np.ndarray
    mask: np.ndarray
    affine: np.ndarray
    voxel_size: int


@dataclass(frozen=True)
class Lesion:
    """One lesion. centre_vox: voxel index; radius_vox: where w reaches 0; flair_gain: a in
    FLAIR x (1 + a w); blur_sigma_vox; thickening_vox. A parameter the kind does not use is 0."""
    kind: str
    centre_vox: tuple[int, int, int]
    radius_vox: float
    flair_gain: float = 0.0
    blur_sigma_vox: float = 0.0
    thickening_vox: float = 0.0


@dataclass(frozen=True)
class Subject:
    """One synthetic subject. images: contrast -> (X, Y, Z) float32; mask, lesion_mask: (X, Y, Z)
    bool; lesions: one record (dict) per lesion; params: the subject's drawn anatomy/contrast values."""
    images: dict
    mask: np.ndarray
    lesion_mask: np.ndarray
    lesions: tuple
    params: dict


@functools.lru_cache(maxsize=4)
def load_template(voxel_size: int) -> Template:
    """The MNI152 2009 GM, WM and brain-mask templates nilearn ships, at ``voxel_size`` mm."""
    from nilearn import datasets

    res = int(voxel_size)
    imgs = [f(resolution=res) for f in (datasets.load_mni152_gm_template,
                                        datasets.load_mni152_wm_template,
                                        datasets.load_mni152_brain_mask)]
    gm, wm, mask = (np.clip(np.asarray(im.get_fdata(), dtype=np.float32), 0, 1) for im in imgs)
    affine = np.array(imgs[0].affine, dtype=np.float64)
    for a in (gm, wm, mask, affine):
        a.setflags(write=False)
    return Template(gm=gm, wm=wm, mask=mask, affine=affine, voxel_size=res)


def _cubic_bspline_matrix(n_out: int, n_nodes: int) -> np.ndarray:
    """(n_out, n_nodes + 2) float64: cubic B-spline basis on nodes -1..n_nodes spanning n_out samples."""
    u = np.linspace(0.0, n_nodes - 1.0, n_out)[:, None] - np.arange(-1, n_nodes + 1)[None, :]
    a = np.abs(u)
    return np.where(a < 1, 2 / 3 - a ** 2 + a ** 3 / 2, np.where(a < 2, (2 - a) ** 3 / 6, 0.0))


def smooth_field(shape: tuple, spacing_vox: float, n: int, rng: np.random.Generator) -> np.ndarray:
    """``n`` smooth random fields, (n, X, Y, Z) float64, each with mean 0 and sd 1: Gaussian
    coefficients of a cubic B-spline on a coarse lattice (a node every ``spacing_vox`` voxels)."""
    nodes = [max(3, int(np.ceil(s / spacing_vox)) + 1) for s in shape]
    basis = [_cubic_bspline_matrix(s, k) for s, k in zip(shape, nodes)]
    out = np.empty((n, *shape))
    for c in range(n):
        f = rng.standard_normal([k + 2 for k in nodes])
        for b in basis:  # contract the leading coefficient axis; the sampled axis moves to the back
            f = np.tensordot(f, b, axes=([0], [1]))
        assert f.shape == tuple(shape), (f.shape, shape)
        out[c] = (f - f.mean()) / f.std()
    return out


def warp_template(template: Template, rng: np.random.Generator) -> tuple[dict, np.ndarray, float]:
    """Warp the priors by a smooth random displacement (RMS drawn in WARP_RMS_MM, trilinear).

    Returns (tissue: {'gm','wm','csf'} -> (X, Y, Z) float64 in [0, 1], zero outside the mask and
    summing to 1 inside; mask: (X, Y, Z) bool, the warped template mask > 0.5; rms_mm)."""
    shape, vs = template.gm.shape, template.voxel_size
    rms_mm = float(rng.uniform(*WARP_RMS_MM))
    disp = smooth_field(shape, WARP_SPACING_MM / vs, 3, rng)
    disp *= (rms_mm / vs) / np.sqrt((disp ** 2).sum(axis=0).mean())
    coords = np.indices(shape, dtype=np.float64) + disp
    warp = functools.partial(ndimage.map_coordinates, coordinates=coords, output=np.float64, order=1,
                             mode="constant", cval=0.0)
    mask = warp(template.mask) > 0.5
    gm = np.clip(warp(template.gm), 0, 1) * mask
    wm = np.clip(warp(template.wm), 0, 1) * mask
    total = gm + wm
    scale = np.where(total > 1, 1 / np.maximum(total, 1), 1.0)
    gm, wm = gm * scale, wm * scale
    csf = np.clip(1 - gm - wm, 0, 1) * mask
    return {"gm": gm, "wm": wm, "csf": csf}, mask, rms_mm


def render(tissue: dict, intensity: dict) -> np.ndarray:
    """Noise-free image (X, Y, Z) float64: sum over tissues of fraction x intensity."""
    return sum(tissue[k] * intensity[k] for k in TISSUES)


def lesion_weight(shape: tuple, centre_vox, radius_vox: float) -> np.ndarray:
    """(X, Y, Z) float64 weight: 1 for r <= R/2, raised cosine down to 0 at r = R, 0 beyond."""
    grids = np.ogrid[tuple(slice(0, s) for s in shape)]
    r = np.sqrt(sum((g - c) ** 2.0 for g, c in zip(grids, centre_vox)))
    t = np.clip((r - radius_vox / 2) / (radius_vox / 2), 0, 1)
    return 0.5 * (1 + np.cos(np.pi * t))


def _ball(radius: int) -> np.ndarray:
    g = np.mgrid[(slice(-radius, radius + 1),) * 3]
    return (g ** 2).sum(axis=0) <= radius ** 2


def inject_lesion(tissue: dict, flair_gain: np.ndarray, mask: np.ndarray,
                  lesion: Lesion) -> tuple[dict, np.ndarray, np.ndarray]:
    """Inject one lesion; pure (the inputs are not modified).

    tissue: {'gm','wm','csf'} -> (X, Y, Z) float in [0, 1]; flair_gain: (X, Y, Z) float multiplier
    of the FLAIR image (1 = unchanged); mask: (X, Y, Z) bool brain mask holding the lesion
    centre. Returns (new tissue, new flair_gain, lesion_mask: (X, Y, Z) bool, never empty)."""
    mask = np.asarray(mask, dtype=bool)
    shape = mask.shape
    if lesion.kind not in LESION_KINDS:
        raise InputError(f"lesion kind {lesion.kind!r} is unknown; use one of {', '.join(LESION_KINDS)}")
    bad = [k for k in TISSUES if k not in tissue or np.shape(tissue[k]) != shape]
    if bad or np.shape(flair_gain) != shape:
        raise InputError(f"tissue maps {bad or ''} / flair_gain do not match the mask shape {shape}; "
                         "pass (X, Y, Z) arrays on one grid for 'gm', 'wm', 'csf' and flair_gain")
    c = tuple(int(v) for v in lesion.centre_vox)
    if len(c) != 3 or not all(0 <= v < s for v, s in zip(c, shape)) or not mask[c]:
        raise InputError(f"lesion centre {c} is outside the grid {shape} or the brain mask; "
                         "pick a voxel inside the mask")
    w = lesion_weight(shape, c, lesion.radius_vox)
    reach = lesion.radius_vox + 4 * lesion.blur_sigma_vox + lesion.thickening_vox + 2
    box = tuple(slice(max(0, int(v - reach)), min(s, int(v + reach) + 1)) for s, v in zip(shape, c))
    wb, mb = w[box], mask[box]
    new = {k: np.array(tissue[k], dtype=np.float64) for k in TISSUES}
    gain = np.array(flair_gain, dtype=np.float64)
    if lesion.kind == "thickening":
        gm, wm, t = new["gm"][box], new["wm"][box], lesion.thickening_vox
        lo, hi = int(np.floor(t)), int(np.ceil(t))
        erode = [wm if k == 0 else ndimage.grey_erosion(wm, footprint=_ball(k)) for k in (lo, hi)]
        eroded = (1 - (t - lo)) * erode[0] + (t - lo) * erode[1]
        near_gm = np.clip(2 * ndimage.grey_dilation(gm, footprint=_ball(max(hi, 1))), 0, 1)
        moved = wb * near_gm * (wm - eroded)
        new["gm"][box], new["wm"][box] = gm + moved, wm - moved
    if lesion.kind in ("blurring", "mixed"):
        for k in TISSUES:
            part = new[k][box]
            smooth = ndimage.gaussian_filter(part, lesion.blur_sigma_vox, mode="nearest")
            new[k][box] = ((1 - wb) * part + wb * smooth) * mb
    if lesion.kind in ("flair", "mixed"):
        gain[box] *= 1 + lesion.flair_gain * wb
    labels, _ = ndimage.label((w >= 0.5) & mask)
    lesion_mask = labels == labels[c]
    assert lesion_mask[c] and lesion_mask.any()
    return new, gain, lesion_mask


def lesion_sites(tissue: dict, mask: np.ndarray, margin: int) -> np.ndarray:
    """(X, Y, Z) bool: grey-white boundary voxels (GM and WM fractions both in 0.2..0.8) inside
    ``mask`` and at least ``margin`` voxels from the grid edge: where lesions are centred."""
    gm, wm = tissue["gm"], tissue["wm"]
    cand = mask & (gm >= 0.2) & (gm <= 0.8) & (wm >= 0.2) & (wm <= 0.8)
    inner = np.zeros_like(cand)
    inner[tuple(slice(margin, s - margin) for s in cand.shape)] = True
    return cand & inner


def pick_site(cand: np.ndarray, rng: np.random.Generator, what: str, margin: int) -> tuple[int, int, int]:
    """One voxel of ``cand`` drawn uniformly; InputError when there is none."""
    idx = np.flatnonzero(cand)
    if idx.size == 0:
        raise InputError(f"no room for {what}: no grey-white boundary voxel (GM and WM both "
                         f"in 0.2..0.8) at least {margin} voxels from the grid edge and other lesions; "
                         "use fewer or smaller lesions or a finer grid")
    return tuple(int(v) for v in np.unravel_index(idx[rng.integers(idx.size)], cand.shape))


def draw_lesion(tissue: dict, mask: np.ndarray, kind: str, voxel_size: float, rng: np.random.Generator,
                placed: tuple = ()) -> tuple[Lesion, float]:
    """Draw a lesion of ``kind`` on a grey-white boundary voxel (GM and WM both in 0.2..0.8) at a
    safe distance from the grid edge and from the ``placed`` lesions. Returns (lesion, radius_mm
    as drawn, before clipping up to MIN_RADIUS_VOX voxels)."""
    radius_mm = float(rng.uniform(*RADIUS_MM))
    radius_vox = max(radius_mm / voxel_size, MIN_RADIUS_VOX)
    a, sigma, t = (float(rng.uniform(*r)) for r in (FLAIR_GAIN, BLUR_SIGMA_VOX, THICKENING_VOX))
    margin = int(np.ceil(radius_vox + 4 * sigma + t)) + 1
    cand = lesion_sites(tissue, mask, margin)
    for other in placed:
        cand &= lesion_weight(cand.shape, other.centre_vox, other.radius_vox + radius_vox) == 0
    centre = pick_site(cand, rng, f"a {kind!r} lesion", margin)
    lesion = Lesion(kind=kind, centre_vox=centre, radius_vox=radius_vox,
                    flair_gain=a if kind in ("flair", "mixed") else 0.0,
                    blur_sigma_vox=sigma if kind in ("blurring", "mixed") else 0.0,
                    thickening_vox=t if kind == "thickening" else 0.0)
    return lesion, radius_mm


def make_subject(template: Template, rng: np.random.Generator, lesion_kinds: tuple = (),
                 lesion_rng: np.random.Generator | None = None) -> Subject:
    """One subject; ``rng`` draws anatomy, contrast, bias and noise, ``lesion_rng`` the lesions only,
    so the same ``rng`` with and without lesions gives the same subject apart from the lesions."""
    if lesion_kinds and lesion_rng is None:
        raise InputError(f"lesion kinds {list(lesion_kinds)} given without lesion_rng; pass a np.random.Generator")
    shape, vs = template.gm.shape, template.voxel_size
    tissue, mask, rms_mm = warp_template(template, rng)
    jitter = {c: {k: float(np.clip(rng.standard_normal(), -2, 2)) for k in TISSUES} for c in CONTRASTS}
    intensity = {c: {k: NOMINAL_INTENSITY[c][k] * (1 + INTENSITY_JITTER * jitter[c][k]) for k in TISSUES}
                 for c in CONTRASTS}
    bias_amp = {c: float(rng.uniform(*BIAS_RANGE)) for c in CONTRASTS}
    log_bias = smooth_field(shape, BIAS_SPACING_MM / vs, len(CONTRASTS), rng)
    noise = rng.standard_normal((len(CONTRASTS), *shape))
    gain = np.ones(shape)
    lesion_mask = np.zeros(shape, dtype=bool)
    placed, records = [], []
    for kind in lesion_kinds:
        lesion, drawn_mm = draw_lesion(tissue, mask, kind, vs, lesion_rng, tuple(placed))
        tissue, gain, one = inject_lesion(tissue, gain, mask, lesion)
        placed.append(lesion)
        lesion_mask |= one
        records.append(_lesion_record(lesion, drawn_mm, int(one.sum()), template))
    images = {}
    for i, c in enumerate(CONTRASTS):
        lb = log_bias[i] * (bias_amp[c] / np.abs(log_bias[i][mask]).max())
        clean = render(tissue, intensity[c]) * (gain if c == "FLAIR" else 1.0)
        img = clean * np.exp(lb) + NOISE_FRACTION * intensity[c]["wm"] * noise[i]
        images[c] = np.where(mask, np.maximum(img, EPSILON), 0.0).astype(np.float32)
    params = {"warp_rms_mm": rms_mm, "intensity": intensity, "bias_max_log": bias_amp}
    return Subject(images=images, mask=mask, lesion_mask=lesion_mask, lesions=tuple(records), params=params)


def _lesion_record(lesion: Lesion, drawn_mm: float, n_voxels: int, template: Template) -> dict:
    vs, centre_mm = template.voxel_size, template.affine @ np.array([*lesion.centre_vox, 1.0])
    return {"kind": lesion.kind, "centre_vox": list(lesion.centre_vox),
            "centre_mm": [float(v) for v in centre_mm[:3]],
            "radius_mm": lesion.radius_vox * vs, "radius_mm_drawn": drawn_mm,
            "flair_gain": lesion.flair_gain, "blur_sigma_vox": lesion.blur_sigma_vox,
            "blur_sigma_mm": lesion.blur_sigma_vox * vs, "thickening_vox": lesion.thickening_vox,
            "thickening_mm": lesion.thickening_vox * vs, "n_voxels": n_voxels}


README_TEXT = """# Demo cohort: Larchmont Valley Imaging Centre (synthetic)

The Larchmont Valley Imaging Centre is a fictional site. In this made-up scenario it scanned
healthy volunteers and a few patients on one 3 T scanner, with a T1-weighted and a FLAIR image
per person. Every scan was registered to the MNI152 2009 template grid, skull-stripped,
bias-corrected (imperfectly: a residual bias field remains) and co-registered.
Patients carry subtle lesions with ground-truth masks.

Everything here is synthetic and for demonstration only: no person was scanned. Each subject is
built from the MNI152 2009 templates bundled with nilearn, warped by a smooth random deformation,
given per-subject tissue contrasts, a smooth bias field and Gaussian noise.
Patients receive focal cortical thickening, grey-white blurring, a mild FLAIR hyperintensity, or
blurring plus FLAIR hyperintensity.

Files:

- `manifest.csv`: one row per subject (`subject,role,T1w,FLAIR,mask,lesion`), paths relative to
  this folder; written last, so its presence means the cohort is complete.
- `images/<subject>_T1w.nii.gz`, `images/<subject>_FLAIR.nii.gz`: float32 images, zero outside the brain.
- `masks/<subject>_mask.nii.gz`: brain mask (uint8).
- `lesions/<subject>_lesion.nii.gz`: ground-truth lesion mask (uint8, patients only).
- `lesions.json`: every lesion parameter (kind, centre, radius, contrast change, blur, thickening, size).
- `cohort.json`: seed, voxel size, counts, nominal tissue intensities and per-subject values.

Regenerate with:

    twinpatch synth demo_data --controls 20 --cases 4 --seed 0
"""  # written into every synthetic cohort folder; demo_data/README.md is a committed copy


def _atomic_write(path: pathlib.Path, write) -> None:
    with atomic(path) as tmp:
        write(tmp)


def _write_text(path: pathlib.Path, text: str) -> None:
    _atomic_write(path, lambda p: p.write_text(text, encoding="utf-8", newline="\n"))


def _save_nifti(path: pathlib.Path, data: np.ndarray, affine: np.ndarray) -> None:
    img = nib.Nifti1Image(data, affine)
    img.set_sform(affine, code=NIFTI_XFORM_MNI_152)
    img.set_qform(affine, code=NIFTI_XFORM_MNI_152)
    img.header.set_xyzt_units("mm")
    _atomic_write(path, lambda p: nib.save(img, p))


def _check_args(n_controls, n_cases, seed, voxel_size, lesion_kinds, lesions_per_case) -> int:
    for name, value, low in (("n_controls", n_controls, 3), ("n_cases", n_cases, 0), ("seed", seed, 0),
                             ("lesions_per_case", lesions_per_case, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise InputError(f"{name} must be a whole number >= {low}; got {value!r}")
    if isinstance(voxel_size, bool) or not isinstance(voxel_size, (int, float, np.number)) \
            or voxel_size not in VOXEL_SIZES:
        raise InputError(f"voxel_size must be a whole number of mm from 1 to 4 (a resolution nilearn "
                         f"resamples the MNI152 templates to); got {voxel_size!r}")
    unknown = [k for k in lesion_kinds if k not in LESION_KINDS]
    if unknown or (n_cases > 0 and not lesion_kinds):
        raise InputError(f"lesion_kinds must be one or more of {', '.join(LESION_KINDS)}; "
                         f"got {list(lesion_kinds)!r}")
    return int(voxel_size)


def make_cohort(out_dir, n_controls: int = 20, n_cases: int = 4, seed: int = 0, voxel_size: float = 2.0,
                lesion_kinds: tuple[str, ...] = LESION_KINDS, progress: bool = True,
                lesions_per_case: int = 1) -> pathlib.Path:
    """Write a synthetic cohort into out_dir and return the path of its manifest.csv.

    Case k (0-based) gets lesion kinds ``lesion_kinds[(k * lesions_per_case + j) % len]``. Subject
    randomness: controls ``default_rng([seed, 0, k])``, cases ``default_rng([seed, 1, k])`` and
    their lesions ``default_rng([seed, 1, k, 1])``, so a subject does not depend on the counts."""
    lesion_kinds = (lesion_kinds,) if isinstance(lesion_kinds, str) else tuple(lesion_kinds)
    vs = _check_args(n_controls, n_cases, seed, voxel_size, lesion_kinds, lesions_per_case)
    out = pathlib.Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out} is a file, not a folder; choose a folder for the synthetic cohort")
    manifest = out / "manifest.csv"
    if manifest.exists():
        raise InputError(f"{out} already holds a cohort (manifest.csv); choose another folder or delete it")
    template = load_template(vs)
    for sub in ("images", "masks", "lesions"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    plan = [(f"ctl{k + 1:02d}", "control", 0, k) for k in range(n_controls)]
    plan += [(f"pat{k + 1:02d}", "case", 1, k) for k in range(n_cases)]
    rows, lesions, subjects = [], {}, {}
    for sid, role, code, k in tqdm(plan, desc="synth", unit="subject", disable=not progress):
        kinds = tuple(lesion_kinds[(k * lesions_per_case + j) % len(lesion_kinds)]
                      for j in range(lesions_per_case)) if role == "case" else ()
        subj = make_subject(template, np.random.default_rng([seed, code, k]), kinds,
                            np.random.default_rng([seed, code, k, 1]))
        row = {"subject": sid, "role": role, **{c: f"images/{sid}_{c}.nii.gz" for c in CONTRASTS},
               "mask": f"masks/{sid}_mask.nii.gz", "lesion": f"lesions/{sid}_lesion.nii.gz" if kinds else ""}
        volumes = {**subj.images, "mask": subj.mask.astype(np.uint8), "lesion": subj.lesion_mask.astype(np.uint8)}
        for key in (*CONTRASTS, "mask", "lesion"):
            if row[key]:
                _save_nifti(out / row[key], volumes[key], template.affine)
        if kinds:
            lesions[sid] = [dict(rec, rng_seed=[seed, code, k, 1]) for rec in subj.lesions]
        subjects[sid] = dict(subj.params, rng_seed=[seed, code, k])
        rows.append(row)
    cohort = {"generator": "embed.synth.make_cohort", "twinpatch_version": __version__, "seed": seed,
              "voxel_size_mm": vs, "grid_shape": list(template.gm.shape), "affine": template.affine.tolist(),
              "n_controls": n_controls, "n_cases": n_cases, "lesions_per_case": lesions_per_case,
              "lesion_kinds": list(lesion_kinds), "contrasts": list(CONTRASTS),
              "nominal_intensity": NOMINAL_INTENSITY, "intensity_jitter_sd": INTENSITY_JITTER,
              "warp_rms_mm": list(WARP_RMS_MM), "bias_max_log": list(BIAS_RANGE),
              "noise_sd_fraction_of_wm": NOISE_FRACTION,
              "lesion_mask_rule": "w >= 0.5 (r <= 0.75 radius) inside the brain mask, centre component",
              "template": "MNI152 2009 GM/WM/brain mask bundled with nilearn", "subjects": subjects}
    _write_text(out / "lesions.json", json.dumps(lesions, indent=2) + "\n")
    _write_text(out / "cohort.json", json.dumps(cohort, indent=2) + "\n")
    _write_text(out / "README.md", README_TEXT)
    buf = io.StringIO()
    table = [MANIFEST_COLUMNS, *([r[k] for k in MANIFEST_COLUMNS] for r in rows)]
    csv.writer(buf, lineterminator="\n").writerows(table)
    _write_text(manifest, buf.getvalue())  # last: the marker of a complete cohort
    return manifest


def demo_cohort_ready(out_dir) -> bool:
    """True when ``out_dir/manifest.csv`` exists (it is written last, so it marks a complete cohort)."""
    return (pathlib.Path(out_dir) / "manifest.csv").is_file()

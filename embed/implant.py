"""Synthetic lesions implanted into real control images on the template grid (for the bench).

The bench needs lesions of known place, size and strength in controls no encoder has seen, for
any site's cohort, not only for synthetic ones. A site's images come without tissue maps, so a
tissue model is fitted to each held-out control:

1. tissue fractions: a three-class Gaussian mixture (scikit-learn ``GaussianMixture``) on the
   tissue contrast (T1-weighted-like: CSF < GM < WM, the classes are named by their mean), whose
   posterior probabilities give soft CSF/GM/WM fractions per voxel;
2. class intensities: per contrast, the least-squares fit ``image ~ sum_k fraction_k * mu_k``
   inside the brain mask, so ``model_c = sum_k fraction_k * mu_ck`` is the noise-free image.

A lesion (:class:`embed.synth.Lesion`: the same kinds, weights and masks as the demo's cases) is
injected into the fractions with :func:`embed.synth.inject_lesion`, and the image changes by what
the model says it changes, the scan's own noise and detail staying in place::

    image'_c = zero_c + (image_c + model'_c - model_c - zero_c) * gain_c

``gain`` is the FLAIR-like contrast's multiplicative rise (1 elsewhere), applied about
``zero_c``, the normalised value of a raw intensity of 0, so that a rise of ``a`` multiplies the
raw signal by ``1 + a`` whatever the normalisation. Everything happens on the normalised images
and only inside a box around the lesion; outside it the scan is untouched, so a bench only
recomputes features near each lesion.

Limits (measured on a synthetic control whose true tissue maps are known): the mixture sees the
tissue contrast only, so partial-volume CSF/WM voxels pass for GM and the fitted FLAIR GM-WM gap is
about 70 % of the true one; texture and geometry changes on FLAIR come out about that much weaker
than the same lesion made by :mod:`embed.synth`. The tissue contrast must order CSF < GM < WM.

Bench kinds and the synthetic kinds they use: intensity = ``flair`` (FLAIR rise), texture =
``blurring`` (grey-white blurring, mean kept), geometry = ``thickening`` (local cortical
thickening), mixed = ``mixed`` (blurring and rise).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tqdm.auto import tqdm

from .errors import InputError
from .synth import TISSUES, Lesion, inject_lesion, lesion_sites, pick_site

BENCH_KINDS = {"intensity": "flair", "texture": "blurring", "geometry": "thickening", "mixed": "mixed"}
LEVEL_NAMES = {"intensity": "FLAIR rise (fraction)", "texture": "blur sigma (mm)", "geometry": "thickening (mm)",
               "mixed": "blur sigma (mm), FLAIR rise 2.5 %/mm"}
GMM_SAMPLE = 50_000  # voxels the mixture is fitted on (all of them when fewer)


@dataclass(frozen=True)
class TissueModel:
    """tissue: 'csf', 'gm', 'wm' -> (X, Y, Z) float64 fractions (sum 1 in the mask, 0 outside);
    means: (C, 3) float64 class intensities per contrast (csf, gm, wm), normalised units;
    zero: (C,) float64 normalised value of a raw intensity of 0, per contrast."""
    tissue: dict
    means: np.ndarray
    zero: np.ndarray


def tissue_model(data: np.ndarray, mask: np.ndarray, zero, tissue_channel: int = 0, seed: int = 0) -> TissueModel:
    """Fit the tissue model of one scan. data: (C, X, Y, Z) normalised; mask: (X, Y, Z) bool;
    zero: (C,) normalised value of raw 0 (see :func:`raw_zero`)."""
    from sklearn.mixture import GaussianMixture

    data, mask = np.asarray(data), np.asarray(mask, dtype=bool)
    if data.ndim != 4 or data.shape[1:] != mask.shape:
        raise InputError(f"tissue_model: data {data.shape} and mask {mask.shape} must be (C, X, Y, Z) and (X, Y, Z)")
    if not 0 <= tissue_channel < data.shape[0]:
        raise InputError(f"tissue_model: tissue channel {tissue_channel} is not one of the {data.shape[0]} contrasts")
    zero = np.asarray(zero, dtype=np.float64).reshape(-1)
    if zero.shape != (data.shape[0],):
        raise InputError(f"tissue_model: zero must hold one value per contrast ({data.shape[0]}), got {zero.shape[0]}; "
                         "compute it with raw_zero")
    values = data[tissue_channel][mask].astype(np.float64)
    if values.size < 30:
        raise InputError(f"tissue_model: the brain mask holds {values.size} voxels; a tissue model needs at least 30")
    rng = np.random.default_rng(seed)
    sample = values if values.size <= GMM_SAMPLE else rng.choice(values, GMM_SAMPLE, replace=False)
    gmm = GaussianMixture(3, random_state=seed, n_init=2).fit(sample[:, None])
    order = np.argsort(gmm.means_[:, 0])  # csf < gm < wm on a T1-weighted-like contrast
    post = gmm.predict_proba(values[:, None])[:, order]  # (V, 3)
    tissue = {}
    for k, name in enumerate(("csf", "gm", "wm")):
        t = np.zeros(mask.shape)
        t[mask] = post[:, k]
        tissue[name] = t
    means = np.stack([np.linalg.lstsq(post, data[c][mask].astype(np.float64), rcond=None)[0]
                      for c in range(data.shape[0])])
    return TissueModel(tissue=tissue, means=means, zero=zero)


def raw_zero(stats: dict, contrasts, params: dict | None) -> np.ndarray:
    """(C,) normalised value of a raw intensity of 0 per contrast, from a subject's ``stats``
    (contrast -> {"mean", "std"[, "landmarks"]}) and the cohort's normalisation ``params``."""
    from .normalise import piecewise_map

    method = (params or {}).get("method", "zscore")
    out = []
    for c in contrasts:
        s = stats[c]
        if method == "histogram":
            standard = np.asarray(params["landmarks"][c], dtype=np.float64)  # histogram_params' standard landmarks
            out.append(float(piecewise_map(np.zeros(1), np.asarray(s["landmarks"], dtype=np.float64), standard)[0]))
        else:
            out.append(-float(s["mean"]) / float(s["std"]))
    return np.asarray(out)


@dataclass(frozen=True)
class Implant:
    """One implanted lesion. box: slices of the changed region; values: (C, *box shape) float32 the
    new normalised intensities there; lesion: (X, Y, Z) bool ground truth; record: its parameters."""
    box: tuple
    values: np.ndarray
    lesion: np.ndarray
    record: dict


def plan_lesion(model: TissueModel, mask: np.ndarray, kind: str, radius_mm: float, level: float,
                voxel_mm: float, rng: np.random.Generator, min_radius_vox: float = 1.5) -> Lesion:
    """A lesion of bench ``kind`` centred on a grey-white boundary voxel of the model.

    level: the FLAIR rise (intensity), the blur sigma in mm (texture), the thickening in mm
    (geometry); mixed takes ``level`` as the blur sigma in mm and ``MIXED_RISE_PER_MM * level`` as
    the rise. radius_mm: where the lesion weight reaches 0 (clipped up to ``min_radius_vox``)."""
    if kind not in BENCH_KINDS:
        raise InputError(f"lesion kind {kind!r} is unknown; use one of {', '.join(BENCH_KINDS)}")
    radius_vox = max(radius_mm / voxel_mm, min_radius_vox)
    sigma = level / voxel_mm if kind in ("texture", "mixed") else 0.0
    thick = level / voxel_mm if kind == "geometry" else 0.0
    rise = level if kind == "intensity" else MIXED_RISE_PER_MM * level if kind == "mixed" else 0.0
    margin = int(np.ceil(radius_vox + 4 * sigma + thick)) + 1
    what = f"{'an' if kind[0] in 'aeiou' else 'a'} {kind} lesion of radius {radius_mm} mm"
    centre = pick_site(lesion_sites(model.tissue, mask, margin), rng, what, margin)
    return Lesion(kind=BENCH_KINDS[kind], centre_vox=centre, radius_vox=radius_vox, flair_gain=rise,
                  blur_sigma_vox=sigma, thickening_vox=thick)


MIXED_RISE_PER_MM = 0.025  # mixed lesions: FLAIR rise per mm of blur sigma (2 mm -> 5 %, 4 mm -> 10 %)


def implant(data: np.ndarray, mask: np.ndarray, model: TissueModel, lesion: Lesion, flair_channel: int | None) -> Implant:
    """Implant ``lesion`` into ``data`` (C, X, Y, Z) normalised (not modified); see the module docstring.

    flair_channel: index of the FLAIR-like contrast that a rise multiplies (None: no such contrast;
    then intensity and mixed lesions are refused)."""
    mask = np.asarray(mask, dtype=bool)
    if lesion.flair_gain and flair_channel is None:
        raise InputError("this cohort has no FLAIR-like contrast, so intensity and mixed lesions cannot be implanted; "
                         "name it with --flair-contrast or bench texture and geometry lesions only")
    ones = np.ones(mask.shape)
    new, gain, truth = inject_lesion(model.tissue, ones, mask, lesion)
    changed = (gain != 1) | np.any([new[k] != model.tissue[k] for k in TISSUES], axis=0)
    changed |= truth
    where = np.argwhere(changed)
    box = tuple(slice(int(lo), int(hi) + 1) for lo, hi in zip(where.min(0), where.max(0)))
    values = np.array(data[(slice(None), *box)], dtype=np.float64)
    order = ("csf", "gm", "wm")
    before = np.stack([model.tissue[k][box] for k in order], axis=-1)
    after = np.stack([new[k][box] for k in order], axis=-1)
    delta = (after - before) @ model.means.T  # (bx, by, bz, C)
    inside = mask[box]
    for c in range(values.shape[0]):
        v = values[c] + delta[..., c]
        if c == flair_channel:
            v = model.zero[c] + (v - model.zero[c]) * gain[box]
        values[c] = np.where(inside, v, values[c])
    record = {"kind": next(k for k, v in BENCH_KINDS.items() if v == lesion.kind), "centre_vox": list(lesion.centre_vox),
              "radius_vox": lesion.radius_vox, "flair_gain": lesion.flair_gain, "blur_sigma_vox": lesion.blur_sigma_vox,
              "thickening_vox": lesion.thickening_vox, "n_voxels": int(truth.sum())}
    return Implant(box=box, values=values.astype(np.float32), lesion=truth, record=record)


@dataclass(frozen=True)
class Case:
    """One lesioned held-out control: which control, the implant (box, new values, lesion mask)."""
    id: str
    control: int  # index into the held-out list
    box: tuple
    values: np.ndarray
    lesion: np.ndarray  # (X, Y, Z) bool
    record: dict


def contrast_index(contrasts, name: str, fallback, what: str) -> int | None:
    """Index of contrast ``name`` (``fallback`` when ``name`` is empty); InputError if unknown."""
    if name:
        if name not in contrasts:
            raise InputError(f"bench: {what} {name!r} is not a contrast of the cohort ({', '.join(contrasts)})")
        return list(contrasts).index(name)
    return fallback


def flair_index(contrasts, name: str = "") -> int | None:
    """The FLAIR-like contrast: ``name`` if given, else the one called FLAIR (any case), else None."""
    return contrast_index(contrasts, name, next((i for i, c in enumerate(contrasts) if c.lower() == "flair"), None),
                          "flair_contrast")


def make_cases(cohort, heldout: list[int], vmask: np.ndarray, s, progress: bool) -> list[Case]:
    """Implant every lesion of the bench settings ``s`` (kinds, radii_mm, levels, repeats, seed,
    tissue_contrast, flair_contrast) into the held-out controls (cohort indices), one lesion per
    case; lesion j of a control is seeded by ``[seed, control, kind, radius, level, repeat]``."""
    tissue_c = contrast_index(cohort.contrasts, s.tissue_contrast, 0, "tissue_contrast")
    flair_c = flair_index(cohort.contrasts, s.flair_contrast)
    voxel_mm = float(np.mean(cohort.voxel_size))
    cases = []
    for h, idx in enumerate(tqdm(heldout, desc="lesions", unit="control", disable=not progress)):
        name = cohort.subjects[idx]
        data, mask = np.asarray(cohort.data[idx]), np.asarray(cohort.masks[idx]) & vmask
        zero = raw_zero(cohort.stats[name], cohort.contrasts, cohort.normalisation_params)
        model = tissue_model(data, mask, zero, tissue_c, seed=s.seed)
        for k, kind in enumerate(s.kinds):
            for r, radius in enumerate(s.radii_mm):
                for lv, level in enumerate(s.levels[kind]):
                    for rep in range(s.repeats):
                        rng = np.random.default_rng([s.seed, h, k, r, lv, rep])
                        lesion = plan_lesion(model, mask, kind, float(radius), float(level), voxel_mm, rng)
                        imp = implant(data, mask, model, lesion, flair_c)
                        rec = {"id": f"L{len(cases) + 1:03d}", "subject": name, "kind": kind, "radius_mm": float(radius),
                               "size_bin": f"{float(radius):g} mm", "level": float(level), "level_name": LEVEL_NAMES[kind],
                               "contrast_bin": f"{float(level):g}", **{x: imp.record[x] for x in
                                                                       ("centre_vox", "n_voxels", "flair_gain",
                                                                        "blur_sigma_vox", "thickening_vox")}}
                        cases.append(Case(rec["id"], h, imp.box, imp.values, imp.lesion, rec))
    return cases

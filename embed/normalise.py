"""Intensity normalisation inside a brain mask: z-score and piecewise-linear histogram standardisation.

Two methods, both applied per subject and contrast to the voxels inside the subject's mask
(voxels outside the mask are set to 0):

- ``zscore``: (v - mean) / std of the raw voxels inside the mask (float64 accumulation, ddof=0).
- ``histogram``: the piecewise-linear standardisation published by Nyul and Udupa (1999). Each
  image's landmarks are the intensity percentiles ``PERCENTILES`` of its voxels inside the mask
  (``numpy.percentile``, linear interpolation). On the controls, each image's landmarks are
  mapped linearly so that its lowest landmark goes to ``scale[0]`` and its highest to
  ``scale[1]``; the standard landmarks are the mean of those mapped landmarks over the controls.
  An image is then mapped segment by segment from its own landmarks onto the standard ones;
  below the lowest and above the highest landmark the first and last segments are extended
  linearly (nothing is clipped).

  Our choice of standard scale: ``scale`` = the standard-normal quantiles of the lowest and
  highest landmark percentiles (``scipy.stats.norm.ppf(0.01) = -2.326``, ``ppf(0.99) = 2.326``),
  so that histogram-standardised intensities have about the magnitude of z-scores and the
  encoder's settings need not change with the method.

The learned parameters are a JSON-ready dict, stored in the cohort cache and in bundle cards::

    {"method": "zscore", "within": "mask"}
    {"method": "histogram", "within": "mask", "percentiles": [1, 10, ..., 90, 99],
     "scale": [-2.326..., 2.326...], "landmarks": {"T1w": [11 floats], "FLAIR": [...]},
     "controls": 20}

:func:`normalise_with` applies them to a new subject exactly as prepare did for the controls.
"""

from __future__ import annotations

import numpy as np
from scipy import stats as _stats

from .errors import CohortError, ConfigError, InputError

METHODS = ("zscore", "histogram")
# Deciles plus the 1st and 99th percentiles: Nyul and Udupa's decile landmarks with the ends
# moved in to 1 and 99 to ignore the extreme tails (from memory of the published method).
PERCENTILES = (1.0, 10.0, 20.0, 30.0, 40.0, 50.0, 60.0, 70.0, 80.0, 90.0, 99.0)


def check_method(method) -> None:
    if method not in METHODS:
        raise ConfigError(f"cohort.normalisation: unknown method {method!r}; use one of {', '.join(METHODS)}")


def standard_scale(percentiles=PERCENTILES) -> tuple[float, float]:
    """(low, high): standard-normal quantiles of the lowest and highest landmark percentiles."""
    return (float(_stats.norm.ppf(percentiles[0] / 100.0)), float(_stats.norm.ppf(percentiles[-1] / 100.0)))


def _inside(vol: np.ndarray, mask: np.ndarray, what: str) -> np.ndarray:
    if vol.shape != mask.shape:
        raise CohortError(f"{what}: volume shape {vol.shape} differs from mask shape {mask.shape}; "
                          "resample every scan onto the template grid first")
    inside = vol[mask].astype(np.float64)
    if inside.size == 0:
        raise CohortError(f"{what}: the mask is empty; give a mask with at least one brain voxel")
    return inside


def zscore(vol: np.ndarray, mask: np.ndarray, *, what: str = "image") -> tuple[np.ndarray, dict[str, float]]:
    """vol: (X, Y, Z) float; mask: (X, Y, Z) bool. Returns ((X, Y, Z) float32 z-scores inside the
    mask, 0 outside; {"mean", "std"} of the raw voxels inside the mask)."""
    inside = _inside(vol, mask, what)
    stats = _mean_std(inside, what)
    out = np.zeros(vol.shape, dtype=np.float32)
    out[mask] = ((inside - stats["mean"]) / stats["std"]).astype(np.float32)
    return out, stats


def _mean_std(inside: np.ndarray, what: str) -> dict[str, float]:
    mean, std = float(inside.mean()), float(inside.std())
    if std == 0.0:
        raise CohortError(f"{what}: intensity is constant ({mean:g}) inside the mask (std 0), cannot normalise; "
                          "check that the file holds a real scan")
    return {"mean": mean, "std": std}


def landmarks(vol: np.ndarray, mask: np.ndarray, percentiles=PERCENTILES, *, what: str = "image") -> np.ndarray:
    """(K,) float64: ``numpy.percentile`` (linear interpolation) of the voxels inside the mask."""
    return np.percentile(_inside(vol, mask, what), np.asarray(percentiles, dtype=np.float64))


def check_increasing(marks: np.ndarray, what: str) -> None:
    """Refuse landmarks that are not strictly increasing (too few distinct intensities)."""
    marks = np.asarray(marks, dtype=np.float64)
    flat = np.flatnonzero(np.diff(marks) <= 0)
    if flat.size:
        k = int(flat[0])
        raise CohortError(f"{what}: histogram landmarks are not strictly increasing (landmarks {k} and {k + 1} are both "
                          f"{marks[k]:g}): the image has too few distinct intensities inside the mask; "
                          "use normalisation 'zscore' or check the file holds a real scan")


def learn_standard(marks: np.ndarray, percentiles=PERCENTILES) -> np.ndarray:
    """Standard landmarks from the controls' landmarks.

    marks: (N, K) float64, one row per control, each strictly increasing. Each row is mapped
    linearly onto ``standard_scale(percentiles)`` (lowest -> low, highest -> high); returns the
    (K,) float64 mean of the mapped rows.
    """
    marks = np.asarray(marks, dtype=np.float64)
    assert marks.ndim == 2 and marks.shape[0] >= 1 and marks.shape[1] == len(percentiles), marks.shape
    low, high = standard_scale(percentiles)
    span = marks[:, -1:] - marks[:, :1]
    assert np.all(span > 0), "landmarks must be strictly increasing"
    return (low + (marks - marks[:, :1]) * ((high - low) / span)).mean(axis=0)


def piecewise_map(values: np.ndarray, own: np.ndarray, standard: np.ndarray) -> np.ndarray:
    """Map ``values`` (any shape, float) from landmarks ``own`` (K,) onto ``standard`` (K,), float64.

    Linear between consecutive landmarks; the first and last segments extend beyond the ends.
    """
    own, standard = np.asarray(own, dtype=np.float64), np.asarray(standard, dtype=np.float64)
    values = np.asarray(values, dtype=np.float64)
    k = np.searchsorted(own[1:-1], values, side="right")  # segment index in 0..K-2
    slope = np.diff(standard) / np.diff(own)
    return standard[k] + (values - own[k]) * slope[k]


def histogram(vol: np.ndarray, mask: np.ndarray, own: np.ndarray, standard: np.ndarray) -> np.ndarray:
    """(X, Y, Z) float32: the voxels inside ``mask`` mapped by :func:`piecewise_map`, 0 outside."""
    out = np.zeros(vol.shape, dtype=np.float32)
    out[mask] = piecewise_map(vol[mask], own, standard).astype(np.float32)
    return out


def zscore_params() -> dict:
    return {"method": "zscore", "within": "mask"}


def histogram_params(standard: dict[str, np.ndarray], n_controls: int, percentiles=PERCENTILES) -> dict:
    """JSON-ready parameters; ``standard``: contrast -> (K,) standard landmarks."""
    return {"method": "histogram", "within": "mask", "percentiles": [float(p) for p in percentiles],
            "scale": list(standard_scale(percentiles)),
            "landmarks": {c: [float(v) for v in s] for c, s in standard.items()}, "controls": int(n_controls)}


def check_params(params, contrasts, where: str) -> dict:
    """Validate stored parameters (from a cache or a bundle card) for these ``contrasts``."""
    if not isinstance(params, dict) or params.get("method") not in METHODS:
        found = params.get("method") if isinstance(params, dict) else params
        raise ConfigError(f"{where}: normalisation method {found!r} is unknown; expected one of "
                          f"{', '.join(METHODS)}; write the parameters with twinpatch prepare")
    if params["method"] == "zscore":
        return params
    pct, marks = params.get("percentiles"), params.get("landmarks")
    ok = (isinstance(pct, list) and len(pct) >= 2 and all(isinstance(p, (int, float)) for p in pct)
          and all(0 <= a < b <= 100 for a, b in zip(pct, pct[1:])) and isinstance(marks, dict))
    if not ok:
        raise ConfigError(f"{where}: histogram parameters need 'percentiles' (increasing numbers in 0..100) and "
                          f"'landmarks' (contrast -> list), found keys {sorted(params)}; write them with twinpatch prepare")
    for c in contrasts:
        m = marks.get(c)
        if not (isinstance(m, list) and len(m) == len(pct) and all(isinstance(v, (int, float)) for v in m)
                and all(a < b for a, b in zip(m, m[1:]))):
            raise ConfigError(f"{where}: no valid histogram landmarks for contrast {c!r} (found contrasts "
                              f"{sorted(marks)}); need {len(pct)} increasing numbers per contrast")
    return params


def normalise_with(vol: np.ndarray, mask: np.ndarray, params: dict, contrast: str | None = None, *,
                   what: str = "image") -> tuple[np.ndarray, dict]:
    """Normalise one volume with stored parameters, exactly as prepare did for the cohort.

    vol: (X, Y, Z) float32 raw intensities; mask: (X, Y, Z) bool; params: as in the module
    docstring; contrast: which landmarks to use (needed for ``histogram``). Returns
    ((X, Y, Z) float32, stats): stats = {"mean", "std"} of the raw voxels inside the mask, plus
    "landmarks" (K raw percentiles) for ``histogram``.
    """
    if isinstance(params, dict) and params.get("method") == "histogram" and contrast is None:
        raise InputError(f"{what}: histogram normalisation needs the contrast name to pick its landmarks; "
                         "pass contrast=, e.g. 'T1w'")
    check_params(params, [contrast] if params.get("method") == "histogram" else [], f"{what}: normalisation")
    if params["method"] == "zscore":
        return zscore(vol, mask, what=what)
    inside = _inside(vol, mask, what)
    stats = _mean_std(inside, what)
    own = np.percentile(inside, np.asarray(params["percentiles"], dtype=np.float64))
    check_increasing(own, what)
    stats["landmarks"] = [float(v) for v in own]
    return histogram(vol, mask, own, np.asarray(params["landmarks"][contrast], dtype=np.float64)), stats

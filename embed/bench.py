"""The bench: judge encoders on synthetic subtle lesions in held-out controls, against baselines.

What happens (``run_bench``):

1. Controls are split: the *held-out* controls (by default the cohort's controls that no benched
   encoder trained on, i.e. not in its card's ``training.train_controls``) carry the lesions and
   serve, lesion-free, to count false-positive clusters; the others (*fit controls*) fit the
   per-voxel scorer, as a site's own controls would.
2. Lesions (:mod:`embed.implant`): on each held-out control, for each kind, radius and level,
   ``repeats`` lesions, each implanted alone (one lesion = one case), at seeded random grey-white
   boundary voxels. The same settings and seed give the same lesions for every encoder.
3. Methods: each encoder's embedding and the embedding + intensities (one-class SVM per voxel),
   and the baselines: intensities and hand-made texture (one-class SVM per voxel), the per-voxel
   intensity z-score against the fit controls, and the FLAIR-like intensity itself (a plain
   threshold). One-class SVM scores are standardised as ``twinpatch score`` does (leave-one-out
   over the fit controls, :mod:`embed.scorers.normalise`).
4. Per lesion: voxel AUROC / AUPRC / best Dice over the case's brain (cohort-mask) voxels; the rank
   of the first top cluster that overlaps the lesion; the lesion-signal ratio (below). Per method:
   false-positive clusters on the lesion-free held-out controls. Then bootstrap summaries per kind,
   size and level (:mod:`embed.detection`).

Cluster rule: each method gets one threshold, the ``1 - top_fraction`` quantile of its scores
over the lesion-free held-out controls (pooled), so about ``top_fraction`` of a healthy brain is
above it; every case and control is thresholded there, split into ``connectivity``-connected
clusters and ranked (:func:`embed.clusters.find_clusters`). False-positive clusters per control =
the clusters a lesion-free held-out control has at that threshold.

Lesion-signal ratio (needs no scorer): at each lesion voxel, ``|f(lesioned) - f(clean)|`` (the
feature vector's Euclidean change) over the fit controls' spread there,
``sqrt(sum_d var_d)``; the lesion's value is the mean over its voxels. Above about 1, the
features move by more than healthy variation: a scorer has a chance.

Only features near a lesion change, so each case recomputes features in the lesion's box grown
by the method's reach (:mod:`embed.features`) and reuses the clean control's elsewhere.

Research software: synthetic lesions are not patients' lesions; a bench ranks settings, it does
not establish clinical performance.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
from tqdm.auto import tqdm

from . import __version__
from .bundle import load_encoder
from .benchsettings import BenchSettings
from .clusters import find_clusters
from .detection import first_hit_rank, summarise, voxel_metrics
from .errors import InputError
from .features import FeatureSet, baseline_sets, block_scales, encoder_sets, region_features
from .implant import Case, flair_index, make_cases
from .scorers import Standardiser, loo_scores, make_scorer
from .scorers.normalise import loo_moments

BLOCK_VOXELS = 4096
SMALL_N = ("Small numbers: a few held-out controls and a few dozen synthetic lesions per kind. Intervals are "
           "95 % percentile-bootstrap intervals over lesions; differences inside them are not findings.")


@dataclass(frozen=True)
class Method:
    """A feature set and how it is scored: 'ocsvm' (settings.scorer, standardised), 'zscore', 'value'."""
    features: FeatureSet
    scoring: str
    name: str
    description: str


def _flair_set(channel: int, name: str) -> FeatureSet:
    def value(volume, mask):
        return np.ascontiguousarray(volume[channel][mask][:, None], dtype=np.float32)
    return FeatureSet(f"{name} intensity", "baseline", f"the {name} intensity itself, one global threshold",
                      1, (0, 0, 0), value)


def methods_for(cohort, encoders: dict, baselines: bool, s: BenchSettings) -> list[Method]:
    out = []
    for name, enc in encoders.items():
        channels = [cohort.contrasts.index(c) for c in enc.channel_names]
        for fs in encoder_sets(name, enc, s.precision, channels, len(cohort.contrasts)):
            out.append(Method(fs, "ocsvm", fs.name, fs.description + f", {s.scorer} per voxel"))
    if baselines:
        for fs in baseline_sets(len(cohort.contrasts)):
            out.append(Method(fs, "ocsvm", fs.name, fs.description + f", {s.scorer} per voxel"))
        ints = baseline_sets(len(cohort.contrasts))[0]
        out.append(Method(ints, "zscore", "z-score", "per-voxel intensity z-score against the fit controls "
                          "(root mean square over contrasts)"))
        flair_c = flair_index(cohort.contrasts, s.flair_contrast)
        if flair_c is not None:
            fs = _flair_set(flair_c, cohort.contrasts[flair_c])
            out.append(Method(fs, "value", fs.name, fs.description))
    return out


def _features(fs: FeatureSet, cohort, subjects: list[int], vmask: np.ndarray) -> np.ndarray:
    """(len(subjects), V, D) float32 features of whole volumes at the bench voxels."""
    out = np.empty((len(subjects), int(vmask.sum()), fs.dim), np.float32)
    for j, i in enumerate(subjects):
        out[j] = fs.compute(np.asarray(cohort.data[i]), vmask)
    return out


def _whole_features(fs: FeatureSet, cohort, fit_idx: list[int], heldout: list[int], vmask: np.ndarray,
                    cache: dict) -> tuple[np.ndarray, np.ndarray]:
    """Fit-control and held-out features of ``fs``. A concatenation (``fs.parts``) reuses the cached
    features of its parts (an encoder's embedding is computed once for both of its methods); the
    cache keeps only what the next method can reuse, to bound memory."""
    if fs.name not in cache:
        if fs.parts:
            pieces = [_whole_features(p, cohort, fit_idx, heldout, vmask, cache) for p in fs.parts]
            value = tuple(np.concatenate([pc[k] for pc in pieces], axis=-1) for k in (0, 1))
        else:
            value = (_features(fs, cohort, fit_idx, vmask), _features(fs, cohort, heldout, vmask))
        keep = {p.name for p in fs.parts}
        for name in [n for n in cache if n not in keep]:
            del cache[name]
        cache[fs.name] = value
    return cache[fs.name]


def _queries(method: Method, cohort, heldout: list[int], cases: list[Case], vmask: np.ndarray,
             vindex: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """Per case: (bench-voxel indices (n,) int64, features (n, D)) where the lesion can change them."""
    out = []
    for c in cases:
        vol = np.array(cohort.data[heldout[c.control]], dtype=np.float32)
        vol[(slice(None), *c.box)] = c.values
        voxels, feats = region_features(method.features, vol, vmask, c.box)
        out.append((vindex[tuple(voxels.T)], feats))
    return out


def _score_ocsvm(fit: np.ndarray, held: np.ndarray, queries: list, s: BenchSettings, progress: bool,
                 desc: str) -> tuple[np.ndarray, list[np.ndarray]]:
    """Standardised one-class SVM scores of the held-out controls (H, V) and of every query."""
    S, V, D = fit.shape
    q_idx = np.concatenate([q[0] for q in queries]) if queries else np.zeros(0, np.int64)
    q_feat = np.concatenate([q[1] for q in queries]) if queries else np.zeros((0, D), np.float32)
    order = np.argsort(q_idx, kind="stable")
    q_idx, q_feat = q_idx[order], q_feat[order]
    first = np.searchsorted(q_idx, q_idx, side="left")
    layer = np.arange(q_idx.size) - first  # how many earlier queries share the voxel
    raw_h, raw_q = np.empty((held.shape[0], V)), np.empty(q_idx.size)
    mean, sd = np.empty(V), np.empty(V)
    for v0 in tqdm(range(0, V, BLOCK_VOXELS), desc=desc, unit="block", disable=not progress, leave=False):
        v1 = min(v0 + BLOCK_VOXELS, V)
        ctrl = fit[:, v0:v1]
        mean[v0:v1], sd[v0:v1] = loo_moments(loo_scores(make_scorer(s.scorer), ctrl))
        model = make_scorer(s.scorer).fit(ctrl)
        a, b = np.searchsorted(q_idx, [v0, v1])
        n_layers = int(layer[a:b].max()) + 1 if b > a else 0
        stack = np.concatenate([held[:, v0:v1], np.repeat(held[:1, v0:v1], n_layers, axis=0)])
        stack[held.shape[0] + layer[a:b], q_idx[a:b] - v0] = q_feat[a:b]
        scores = model.score_many(stack)
        raw_h[:, v0:v1] = scores[:held.shape[0]]
        raw_q[a:b] = scores[held.shape[0] + layer[a:b], q_idx[a:b] - v0]
    std = Standardiser.from_moments(mean, sd)
    z_q = np.empty(q_idx.size)
    z_q[order] = (raw_q - std.mean[q_idx]) / np.maximum(std.sd[q_idx], std.floor)
    return std.apply(raw_h), np.split(z_q, np.cumsum([len(q[0]) for q in queries])[:-1])


def _score_simple(method: Method, fit: np.ndarray, held: np.ndarray, queries: list) -> tuple[np.ndarray, list]:
    """'value': the single feature itself; 'zscore': RMS over features of (x - mean) / max(sd, floor)."""
    if method.scoring == "value":
        return held[..., 0].astype(np.float64), [q[1][:, 0].astype(np.float64) for q in queries]
    mean, sd = fit.mean(0, dtype=np.float64), fit.std(0, ddof=1, dtype=np.float64)  # (V, D)
    floor = 0.1 * np.median(np.where(sd > 0, sd, np.nan), axis=0)  # per feature, as Standardiser's floor
    scale = np.maximum(sd, floor)

    def rms(x, m, sc):
        return np.sqrt((((x - m) / sc) ** 2).mean(-1))
    return rms(held, mean, scale), [rms(f, mean[i], scale[i]) for i, f in zip((q[0] for q in queries), (q[1] for q in queries))]


def _volume(values: np.ndarray, vmask: np.ndarray) -> np.ndarray:
    out = np.zeros(vmask.shape, np.float64)
    out[vmask] = values
    return out


def evaluate(method: Method, fit: np.ndarray, held: np.ndarray, held_scores: np.ndarray, queries: list,
             q_scores: list, cases: list[Case], vmask: np.ndarray, affine: np.ndarray, s: BenchSettings,
             keep: frozenset = frozenset()) -> tuple[dict, dict]:
    """Per-lesion metrics, false-positive clusters and the threshold of one method, and the
    (score map, cluster labels) of the cases in ``keep`` (for figures)."""
    cut = float(np.quantile(held_scores, 1 - s.top_fraction))
    fp = []
    for h in range(held_scores.shape[0]):
        score_map = _volume(held_scores[h], vmask)
        _, table = find_clusters(vmask & (score_map >= cut), score_map, affine, connectivity=s.connectivity,
                                 top_k=None)
        fp.append(len(table))
    spread = np.sqrt(fit.var(0, dtype=np.float64).sum(-1))  # (V,)
    spread = np.maximum(spread, 1e-6 * max(float(np.median(spread)), 1e-12))
    per_lesion, maps = {}, {}
    for c, (idx, feats), z in zip(cases, queries, q_scores):
        scores = held_scores[c.control].copy()
        scores[idx] = z
        truth = c.lesion[vmask]
        if not truth.any():
            continue
        metrics = voxel_metrics(scores, truth)
        score_map = _volume(scores, vmask)
        labels, _ = find_clusters(vmask & (score_map >= cut), score_map, affine, connectivity=s.connectivity,
                                  top_k=max(s.ks))
        on = truth[idx]
        change = np.linalg.norm(feats[on].astype(np.float64) - held[c.control][idx[on]], axis=1)
        per_lesion[c.id] = {"auroc": metrics["auroc"], "auprc": metrics["auprc"], "dice": metrics["dice"],
                            "rank": first_hit_rank(labels, c.lesion),
                            "signal_ratio": float(np.mean(change / spread[idx[on]])) if on.any() else None}
        if c.id in keep:
            maps[c.id] = (score_map, labels)
    return {"threshold": cut, "fp_clusters": fp, "fp_clusters_per_control": float(np.mean(fp)),
            "per_lesion": per_lesion}, maps


def _heldout(cohort, encoders: dict, s: BenchSettings) -> list[int]:
    controls = [int(i) for i in cohort.indices("control")]
    names = [cohort.subjects[i] for i in controls]
    if s.heldout:
        unknown = [h for h in s.heldout if h not in names]
        if unknown:
            raise InputError(f"bench: held-out control {unknown[0]!r} is not a control of the cohort; "
                             f"choose among {', '.join(names)}")
        chosen = set(s.heldout)
    elif encoders:
        trained = set()
        for enc in encoders.values():
            trained |= set(enc.card.get("training", {}).get("train_controls", []))
        chosen = set(names) - trained
    else:
        raise InputError("bench: without an encoder, name the held-out controls (settings heldout = [...])")
    for name, enc in encoders.items():
        seen = chosen & set(enc.card.get("training", {}).get("train_controls", []))
        if seen:
            raise InputError(f"bench: encoder {name!r} trained on held-out control {sorted(seen)[0]!r}; "
                             "a bench needs controls no encoder has seen")
    heldout = [i for i, n in zip(controls, names) if n in chosen]
    if not heldout or len(controls) - len(heldout) < 3:
        raise InputError(f"bench: {len(heldout)} held-out and {len(controls) - len(heldout)} fit controls; "
                         "need at least 1 held-out control and 3 controls to fit the scorer")
    return heldout


def _load_encoders(bundles: dict, cohort) -> dict:
    from .jobs import grid_differences

    encoders = {}
    for name, path in bundles.items():
        enc = load_encoder(path)
        missing = [c for c in enc.channel_names if c not in cohort.contrasts]
        if missing:
            raise InputError(f"bench: encoder {name!r} ({path}) reads contrast {missing[0]!r}, which the cohort lacks "
                             f"({', '.join(cohort.contrasts)}); bench it on a cohort with its contrasts")
        diffs = grid_differences(enc.card, cohort.affine, cohort.mask.shape)
        if diffs:
            raise InputError(f"bench: encoder {name!r} ({path}) was trained on another grid: {diffs[0]}")
        method = (enc.card.get("normalisation") or {}).get("method", "zscore")
        if method != cohort.normalisation:
            raise InputError(f"bench: encoder {name!r} expects {method!r} normalisation, the cohort was loaded with "
                             f"{cohort.normalisation!r}; set the bench normalisation to {method!r}")
        encoders[name] = enc
    return encoders


def run_bench(bundles: dict, cohort: str | Path, out: str | Path, *, baselines: bool = True,
              settings: dict | None = None, progress: bool = True) -> dict:
    """Bench ``bundles`` (name -> encoder bundle path) and, with ``baselines``, the encoder-free methods on
    synthetic lesions in held-out controls of ``cohort`` (a manifest.csv or a prepared cache); writes
    ``out/metrics.json``, ``table.csv``, ``table.md`` and figures, and returns the metrics dict."""
    from .benchout import write_outputs
    from .jobs import load_any_cohort

    t0 = time.perf_counter()
    s = BenchSettings.from_dict(settings)
    if not bundles and not baselines:
        raise InputError("bench: nothing to bench; give an encoder bundle or keep the baselines")
    bundles = {str(k): Path(v) for k, v in bundles.items()}
    normalisation = s.normalisation
    if bundles:
        first = load_encoder(next(iter(bundles.values())))
        normalisation = (first.card.get("normalisation") or {}).get("method", normalisation)
    cohort = load_any_cohort(Path(cohort), normalisation, progress=progress)
    encoders = _load_encoders(bundles, cohort)
    heldout = _heldout(cohort, encoders, s)
    fit_idx = [int(i) for i in cohort.indices("control") if int(i) not in heldout]
    vmask = np.asarray(cohort.mask, bool)
    vindex = np.full(vmask.shape, -1, np.int64)
    vindex[vmask] = np.arange(int(vmask.sum()))
    methods = methods_for(cohort, encoders, baselines, s)
    names = [m.name for m in methods]
    clash = sorted({n for n in names if names.count(n) > 1})
    if clash:
        raise InputError(f"bench: two methods are called {clash[0]!r}; name the encoder differently (NAME=BUNDLE)")
    cases = make_cases(cohort, heldout, vmask, s, progress)
    keep = _example_ids(cases, s.examples)
    results, maps, timing = {}, {}, {}
    cache: dict[str, tuple] = {}  # the current feature set's (fit, held-out) whole-volume features
    lesion_features: dict[str, list] = {}  # feature set -> per-case region features (small; reused by name)
    for m in tqdm(methods, desc="methods", unit="method", disable=not progress):
        t1 = time.perf_counter()
        fit, held = _whole_features(m.features, cohort, fit_idx, heldout, vmask, cache)
        if m.features.name not in lesion_features:  # e.g. "intensities" serves two methods
            lesion_features[m.features.name] = _queries(m, cohort, heldout, cases, vmask, vindex)
        queries = lesion_features[m.features.name]
        if m.features.parts:  # a concatenation: blocks weighed equally
            scale = block_scales(m.features, fit)
            fit, held, queries = fit * scale, held * scale, [(i, f * scale) for i, f in queries]
        if m.scoring == "ocsvm":
            held_scores, q_scores = _score_ocsvm(fit, held, queries, s, progress, m.name)
        else:
            held_scores, q_scores = _score_simple(m, fit, held, queries)
        results[m.name], maps[m.name] = evaluate(m, fit, held, held_scores, queries, q_scores, cases, vmask,
                                                 cohort.affine, s, keep)
        timing[m.name] = round(time.perf_counter() - t1, 1)
    cache.clear()
    lesion_features.clear()
    metrics = {
        "kind": "twinpatch bench", "twinpatch_version": __version__, "small_n": SMALL_N,
        "settings": {**{k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(s).items()},
                     "cohort": str(Path(cohort.cache or cohort.manifest)),
                     "bundles": {k: str(v) for k, v in bundles.items()}},
        "heldout": [cohort.subjects[i] for i in heldout], "fit_controls": [cohort.subjects[i] for i in fit_idx],
        "ks": list(s.ks), "lesion_kinds": list(s.kinds),
        "methods": [{"name": m.name, "family": m.features.family, "description": m.description,
                     "seconds": timing[m.name]} for m in methods],
        "lesions": [c.record for c in cases if any(c.id in r["per_lesion"] for r in results.values())],
        "results": results,
    }
    rng = np.random.default_rng(s.seed)
    metrics["summary"] = [dict(method=name, **row) for name, r in results.items()
                          for row in summarise(metrics["lesions"], r["per_lesion"], s.ks, rng, s.n_boot)]
    metrics["seconds"] = round(time.perf_counter() - t0, 1)
    return write_outputs(Path(out), metrics, cohort, heldout, cases, maps)


def _example_ids(cases: list[Case], n: int) -> frozenset:
    """The largest, strongest lesion of each kind on the first held-out control (n per kind)."""
    ids = []
    for kind in dict.fromkeys(c.record["kind"] for c in cases):
        mine = [c for c in cases if c.record["kind"] == kind and c.control == 0]
        mine.sort(key=lambda c: (-c.record["radius_mm"], -c.record["level"]))
        ids += [c.id for c in mine[:n]]
    return frozenset(ids)

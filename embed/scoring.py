"""Score jobs: fit a per-voxel scorer on a store's controls; apply it to a case.

``score_fit(store)`` writes a scorer folder::

    scorer.json        scorer kind and parameters, the store it reads, the bundle checksum, floor
    standardise.npz    per-voxel mean and sd of the controls' leave-one-out scores (V,) each

``score_apply(scorer_dir, images)`` embeds the case with the store's bundle, refits the per-voxel
models block by block from the store's controls (deterministic, so the same models as at fit
time, without saving one model per voxel), scores and standardises the case
(``z = (score - mean) / max(sd, floor)``, :mod:`embed.scorers.normalise`), thresholds, ranks
clusters, and writes ``score.nii.gz``, ``clusters.nii.gz`` (label = rank), ``clusters.csv``,
one PNG per top cluster and ``summary.json``. Memory stays at one block of voxels (plus the
case's volume and its (V, D) embeddings), whatever V is.

Research software, not a diagnostic device: findings need expert review under local clinical
practice. Every output says so.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
from tqdm.auto import tqdm

from . import __version__
from .bundle import load_encoder
from .clusters import find_clusters, threshold, write_clusters_csv
from .cohort import load_subject
from .dense import image_on_grid
from .errors import InputError
from .files import atomic, write_json
from .report import CAUTION, cluster_figure
from .scorers import Standardiser, loo_scores, make_scorer
from .scorers.normalise import loo_moments
from .store import Store

BLOCK_VOXELS = 4096  # voxels per block when fitting and scoring


def score_fit(store_path: str | Path, out: str | Path, *, scorer: str = "ocsvm", params: dict | None = None,
              bundle: str | Path | None = None, floor_fraction: float = 0.1, progress: bool = True) -> Path:
    """Fit the leave-one-out standardisation of ``scorer`` on the store's controls; returns ``out``."""
    store = Store.open(store_path)
    params = dict(params or {})
    make_scorer(scorer, **params)  # check the name and parameters before the long part
    controls = store.indices("control")
    if len(controls) < 3:
        raise InputError(f"store {store_path}: {len(controls)} controls; leave-one-out scoring needs at least 3")
    bundle = Path(bundle) if bundle else Path(store.producer.get("bundle_path", ""))
    if not bundle.is_file():
        raise InputError(f"store {store_path} does not name an existing bundle ({bundle}); pass --bundle")
    encoder = load_encoder(bundle)
    if encoder.card.get("weights_sha256") != store.producer.get("bundle_sha256"):
        raise InputError(f"bundle {bundle} is not the encoder that wrote store {store_path} (checksums differ)")
    n = store.n_voxels
    mean, sd = np.empty(n), np.empty(n)
    for v0 in tqdm(range(0, n, BLOCK_VOXELS), desc="score fit", unit="block", disable=not progress):
        v1 = min(v0 + BLOCK_VOXELS, n)
        loo = loo_scores(make_scorer(scorer, **params), store.block(v0, v1, subjects=controls))
        mean[v0:v1], sd[v0:v1] = loo_moments(loo)
    standardiser = Standardiser.from_moments(mean, sd, floor_fraction)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    with atomic(out / "standardise.npz") as tmp:
        np.savez(tmp, mean=standardiser.mean, sd=standardiser.sd)
    write_json(out / "scorer.json", {
        "scorer": scorer, "params": params, "store": str(Path(store_path).resolve()),
        "bundle": str(bundle.resolve()), "bundle_sha256": encoder.card.get("weights_sha256"),
        "floor": standardiser.floor, "floor_fraction": floor_fraction, "n_controls": int(len(controls)),
        "n_voxels": n, "twinpatch_version": __version__, "caution": CAUTION,
    })
    return out


def _load_scorer_dir(path: Path) -> tuple[dict, Standardiser]:
    try:
        meta = json.loads((path / "scorer.json").read_text(encoding="utf-8"))
        with np.load(path / "standardise.npz", allow_pickle=False) as f:
            mean, sd = f["mean"], f["sd"]
    except FileNotFoundError:
        raise InputError(f"{path} is not a scorer folder (scorer.json or standardise.npz missing); "
                         "write one with `twinpatch score fit STORE --out DIR`") from None
    except (json.JSONDecodeError, ValueError, KeyError) as exc:
        raise InputError(f"{path}: scorer folder is damaged ({exc}); fit it again") from None
    return meta, Standardiser(mean=mean, sd=sd, floor=float(meta["floor"]))


def _write_map(path: Path, data: np.ndarray, subject, dtype) -> None:
    with atomic(path) as tmp:
        nib.save(image_on_grid(data.astype(dtype), subject.affine, subject.header), tmp)


def score_apply(scorer_dir: str | Path, images: dict[str, Path], out: str | Path, *, mask: str | Path | None = None,
                value: float | None = None, top_fraction: float | None = None, connectivity: int = 26,
                min_size_mm3: float = 0.0, top_k: int = 15, figures: int = 5, name: str = "case",
                allow_grid_mismatch: bool = False, progress: bool = True) -> dict:
    """Score one case (contrast name -> NIfTI path) and write maps, clusters and figures into ``out``.

    Threshold: ``value`` (standardised score) or ``top_fraction`` of the store's voxels; default
    ``top_fraction=0.01``. Returns a summary dict (also written as ``summary.json``).
    """
    from .jobs import grid_guard  # the grid guard shared with `embed`

    scorer_dir, out = Path(scorer_dir), Path(out)
    meta, standardiser = _load_scorer_dir(scorer_dir)
    store = Store.open(meta["store"])
    encoder = load_encoder(meta["bundle"])
    if encoder.card.get("weights_sha256") != meta["bundle_sha256"]:
        raise InputError(f"bundle {meta['bundle']} changed since the scorer was fitted (checksum differs); fit again")
    missing = [c for c in encoder.channel_names if c not in images]
    if missing:
        raise InputError(f"--image: the encoder needs contrasts {list(encoder.channel_names)}; add --image {missing[0]}=PATH")
    if value is None and top_fraction is None:
        top_fraction = 0.01
    ordered = {c: Path(images[c]) for c in encoder.channel_names}
    normalisation = encoder.card.get("normalisation") or "zscore"
    subject = load_subject(ordered, subject=name, mask=mask, normalisation=normalisation)
    override = grid_guard(encoder, subject, str(ordered[encoder.channel_names[0]]), allow_grid_mismatch)
    vmask = np.zeros(subject.mask.shape, bool)
    vmask[tuple(store.voxels.T)] = True
    emb = encoder.embed_masked(subject.data, vmask, progress=progress)  # (V, D), store voxel order
    controls = store.indices("control")
    raw = np.empty(store.n_voxels)
    for v0 in tqdm(range(0, store.n_voxels, BLOCK_VOXELS), desc="score", unit="block", disable=not progress):
        v1 = min(v0 + BLOCK_VOXELS, store.n_voxels)
        model = make_scorer(meta["scorer"], **meta["params"]).fit(store.block(v0, v1, subjects=controls))
        raw[v0:v1] = model.score(emb[v0:v1])
    z = standardiser.apply(raw)
    score_map = np.zeros(vmask.shape, np.float32)
    score_map[tuple(store.voxels.T)] = z
    binary = threshold(score_map, vmask, value=value, top_fraction=top_fraction)
    labels, table = find_clusters(binary, score_map, subject.affine, connectivity=connectivity,
                                  min_size_mm3=min_size_mm3, top_k=top_k)
    out.mkdir(parents=True, exist_ok=True)
    _write_map(out / "score.nii.gz", score_map, subject, np.float32)
    _write_map(out / "clusters.nii.gz", labels, subject, np.int16)
    write_clusters_csv(out / "clusters.csv", table)
    cut = float(score_map[binary].min()) if binary.any() else float("inf")
    background = subject.data[0]
    pngs = [str(cluster_figure(out / f"cluster_{int(row['rank']):02d}.png", background, score_map, labels, row, cut,
                               subject=name)) for row in table[:figures]]
    summary = {
        "caution": CAUTION, "subject": name, "inputs": {c: str(p) for c, p in ordered.items()},
        "scorer": meta["scorer"], "params": meta["params"], "bundle_sha256": meta["bundle_sha256"],
        "threshold": {"value": value, "top_fraction": top_fraction, "applied_cut": cut},
        "connectivity": connectivity, "min_size_mm3": min_size_mm3, "n_clusters": len(table), "figures": pngs,
        "twinpatch_version": __version__, **(override or {}),
    }
    write_json(out / "summary.json", summary)
    return summary

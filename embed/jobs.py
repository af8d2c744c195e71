"""End-to-end jobs behind the commands: each composes stage functions in order, nothing more.

``export_run``: run directory (checkpoint + run.json) -> encoder bundle.
``train_job``: cohort -> training -> bundle -> one example embedding map.
``embed_subject`` / ``embed_maps``: bundle + NIfTI images -> 4D embedding maps.
``embed_store``: bundle + manifest -> cohort embedding store (resumable, shardable).
"""

from __future__ import annotations

import json
import shutil
import time
from pathlib import Path
from typing import Callable

import nibabel as nib
import numpy as np

from . import __version__
from .bundle import card_summary, load_encoder, write_bundle
from .cohort import AFFINE_ATOL_MM, Subject, load_cohort, load_subject, read_manifest, select_contrasts
from .config import Config, CohortConfig
from .dense import Encoder, write_embedding_map
from .errors import BundleError, InputError
from .fit import load_checkpoint, train
from .runsetup import check_setup

DEMO_MANIFEST = CohortConfig().manifest  # the built-in demo cohort's manifest path


def ensure_demo_cohort(manifest: Path, log: Callable[[str], None], progress: bool = True) -> None:
    """Generate the demo cohort when ``manifest`` is the default demo path and is missing."""
    if manifest.exists() or manifest.as_posix() != DEMO_MANIFEST:
        return
    from .synth import make_cohort

    log(f"demo cohort not found: generating it into {manifest.parent}/ (synthetic, under a minute)")
    make_cohort(manifest.parent, progress=progress)


def load_any_cohort(source: Path, normalisation: str, progress: bool = True):
    """A cohort from a prepared cache folder (read from disk, memory-mapped) or a manifest.csv."""
    if source.is_dir():
        from .cache import load_cache

        cohort = load_cache(source)
        if cohort.normalisation != normalisation:
            raise InputError(f"cohort cache {source} was prepared with normalisation {cohort.normalisation!r} but "
                             f"cohort.normalisation is {normalisation!r}; set --set cohort.normalisation="
                             f"{cohort.normalisation} or prepare the cache again")
        return cohort
    return load_cohort(source, normalisation=normalisation, progress=progress)


def check_run_dir(run_dir: Path, overwrite: bool) -> None:
    """Refuse to mix two runs in one folder unless ``overwrite``; never replace a folder that is not a run."""
    if not run_dir.exists() or not any(run_dir.iterdir()):
        return
    if not (run_dir / "config.toml").is_file():
        raise InputError(f"run directory {run_dir} holds files that are not a twinpatch run; "
                         "pass --out with a new or empty folder")
    if not overwrite:
        raise InputError(f"run directory {run_dir} already holds a run; pass --out with a new folder, "
                         "or --overwrite to replace that run")


def train_job(cfg: Config, run_dir: str | Path, *, overwrite: bool = False, progress: bool = True,
              log: Callable[[str], None] = print, resume: bool = False) -> dict:
    """Train, export ``RUN_DIR/encoder.safetensors`` and (``export.example_map``) embed one case.

    ``resume``: continue the run in ``run_dir`` from its last checkpoint (``cfg`` is then the
    run's own ``config.toml``). Under torchrun only rank 0 exports and embeds. Returns a dict of
    output paths and summary numbers (``bundle`` and ``map`` are None on other ranks).
    """
    from .parallel import world_info

    t0 = time.perf_counter()
    run_dir = Path(run_dir)
    manifest = Path(cfg.cohort.manifest)
    rank, _ = world_info()
    if resume:
        check_resumable(run_dir)
    elif rank == 0:  # only rank 0 writes the run dir (other ranks could see it half made)
        check_run_dir(run_dir, overwrite)
    ensure_demo_cohort(manifest, log, progress)
    cohort = select_contrasts(load_any_cohort(manifest, cfg.cohort.normalisation, progress=progress and rank == 0),
                              cfg.cohort.contrasts)
    check_setup(cfg, cohort)
    if run_dir.exists() and overwrite and not resume and rank == 0:
        shutil.rmtree(run_dir)
    result = train(cfg, cohort, run_dir, progress=progress and rank == 0, resume=resume)
    outputs = {"run_dir": run_dir, "bundle": None, "metrics": run_dir / "metrics.jsonl",
               "tensorboard": run_dir / "tb", "result": result, "map": None}
    if rank != 0:
        outputs["seconds"] = time.perf_counter() - t0
        return outputs
    bundle = outputs["bundle"] = export_run(run_dir)
    if cfg.export.example_map:
        cases = cohort.indices("case")
        pick = int(cases[0]) if len(cases) else int(cohort.indices("control")[-1])
        name = cohort.subjects[pick]
        encoder = load_encoder(bundle)
        subject = Subject(name, cohort.roles[pick], cohort.data[pick], cohort.masks[pick], None,
                          cohort.affine, cohort.header, cohort.stats[name])
        out = run_dir / "maps" / f"{name}_embedding.nii.gz"
        outputs["map"] = _embed_and_write(encoder, subject, out, {"subject": name}, progress)
    outputs["seconds"] = time.perf_counter() - t0
    return outputs


def check_resumable(run_dir: Path) -> None:
    """Refuse ``--resume`` on a folder that is not a run with a checkpoint."""
    for needed in ("config.toml", "checkpoints/last.pt"):
        if not (run_dir / needed).is_file():
            raise InputError(f"--resume {run_dir}: {needed} is missing, so this is not a resumable twinpatch run; "
                             "pass the RUN_DIR of a run started with `twinpatch train --out RUN_DIR`")


def export_run(run_dir: str | Path, out: str | Path | None = None) -> Path:
    """Bundle the encoder of a finished run: ``RUN_DIR/checkpoints/last.pt`` + ``RUN_DIR/run.json``.

    Writes ``out`` (default ``RUN_DIR/encoder.safetensors``) and returns its path.
    """
    run_dir = Path(run_dir)
    meta_path, ckpt_path = run_dir / "run.json", run_dir / "checkpoints" / "last.pt"
    for needed in (meta_path, ckpt_path):
        if not needed.is_file():
            raise BundleError(f"{run_dir} is not a finished run: {needed.name} is missing; "
                              "finish (or re-run) `twinpatch train --out RUN_DIR` first")
    try:
        card = json.loads(meta_path.read_text(encoding="utf-8"))
        state = load_checkpoint(ckpt_path)["model"]
    except Exception as exc:  # damaged JSON or checkpoint
        raise BundleError(f"{run_dir}: cannot read run.json or checkpoints/last.pt ({type(exc).__name__}: {exc})") from None
    encoder = {k[len("encoder."):]: v for k, v in state.items() if k.startswith("encoder.")}
    card["twinpatch_version"] = __version__
    return write_bundle(Path(out) if out is not None else run_dir / "encoder.safetensors", encoder, card)


def grid_differences(card: dict, affine: np.ndarray, shape: tuple[int, ...]) -> list[str]:
    """How an image grid differs from the grid in an encoder card (empty list: same grid).

    Compared: shape, orientation codes (nibabel ``aff2axcodes``), voxel size, and the whole
    affine within ``AFFINE_ATOL_MM``.
    """
    grid = card.get("grid")
    if not grid:
        return []
    want_affine = np.asarray(grid["affine"], dtype=float)
    diffs = []
    if tuple(grid["shape"]) != tuple(shape):
        diffs.append(f"shape {tuple(shape)} vs the encoder's {tuple(grid['shape'])}")
    found_codes, want_codes = "".join(nib.aff2axcodes(affine)), "".join(nib.aff2axcodes(want_affine))
    if found_codes != want_codes:
        diffs.append(f"orientation {found_codes} vs the encoder's {want_codes}")
    found_zooms = np.sqrt((np.asarray(affine)[:3, :3] ** 2).sum(axis=0))
    want_zooms = np.asarray(grid["voxel_size_mm"], dtype=float)
    if not np.allclose(found_zooms, want_zooms, rtol=0, atol=AFFINE_ATOL_MM):
        diffs.append(f"voxel size {tuple(np.round(found_zooms, 3))} mm vs the encoder's {tuple(want_zooms)} mm")
    if not diffs and not np.allclose(affine, want_affine, rtol=0, atol=AFFINE_ATOL_MM):
        worst = float(np.abs(np.asarray(affine) - want_affine).max())
        diffs.append(f"affine differs by up to {worst:.3g} mm (tolerance {AFFINE_ATOL_MM} mm)")
    return diffs


def grid_guard(encoder: Encoder, subject: Subject, where: str, allow_grid_mismatch: bool) -> dict | None:
    """Refuse a subject on another grid than the encoder's, unless overridden (then say what differs)."""
    diffs = grid_differences(encoder.card, subject.affine, subject.mask.shape)
    if diffs and not allow_grid_mismatch:
        raise InputError(f"{where}: not on the encoder's grid: {'; '.join(diffs)}; resample the images onto the "
                         "training template grid, or pass --allow-grid-mismatch to embed anyway (recorded)")
    return {"allowed_grid_mismatch": diffs} if diffs else None


def _embed_and_write(encoder: Encoder, subject: Subject, out: Path, extra: dict, progress: bool,
                     precision: str = "fp32") -> Path:
    emb = encoder.embed_volume(subject.data, subject.mask, precision=precision, progress=progress)
    sidecar = {"bundle": card_summary(encoder.card), "normalisation": subject.stats,
               "mask_voxels": int(subject.mask.sum()), "precision": precision, "research_use_only": True, **extra}
    return write_embedding_map(out, emb, subject.affine, subject.header, sidecar)


def embed_subject(bundle: str | Path, images: dict[str, Path], out: str | Path, mask: str | Path | None = None,
                  progress: bool = True, precision: str = "fp32", allow_grid_mismatch: bool = False) -> Path:
    """Embed one subject's images (contrast name -> NIfTI path) into a 4D map at ``out``.

    ``bundle`` is a bundle path or an already loaded :class:`Encoder`.
    """
    encoder = bundle if isinstance(bundle, Encoder) else load_encoder(bundle)
    names = tuple(images)
    missing = [c for c in encoder.channel_names if c not in images]
    if missing:
        raise InputError(f"--image: the encoder needs contrasts {list(encoder.channel_names)}, got {list(names)}; "
                         f"add --image {missing[0]}=PATH")
    ordered = {c: Path(images[c]) for c in encoder.channel_names}
    normalisation = encoder.card.get("normalisation") or "zscore"
    extra_names = [n for n in names if n not in encoder.channel_names]
    if extra_names:
        raise InputError(f"--image {extra_names[0]}: the encoder has no contrast of that name; "
                         f"its contrasts are {list(encoder.channel_names)}")
    subject = load_subject(ordered, mask=mask, normalisation=normalisation)
    override = grid_guard(encoder, subject, str(ordered[encoder.channel_names[0]]), allow_grid_mismatch)
    extra = {"inputs": {c: str(p) for c, p in ordered.items()}, **(override or {})}
    return _embed_and_write(encoder, subject, Path(out), extra, progress, precision)


def store_mask(rows: list, grid_shape: tuple[int, ...], progress: bool = True) -> np.ndarray:
    """The store's voxels: inside the brain masks of at least half of the controls (as the cohort mask).

    Each control's mask comes from its manifest ``mask`` file, else is derived from its images.
    """
    from tqdm.auto import tqdm

    from .cohort import cohort_mask, derive_mask, load_image

    controls = [r for r in rows if r.role == "control"]
    if not controls:
        raise InputError("the manifest has no control: the store's voxels are the controls' common brain; "
                         "add controls or pass --mask")
    votes = np.zeros(grid_shape, np.int32)
    for row in tqdm(controls, desc="store mask", unit="subject", disable=not progress):
        if row.mask is not None:
            m = np.asarray(load_image(row.mask, f"mask of subject {row.subject}").dataobj) != 0
        else:
            m = derive_mask(np.stack([np.asarray(load_image(p, f"{c} image of subject {row.subject}").dataobj,
                                                 dtype=np.float32) for c, p in row.images.items()]))
        if m.shape != tuple(grid_shape):
            raise InputError(f"mask of subject {row.subject}: shape {m.shape} differs from the encoder's grid "
                             f"{tuple(grid_shape)}")
        votes += m
    return cohort_mask(votes, len(controls), "store mask")


def embed_store(bundle: str | Path, manifest: str | Path, out: str | Path, *, shard: tuple[int, int] = (1, 1),
                dtype: str = "float32", mask: str | Path | None = None, precision: str = "fp32",
                allow_grid_mismatch: bool = False, progress: bool = True) -> dict:
    """Embed a manifest's subjects into a cohort embedding store (see :mod:`embed.store`).

    Resumable (finished subjects are skipped); ``shard=(i, n)`` embeds every n-th subject from
    the i-th (1-based), so a job array can split the cohort; whichever run finishes the last
    subject merges the store.
    """
    from tqdm.auto import tqdm

    from . import store as st
    from .cohort import load_image

    encoder = load_encoder(bundle)
    rows, contrasts = read_manifest(manifest)
    missing = [c for c in encoder.channel_names if c not in contrasts]
    if missing:
        raise InputError(f"{manifest}: no column for contrast {missing[0]!r}; the encoder needs "
                         f"{list(encoder.channel_names)}")
    index, count = shard
    if not 1 <= index <= count:
        raise InputError(f"--shard {index}/{count}: expected I/N with 1 <= I <= N, e.g. --shard 1/4")
    out = Path(out)
    grid = encoder.card.get("grid", {})
    shape = tuple(grid.get("shape", ())) or _first_shape(rows)
    if (out / "store.json").exists():
        voxels = np.load(out / "voxels.npy")
    else:
        if mask is not None:
            m = np.asarray(load_image(mask, "store mask").dataobj) != 0
        else:
            m = store_mask(rows, shape, progress)
        if not m.any():
            raise InputError(f"the store mask is empty ({mask or 'controls common brain'}); check the masks")
        voxels = np.argwhere(m)
    producer = {"bundle_sha256": encoder.card.get("weights_sha256"), "bundle_path": str(Path(bundle).resolve()),
                "precision": precision,
                "mask": str(mask) if mask else "controls (majority)"}
    st.create(out, subjects=[r.subject for r in rows], roles=[r.role for r in rows], voxels=voxels,
              dim=encoder.dim, dtype=dtype, grid=grid, producer=producer)
    vmask = np.zeros(shape, bool)
    vmask[tuple(voxels.T)] = True
    normalisation = encoder.card.get("normalisation") or "zscore"
    mine = rows[index - 1::count]
    done = 0
    for row in tqdm(mine, desc=f"embed store {index}/{count}", unit="subject", disable=not progress):
        if st.subject_done(out, row.subject):
            continue
        ordered = {c: row.images[c] for c in encoder.channel_names}
        subject = load_subject(ordered, subject=row.subject, role=row.role, mask=row.mask,
                               normalisation=normalisation)
        override = grid_guard(encoder, subject, f"subject {row.subject}", allow_grid_mismatch)
        if subject.mask.shape != vmask.shape:
            raise InputError(f"subject {row.subject}: grid {subject.mask.shape} differs from the store's {vmask.shape}")
        emb = encoder.embed_masked(subject.data, vmask, precision=precision)
        st.write_subject(out, row.subject, emb, {"subject": row.subject, "role": row.role,
                                                 "inputs": {c: str(p) for c, p in ordered.items()},
                                                 "normalisation": subject.stats, **(override or {})})
        done += 1
    remaining = st.missing_subjects(out)
    merged = False
    if not remaining:
        st.merge(out, progress=progress)
        merged = True
    return {"store": out, "embedded": done, "skipped": len(mine) - done, "remaining": remaining, "merged": merged,
            "n_voxels": int(len(voxels))}


def _first_shape(rows: list) -> tuple[int, ...]:
    from .cohort import load_image

    first = next(iter(rows[0].images.values()))
    return tuple(load_image(first, f"image of subject {rows[0].subject}").shape[:3])


def embed_maps(bundle: str | Path, manifest: str | Path, out_dir: str | Path, progress: bool = True,
               precision: str = "fp32", allow_grid_mismatch: bool = False) -> list[Path]:
    """Embed every subject of a manifest into ``OUT_DIR/<subject>_embedding.nii.gz`` (4D NIfTI maps)."""
    from tqdm.auto import tqdm

    rows, _ = read_manifest(manifest)
    encoder = load_encoder(bundle)
    out_dir = Path(out_dir)
    written = []
    for row in tqdm(rows, desc="embed subjects", unit="subject", disable=not progress):
        images = {c: p for c, p in row.images.items() if c in encoder.channel_names}
        written.append(embed_subject(encoder, images, out_dir / f"{row.subject}_embedding.nii.gz",
                                     mask=row.mask, progress=False, precision=precision,
                                     allow_grid_mismatch=allow_grid_mismatch))
    (out_dir / "subjects.json").write_text(json.dumps([r.subject for r in rows], indent=1), encoding="utf-8")
    return written

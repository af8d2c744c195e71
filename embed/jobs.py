"""End-to-end jobs behind the commands: each composes stage functions in order, nothing more.

``export_run``: run directory (checkpoint + run.json) -> encoder bundle.
``train_job``: cohort -> training -> bundle -> one example embedding map.
``embed_subject`` / ``embed_manifest``: bundle + NIfTI images -> 4D embedding maps.
"""

from __future__ import annotations

import json
import shutil
import time
from pathlib import Path
from typing import Callable

import numpy as np

from . import __version__
from .bundle import card_summary, load_encoder, write_bundle
from .cohort import AFFINE_ATOL_MM, Subject, load_cohort, load_subject, read_manifest
from .config import Config, CohortConfig
from .dense import Encoder, write_embedding_map
from .errors import BundleError, InputError
from .fit import check_setup, load_checkpoint, train

DEMO_MANIFEST = CohortConfig().manifest  # the built-in demo cohort's manifest path


def ensure_demo_cohort(manifest: Path, log: Callable[[str], None], progress: bool = True) -> None:
    """Generate the demo cohort when ``manifest`` is the default demo path and is missing."""
    if manifest.exists() or manifest.as_posix() != DEMO_MANIFEST:
        return
    from .synth import make_cohort

    log(f"demo cohort not found: generating it into {manifest.parent}/ (synthetic, under a minute)")
    make_cohort(manifest.parent, progress=progress)


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
              log: Callable[[str], None] = print) -> dict:
    """Train, export ``RUN_DIR/encoder.safetensors`` and (``export.example_map``) embed one case.

    Returns a dict of output paths and summary numbers.
    """
    t0 = time.perf_counter()
    run_dir = Path(run_dir)
    manifest = Path(cfg.cohort.manifest)
    check_run_dir(run_dir, overwrite)
    ensure_demo_cohort(manifest, log, progress)
    cohort = load_cohort(manifest, normalisation=cfg.cohort.normalisation, progress=progress)
    check_setup(cfg, cohort)
    if run_dir.exists() and overwrite:
        shutil.rmtree(run_dir)
    result = train(cfg, cohort, run_dir, progress=progress)
    bundle = export_run(run_dir)
    outputs = {"run_dir": run_dir, "bundle": bundle, "metrics": run_dir / "metrics.jsonl",
               "tensorboard": run_dir / "tb", "result": result, "map": None}
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


def check_subject_for_encoder(encoder: Encoder, contrasts: tuple[str, ...], affine: np.ndarray,
                              shape: tuple[int, ...], where: str) -> None:
    """Refuse images whose contrasts or grid differ from the encoder's card."""
    if tuple(contrasts) != tuple(encoder.channel_names):
        raise InputError(f"{where}: contrasts {list(contrasts)} do not match the encoder's "
                         f"{list(encoder.channel_names)}; pass one image per contrast, named as in the bundle")
    grid = encoder.card.get("grid", {})
    if grid and tuple(grid["shape"]) != tuple(shape):
        raise InputError(f"{where}: grid shape {tuple(shape)} differs from the encoder's {tuple(grid['shape'])}; "
                         "resample the images onto the training template grid first")
    if grid and not np.allclose(affine, np.asarray(grid["affine"]), rtol=0, atol=AFFINE_ATOL_MM):
        raise InputError(f"{where}: affine differs from the encoder's grid by more than {AFFINE_ATOL_MM} mm; "
                         "resample the images onto the training template grid first")


def _embed_and_write(encoder: Encoder, subject: Subject, out: Path, extra: dict, progress: bool) -> Path:
    emb = encoder.embed_volume(subject.data, subject.mask, progress=progress)
    sidecar = {"bundle": card_summary(encoder.card), "normalisation": subject.stats,
               "mask_voxels": int(subject.mask.sum()), "research_use_only": True, **extra}
    return write_embedding_map(out, emb, subject.affine, subject.header, sidecar)


def embed_subject(bundle: str | Path, images: dict[str, Path], out: str | Path, mask: str | Path | None = None,
                  progress: bool = True) -> Path:
    """Embed one subject's images (contrast name -> NIfTI path) into a 4D map at ``out``."""
    encoder = load_encoder(bundle)
    names = tuple(images)
    missing = [c for c in encoder.channel_names if c not in images]
    if missing:
        raise InputError(f"--image: the encoder needs contrasts {list(encoder.channel_names)}, got {list(names)}; "
                         f"add --image {missing[0]}=PATH")
    ordered = {c: Path(images[c]) for c in encoder.channel_names}
    normalisation = encoder.card.get("normalisation", {}).get("method", "zscore")
    subject = load_subject(ordered, mask=mask, normalisation=normalisation)
    check_subject_for_encoder(encoder, tuple(ordered), subject.affine, subject.mask.shape, str(ordered[names[0]]))
    inputs = {c: str(p) for c, p in ordered.items()}
    return _embed_and_write(encoder, subject, Path(out), {"inputs": inputs}, progress)


def embed_manifest(bundle: str | Path, manifest: str | Path, out_dir: str | Path, progress: bool = True) -> list[Path]:
    """Embed every subject of a manifest into ``OUT_DIR/<subject>_embedding.nii.gz``."""
    from tqdm.auto import tqdm

    rows, _ = read_manifest(manifest)
    out_dir = Path(out_dir)
    written = []
    for row in tqdm(rows, desc="embed subjects", unit="subject", disable=not progress):
        written.append(embed_subject(bundle, row.images, out_dir / f"{row.subject}_embedding.nii.gz",
                                     mask=row.mask, progress=False))
    (out_dir / "subjects.json").write_text(json.dumps([r.subject for r in rows], indent=1), encoding="utf-8")
    return written

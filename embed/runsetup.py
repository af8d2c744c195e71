"""What a training run needs besides the loop: its checks against the cohort, and its card.

:func:`check_setup` refuses a configuration that cannot train on a cohort before anything is
written; :func:`check_init_bundle` checks an ``--init`` bundle against the run; :func:`run_card`
is the plain-JSON summary (``run.json``) that export turns into a bundle card; :class:`TrainResult`
is what training returns.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from . import __version__
from .cohort import Cohort, plane_axis
from .config import Config, to_dict
from .errors import BundleError, ConfigError
from .model import final_kernel
from .pairs import check_patch_fits, split_controls
from .parallel import world_info



@dataclass(frozen=True)
class TrainResult:
    """What :func:`embed.fit.train` returns."""

    run_dir: Path
    steps: int  # steps completed
    seconds: float  # training time, summed over resumed sessions
    pairs_per_second: float
    final: dict[str, float]  # last validation metrics
    stopped_early: bool = False


def check_setup(cfg: Config, cohort: Cohort) -> int | None:
    """Refuse a configuration that cannot train on this cohort, before anything is written.

    Returns the voxel axis held fixed by the patch plane (None for 3D patches).
    """
    axis = plane_axis(cohort.affine, cfg.patch.plane) if cfg.patch.dims == 2 else None
    check_patch_fits(cohort.mask.shape, cfg.patch.size, axis)
    final_kernel(cfg.patch.size, cfg.model.channels)
    split_controls(cohort.indices("control"), cfg.cohort.val_controls, np.random.default_rng(0))
    if cfg.loss.reconstruction_weight == 0 and cfg.loss.agreement_weight == 0:
        raise ConfigError("loss.reconstruction_weight and loss.agreement_weight are both 0: nothing to train; "
                          "set one of them above 0")
    rank, world = world_info()
    if cfg.train.batch_size % world:
        raise ConfigError(f"train.batch_size={cfg.train.batch_size} does not split over {world} processes; "
                          f"use a multiple of {world}")
    if cfg.train.init:
        check_init_bundle(cfg, cohort, axis)
    return axis


def check_init_bundle(cfg: Config, cohort: Cohort, axis: int | None) -> dict:
    """Read the ``--init`` bundle and check it fits this run. Returns its encoder tensors."""
    from .bundle import read_bundle

    path = cfg.train.init
    tensors, card = read_bundle(path)
    arch, patch = card.get("architecture", {}), card.get("patch", {})
    checks = [
        ("contrasts", card.get("contrasts"), list(cohort.contrasts), "train on a cohort with the same contrasts, in the same order"),
        ("patch size", patch.get("size"), cfg.patch.size, f"set patch.size={patch.get('size')}"),
        ("patch dims", patch.get("dims", 2), cfg.patch.dims, f"set patch.dims={patch.get('dims', 2)}"),
        ("patch voxel axis", patch.get("axis"), axis, f"set patch.plane={patch.get('plane')!r}"),
        ("model.channels", arch.get("channels"), list(cfg.model.channels), f"set model.channels={arch.get('channels')}"),
        ("model.dim", arch.get("dim"), cfg.model.dim, f"set model.dim={arch.get('dim')}"),
    ]
    for what, found, want, fix in checks:
        if found != want:
            raise BundleError(f"--init {path}: the bundle's {what} is {found!r}, this run's is {want!r}; {fix}")
    return tensors


def run_card(cfg: Config, cohort: Cohort, axis: int | None, train_idx, val_idx, result: TrainResult, state: dict) -> dict:
    """What export needs besides the weights, as plain JSON."""
    # The parameters load_subject needs to normalise a new case exactly as the controls were
    # (histogram landmarks included): see embed.normalise.
    normalisation = dict(cohort.normalisation_params or {"method": cohort.normalisation, "within": "mask"})
    return {
        "twinpatch_version": __version__,
        "contrasts": list(cohort.contrasts),
        "normalisation": normalisation,
        "patch": {"size": cfg.patch.size, "dims": cfg.patch.dims,
                  "plane": cfg.patch.plane if axis is not None else None, "axis": axis, "padding": "zeros"},
        "grid": {
            "shape": list(cohort.mask.shape),
            "affine": np.asarray(cohort.affine, dtype=float).tolist(),
            "orientation": "".join(nib.aff2axcodes(cohort.affine)),
            "voxel_size_mm": [float(v) for v in cohort.voxel_size],
        },
        "architecture": {"kind": "valid-conv-encoder", "dims": cfg.patch.dims, "in_channels": len(cohort.contrasts),
                         "patch_size": cfg.patch.size,
                         "channels": list(cfg.model.channels), "dim": cfg.model.dim,
                         "activation": "leaky_relu(0.1)"},
        "training": {
            "train_controls": [cohort.subjects[i] for i in train_idx],
            "val_controls": [cohort.subjects[i] for i in val_idx],
            "steps": result.steps, "steps_planned": cfg.train.steps, "finished": result.steps >= cfg.train.steps
            or result.stopped_early, "seconds": round(result.seconds, 2),
            "pairs_per_second": round(result.pairs_per_second, 1),
            "final_validation": result.final,
            "init": cfg.train.init or None,
        },
        "config": to_dict(cfg),
    }

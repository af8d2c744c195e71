"""The training loop, as a function.

``train(cfg, cohort, run_dir)`` fills ``run_dir`` with:

- ``config.toml``: the resolved configuration (every key);
- ``metrics.jsonl`` and ``tb/``: training and validation metrics (see :mod:`embed.monitor`);
- ``checkpoints/last.pt``: model and optimiser state, written atomically at every validation,
  at the end, and on Ctrl-C (load with ``torch.load(..., weights_only=True)``);
- ``run.json``: what export needs besides the weights (contrasts, grid, patch, split, summary).

Validation uses a fixed set of co-located pairs drawn from controls held out of training.
"""

from __future__ import annotations

import contextlib
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
import torch

from . import __version__
from .cohort import Cohort, plane_axis
from .config import Config, dumps, to_dict
from .model import TwinAutoencoder, build, final_kernel
from .monitor import Monitor, collapse_warning, recon_grid
from .objective import agreement, agreement_weight, cosine_diagnostics, pair_loss
from .pairs import Pairs, check_patch_fits, sample_pairs, split_controls

LOG_EVERY = 10  # steps between training-metric lines


@dataclass(frozen=True)
class TrainResult:
    run_dir: Path
    steps: int
    seconds: float
    pairs_per_second: float
    final: dict[str, float]  # last validation metrics


def write_text_atomic(path: Path, text: str) -> None:
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def save_checkpoint(path: Path, model: TwinAutoencoder, opt: torch.optim.Optimizer, step: int, cfg: Config) -> None:
    """Atomic checkpoint; tensors and plain containers only, so ``weights_only=True`` loads it."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    torch.save({"model": model.state_dict(), "optimizer": opt.state_dict(), "step": step,
                "config": json.dumps(to_dict(cfg))}, tmp)
    os.replace(tmp, path)


def load_checkpoint(path: Path) -> dict:
    """Read a checkpoint written by :func:`save_checkpoint`, with ``weights_only=True``
    (PyTorch's restricted loader: tensors and plain containers only, no code)."""
    return torch.load(path, map_location="cpu", weights_only=True)


def _autocast(precision: str):
    if precision == "bf16":
        return torch.autocast("cpu", dtype=torch.bfloat16)
    return contextlib.nullcontext()


def _forward_pair(model: TwinAutoencoder, a: torch.Tensor, b: torch.Tensor, precision: str):
    """One pass over both halves as a single batch. Returns ``z1, z2, r1, r2`` in float32."""
    with _autocast(precision):
        z, r = model(torch.cat([a, b]))
    n = len(a)
    z, r = z.float(), r.float()
    return z[:n], z[n:], r[:n], r[n:]


@torch.no_grad()
def validate(model: TwinAutoencoder, val: Pairs, weight: float, cfg: Config, chunk: int = 1024) -> tuple[dict, np.ndarray]:
    """Validation loss terms and embedding diagnostics on the fixed held-out pairs.

    Returns ``(metrics, grid)`` where ``grid`` is a reconstruction image of the first pairs.
    """
    model.eval()
    z1s, z2s, rec_sum, n_sum, grid = [], [], 0.0, 0, None
    for i in range(0, len(val.a), chunk):
        a, b = torch.from_numpy(val.a[i:i + chunk]), torch.from_numpy(val.b[i:i + chunk])
        z1, z2, r1, r2 = _forward_pair(model, a, b, cfg.train.precision)
        terms = pair_loss(a, b, r1, r2, z1, z2, weight, cfg.loss.centred, cfg.loss.reconstruction)
        rec_sum += terms["reconstruction"].item() * len(a)
        n_sum += len(a)
        z1s.append(z1)
        z2s.append(z2)
        if grid is None:
            grid = recon_grid(a.numpy(), r1.numpy())
    z1, z2 = torch.cat(z1s), torch.cat(z2s)
    metrics = {
        "reconstruction": rec_sum / n_sum,
        "agreement": agreement(z1, z2, cfg.loss.centred).item(),
        **cosine_diagnostics(z1, z2),
    }
    metrics["total"] = metrics["reconstruction"] + weight * metrics["agreement"]
    model.train()
    return metrics, grid


def check_setup(cfg: Config, cohort: Cohort) -> int:
    """Refuse a configuration that cannot train on this cohort, before anything is written.

    Returns the voxel axis held fixed by the patch plane.
    """
    axis = plane_axis(cohort.affine, cfg.patch.plane)
    check_patch_fits(cohort.mask.shape, cfg.patch.size, axis)
    final_kernel(cfg.patch.size, cfg.model.channels)
    split_controls(cohort.indices("control"), cfg.cohort.val_controls, np.random.default_rng(0))
    return axis


def train(cfg: Config, cohort: Cohort, run_dir: str | Path, progress: bool = True) -> TrainResult:
    """Train the twin autoencoder on the cohort's controls; see the module docstring for outputs."""
    axis = check_setup(cfg, cohort)
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    if cfg.train.threads:
        torch.set_num_threads(cfg.train.threads)
    p = cfg.patch.size
    rng = np.random.default_rng(cfg.train.seed)
    train_idx, val_idx = split_controls(cohort.indices("control"), cfg.cohort.val_controls, rng)
    voxels = np.argwhere(cohort.mask)
    val = sample_pairs(cohort.data, val_idx, voxels, cfg.train.val_pairs, p, axis,
                       np.random.default_rng([cfg.train.seed, 1]))
    model = build(len(cohort.contrasts), p, cfg.model.channels, cfg.model.dim, cfg.train.seed)
    opt = torch.optim.Adam(model.parameters(), lr=cfg.train.lr)
    write_text_atomic(run_dir / "config.toml", dumps(cfg))
    ckpt = run_dir / "checkpoints" / "last.pt"
    steps, n = cfg.train.steps, cfg.train.batch_size
    loss_cfg = cfg.loss

    monitor = Monitor(run_dir, steps, progress)
    val_metrics: dict[str, float] = {}
    step = 0
    t0 = time.perf_counter()
    try:
        model.train()
        for step in range(steps):
            w = agreement_weight(step, steps, loss_cfg.agreement_weight, loss_cfg.schedule, loss_cfg.ramp_fraction)
            batch = sample_pairs(cohort.data, train_idx, voxels, n, p, axis, rng)
            a, b = torch.from_numpy(batch.a), torch.from_numpy(batch.b)
            z1, z2, r1, r2 = _forward_pair(model, a, b, cfg.train.precision)
            terms = pair_loss(a, b, r1, r2, z1, z2, w, loss_cfg.centred, loss_cfg.reconstruction)
            opt.zero_grad(set_to_none=True)
            terms["total"].backward()
            opt.step()
            if step % LOG_EVERY == 0 or step == steps - 1:
                values = {k: v.item() for k, v in terms.items()}
                values.update(weight=w, lr=opt.param_groups[0]["lr"],
                              cosine=torch.nn.functional.cosine_similarity(z1, z2, dim=1).mean().item())
                monitor.log(step, "train", values)
                monitor.advance(0, {"rec": values["reconstruction"], "agr": values["agreement"], "w": w})
            if (step + 1) % cfg.train.val_every == 0 or step == steps - 1:
                val_metrics, grid = validate(model, val, w, cfg)
                monitor.log(step, "val", val_metrics)
                monitor.image("val/reconstruction", grid, step)
                message = collapse_warning(val_metrics)
                if message:
                    monitor.warn(message)
                save_checkpoint(ckpt, model, opt, step + 1, cfg)
            monitor.advance(1, {})
    except KeyboardInterrupt:
        save_checkpoint(ckpt, model, opt, step, cfg)
        monitor.close()
        raise
    seconds = time.perf_counter() - t0
    result = TrainResult(run_dir, steps, seconds, steps * n / seconds, val_metrics)
    hp = {f"{s}.{k}": v for s, sec in to_dict(cfg).items() for k, v in sec.items() if s != "cohort" or k != "manifest"}
    monitor.hparams(hp, {k: val_metrics[k] for k in ("reconstruction", "cos_colocated", "cos_random", "effective_rank")})
    monitor.close()
    write_text_atomic(run_dir / "run.json", json.dumps(run_card(cfg, cohort, axis, train_idx, val_idx, result), indent=2))
    return result


def run_card(cfg: Config, cohort: Cohort, axis: int, train_idx, val_idx, result: TrainResult) -> dict:
    """What export needs besides the weights, as plain JSON."""
    return {
        "twinpatch_version": __version__,
        "contrasts": list(cohort.contrasts),
        "normalisation": {"method": cohort.normalisation, "within": "mask"},
        "patch": {"size": cfg.patch.size, "plane": cfg.patch.plane, "axis": axis, "padding": "zeros"},
        "grid": {
            "shape": list(cohort.mask.shape),
            "affine": np.asarray(cohort.affine, dtype=float).tolist(),
            "orientation": "".join(nib.aff2axcodes(cohort.affine)),
            "voxel_size_mm": [float(v) for v in cohort.voxel_size],
        },
        "architecture": {"kind": "valid-conv-encoder", "in_channels": len(cohort.contrasts), "patch_size": cfg.patch.size,
                         "channels": list(cfg.model.channels), "dim": cfg.model.dim,
                         "activation": "leaky_relu(0.1)"},
        "training": {
            "train_controls": [cohort.subjects[i] for i in train_idx],
            "val_controls": [cohort.subjects[i] for i in val_idx],
            "steps": result.steps, "seconds": round(result.seconds, 2),
            "pairs_per_second": round(result.pairs_per_second, 1),
            "final_validation": result.final,
        },
        "config": to_dict(cfg),
    }

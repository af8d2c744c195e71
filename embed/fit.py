"""The training loop, as a function; checkpoints, exact resume, data-parallel training.

``train(cfg, cohort, run_dir)`` fills ``run_dir`` with:

- ``config.toml``: the resolved configuration (every key);
- ``metrics.jsonl`` and ``tb/``: training and validation metrics (see :mod:`embed.monitor`);
- ``checkpoints/last.pt``: everything needed to continue exactly (model, optimiser, step,
  early-stopping state, the torch random state; the pair sampler draws step ``t`` from
  ``np.random.default_rng([seed, 2, t, rank])``, so the step is its whole state). Written
  atomically at step 0, every ``train.checkpoint_every`` steps, at the end and on Ctrl-C or
  SIGTERM; loads with ``torch.load(..., weights_only=True)``;
- ``run.json``: what export needs besides the weights (contrasts, grid, patch, split, summary),
  written at the start and at the end, so a run dir can always be exported and resumed.

``train(..., resume=True)`` continues from ``checkpoints/last.pt``: same weights, same batches,
same result as an uninterrupted run (bit for bit with ``train.deterministic`` and the same
thread count). Validation uses fixed co-located pairs from controls held out of training.

Under ``torchrun`` (``WORLD_SIZE`` > 1) each process draws ``batch_size / world`` pairs per step,
gradients are averaged with ``torch.distributed`` (gloo) before every update, and only rank 0
validates and writes to ``run_dir``. With one process the result equals the plain path.
"""

from __future__ import annotations

import json
import math
import signal
import threading
import time
from pathlib import Path

import numpy as np
import torch

from .files import atomic, write_text
from .cohort import Cohort
from .config import Config, dumps, to_dict
from .model import TwinAutoencoder, build, forward_matmul
from .monitor import Monitor, collapse_warning, recon_grid, spike_warning, truncate_metrics
from .objective import (agreement, agreement_space, agreement_weight, cosine_diagnostics, mmd_to_prior,
                        pair_loss, prior_draw, retrieval_score)
from .pairs import Pairs, RetrievalSet, sample_pairs, sample_retrieval, split_controls
from .parallel import average_gradients, world_info
from .runsetup import TrainResult, check_init_bundle, check_setup, run_card

LOG_EVERY = 10  # steps between training-metric lines
CHECKPOINT = Path("checkpoints") / "last.pt"
# Early-stopping metrics and their direction (+1: higher is better).
STOP_DIRECTION = {"total": -1.0, "reconstruction": -1.0, "retrieval": 1.0, "cos_gap": 1.0}


def save_checkpoint(path: Path, state: dict) -> None:
    """Atomic ``torch.save``; ``state`` holds tensors and plain values only (``weights_only`` loads it)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic(path) as tmp:
        torch.save(state, tmp)


def load_checkpoint(path: Path) -> dict:
    """Read a checkpoint written by :func:`save_checkpoint`, with ``weights_only=True``
    (PyTorch's restricted loader: tensors and plain containers only, no code)."""
    return torch.load(path, map_location="cpu", weights_only=True)


def forward_pair(model: TwinAutoencoder, a: torch.Tensor, b: torch.Tensor, precision: str):
    """One pass over both halves as one batch. Returns ``z1, z2, r1, r2`` in float32.

    ``bf16``: :func:`embed.model.forward_matmul` in bfloat16; ``fp32``: the modules.
    """
    x = torch.cat([a, b])
    if precision == "bf16":
        z, r = forward_matmul(model, x, torch.bfloat16)
    else:
        z, r = model(x)
    n = len(a)
    return z[:n], z[n:], r[:n], r[n:]


@torch.no_grad()
def validate(model: TwinAutoencoder, val: Pairs, retrieval: RetrievalSet, weight: float, cfg: Config,
             chunk: int = 1024) -> tuple[dict, np.ndarray, np.ndarray]:
    """Validation terms and embedding diagnostics (float32 modules, held-out controls).

    Returns ``(metrics, grid, z1)``: ``grid`` is a reconstruction image of the first pairs and
    ``z1: (N, D)`` the embeddings of the first patches (for the projector).
    """
    model.eval()
    space = agreement_space(cfg.loss.centred, cfg.loss.batch_norm)
    z1s, z2s, rec_sum, grid = [], [], 0.0, None
    for i in range(0, len(val.a), chunk):
        a, b = torch.from_numpy(val.a[i:i + chunk]), torch.from_numpy(val.b[i:i + chunk])
        z1, z2, r1, r2 = forward_pair(model, a, b, "fp32")
        terms = pair_loss(a, b, r1, r2, z1, z2, weight, space, cfg.loss.reconstruction)
        rec_sum += terms["reconstruction"].item() * len(a)
        z1s.append(z1)
        z2s.append(z2)
        if grid is None:
            grid = recon_grid(a.numpy(), r1.numpy())
    z1, z2 = torch.cat(z1s), torch.cat(z2s)
    metrics = {"reconstruction": rec_sum / len(val.a), "agreement": agreement(z1, z2, space).item(),
               **cosine_diagnostics(z1, z2)}
    both = torch.cat([z1, z2])
    metrics["mmd"] = mmd_to_prior(both, prior_draw(len(both), both.shape[1], [cfg.train.seed, 5])).item()
    metrics["total"] = (cfg.loss.reconstruction_weight * metrics["reconstruction"] + weight * metrics["agreement"]
                        + cfg.loss.mmd_weight * metrics["mmd"])
    metrics["cos_gap"] = metrics["cos_colocated"] - metrics["cos_random"]
    q = model.encoder.embed(torch.from_numpy(retrieval.query)).numpy()
    cand = retrieval.candidates
    c = model.encoder.embed(torch.from_numpy(cand.reshape(-1, *cand.shape[2:]))).numpy()
    metrics["retrieval"] = retrieval_score(q, c.reshape(cand.shape[0], cand.shape[1], -1), retrieval.true_index)
    model.train()
    return metrics, grid, z1.numpy()


class _StopRequest:
    """Turn SIGINT / SIGTERM into a flag the loop checks after each step (a second Ctrl-C stops at once)."""

    def __init__(self):
        self.requested = False
        self._old = {}

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, signal.SIGTERM):
                self._old[sig] = signal.signal(sig, self._handle)
        return self

    def _handle(self, signum, frame):
        self.requested = True
        signal.signal(signum, signal.default_int_handler)

    def __exit__(self, *exc):
        for sig, old in self._old.items():
            signal.signal(sig, old)


def train(cfg: Config, cohort: Cohort, run_dir: str | Path, progress: bool = True, resume: bool = False) -> TrainResult:
    """Train the twin autoencoder on the cohort's controls; see the module docstring for outputs."""
    axis = check_setup(cfg, cohort)
    threads, deterministic = torch.get_num_threads(), torch.are_deterministic_algorithms_enabled()
    if cfg.train.threads:
        torch.set_num_threads(cfg.train.threads)
    if cfg.train.deterministic:
        torch.use_deterministic_algorithms(True)
    try:
        return _train(cfg, cohort, Path(run_dir), axis, progress, resume)
    finally:  # the caller's settings, as they were
        torch.set_num_threads(threads)
        torch.use_deterministic_algorithms(deterministic)


def _train(cfg: Config, cohort: Cohort, run_dir: Path, axis: int | None, progress: bool, resume: bool) -> TrainResult:
    rank, world = world_info()
    main = rank == 0
    p, tc, lc = cfg.patch.size, cfg.train, cfg.loss
    train_idx, val_idx = split_controls(cohort.indices("control"), cfg.cohort.val_controls,
                                        np.random.default_rng(cfg.cohort.split_seed))
    voxels = np.argwhere(cohort.mask)
    val = sample_pairs(cohort.data, val_idx, voxels, tc.val_pairs, p, axis, np.random.default_rng([tc.seed, 1]))
    retrieval = sample_retrieval(cohort.data, int(val_idx[0]), int(val_idx[1]), voxels, tc.retrieval_voxels, p,
                                 axis, np.random.default_rng([tc.seed, 3]))
    model = build(len(cohort.contrasts), p, cfg.model.channels, cfg.model.dim, tc.seed, cfg.patch.dims)
    opt = torch.optim.Adam(model.parameters(), lr=tc.lr)
    params = list(model.parameters())
    ckpt_path = run_dir / CHECKPOINT
    state = {"best": None, "bad": 0, "val": {}, "seconds": 0.0, "stopped_early": False}
    if resume:
        ckpt = load_checkpoint(ckpt_path)
        model.load_state_dict(ckpt["model"])
        opt.load_state_dict(ckpt["optimizer"])
        torch.set_rng_state(ckpt["torch_rng"])
        start = int(ckpt["step"])
        state.update(json.loads(ckpt["state"]))
    else:
        start = 0
        if tc.init:
            model.encoder.load_state_dict(check_init_bundle(cfg, cohort, axis), strict=True)

    def checkpoint(step: int) -> None:
        if main:
            save_checkpoint(ckpt_path, {"model": model.state_dict(), "optimizer": opt.state_dict(), "step": step,
                                        "torch_rng": torch.get_rng_state(), "state": json.dumps(state),
                                        "config": json.dumps(to_dict(cfg)), "world_size": world})

    def write_card(step: int, seconds: float) -> None:
        if main:
            result = TrainResult(run_dir, step, seconds, step * tc.batch_size / max(seconds, 1e-9), state["val"],
                                 bool(state.get("stopped_early")))
            write_text(run_dir / "run.json",
                              json.dumps(run_card(cfg, cohort, axis, train_idx, val_idx, result, state), indent=2))

    monitor = None
    if main:
        run_dir.mkdir(parents=True, exist_ok=True)
        if resume:
            truncate_metrics(run_dir / "metrics.jsonl", start)
        else:
            write_text(run_dir / "config.toml", dumps(cfg))
            checkpoint(0)
            write_card(0, 0.0)
        monitor = Monitor(run_dir, tc.steps, progress, start_step=start)
    steps, n = tc.steps, tc.batch_size // world
    space, direction = agreement_space(lc.centred, lc.batch_norm), STOP_DIRECTION.get(tc.early_stop)
    t0, done, stop_early, z_sample = time.perf_counter(), start, False, None
    w = agreement_weight(max(start - 1, 0), steps, lc.agreement_weight, lc.schedule, lc.ramp_fraction)
    try:
        with _StopRequest() as stop:
            model.train()
            for step in range(start, start if state["stopped_early"] else steps):  # an early stop is final
                w = agreement_weight(step, steps, lc.agreement_weight, lc.schedule, lc.ramp_fraction)
                batch = sample_pairs(cohort.data, train_idx, voxels, n, p, axis,
                                     np.random.default_rng([tc.seed, 2, step, rank]))
                a, b = torch.from_numpy(batch.a), torch.from_numpy(batch.b)
                z1, z2, r1, r2 = forward_pair(model, *noisy(a, b, tc.input_noise, [tc.seed, 5, step, rank]),
                                              tc.precision)
                terms = pair_loss(a, b, r1, r2, z1, z2, w, space, lc.reconstruction, lc.reconstruction_weight)
                if lc.mmd_weight > 0:
                    both = torch.cat([z1, z2])
                    terms["mmd"] = mmd_to_prior(both, prior_draw(len(both), both.shape[1], [tc.seed, 4, step, rank]))
                    terms["total"] = terms["total"] + lc.mmd_weight * terms["mmd"]
                opt.zero_grad(set_to_none=True)
                terms["total"].backward()
                collective_stop = world > 1 and average_gradients(params, world, stop.requested)
                opt.step()
                done = step + 1
                if main and (step % LOG_EVERY == 0 or done == steps):
                    values = {k: v.item() for k, v in terms.items()}
                    values.update(weight=w, lr=opt.param_groups[0]["lr"],
                                  cosine=torch.nn.functional.cosine_similarity(z1, z2, dim=1).mean().item())
                    monitor.log(step, "train", values)
                    monitor.advance(0, {"rec": values["reconstruction"], "agr": values["agreement"], "w": w})
                if done % tc.val_every == 0 or done == steps:
                    if main:
                        stop_early, z_sample = _validate_step(model, val, retrieval, w, cfg, monitor, state, step,
                                                              direction)
                    if world > 1:
                        flag = torch.tensor([float(stop_early)])
                        torch.distributed.broadcast(flag, 0)
                        stop_early = bool(flag.item())
                state["stopped_early"] = stop_early
                if collective_stop if world > 1 else stop.requested:  # every process stops after the same step
                    raise KeyboardInterrupt
                if done % tc.checkpoint_every == 0 or done == steps or stop_early:
                    state["seconds"] += time.perf_counter() - t0
                    t0 = time.perf_counter()
                    checkpoint(done)
                if main:
                    monitor.advance(1, {})
                if stop_early:
                    if main:
                        monitor.warn(f"early stop at step {done}: validation {tc.early_stop} did not improve "
                                     f"for {tc.patience} validations")
                    break
    except KeyboardInterrupt:
        state["seconds"] += time.perf_counter() - t0
        checkpoint(done)
        write_card(done, state["seconds"])
        if monitor is not None:
            monitor.close()
        raise
    seconds = state["seconds"]
    result = TrainResult(run_dir, done, seconds, done * tc.batch_size / max(seconds, 1e-9), state["val"],
                         state["stopped_early"])
    if main:
        if tc.projector_points:
            if z_sample is None:
                _, _, z_sample = validate(model, val, retrieval, w, cfg)
            monitor.projector(z_sample[:tc.projector_points], val, cohort.subjects, axis, done)
        hp = {f"{s}.{k}": v for s, sec in to_dict(cfg).items() for k, v in sec.items()
              if s != "cohort" or k != "manifest"}
        monitor.hparams(hp, {k: state["val"][k] for k in ("reconstruction", "cos_colocated", "cos_random",
                                                          "effective_rank", "retrieval") if k in state["val"]})
        spike = spike_warning(state.get("val_totals", []))
        if spike:
            monitor.warn(spike)
        monitor.close()
        write_card(done, seconds)
    return result


def _validate_step(model, val, retrieval, w, cfg, monitor, state, step, direction) -> tuple[bool, np.ndarray]:
    """Validate, log, warn on collapse, update the early-stopping state. Returns ``(stop now, z1)``."""
    metrics, grid, z1 = validate(model, val, retrieval, w, cfg)
    state["val"] = metrics
    state["val_totals"] = (state.get("val_totals", []) + [metrics["total"]])[-6:]
    monitor.log(step, "val", metrics)
    monitor.image("val/reconstruction", grid, step)
    message = collapse_warning(metrics)
    if message:
        monitor.warn(message)
    if direction is None:
        return False, z1
    value = direction * metrics[cfg.train.early_stop]
    if state["best"] is None or (math.isfinite(value) and value > state["best"]):
        state["best"], state["bad"] = value, 0
        return False, z1
    state["bad"] += 1
    return state["bad"] >= cfg.train.patience, z1


def noisy(a: torch.Tensor, b: torch.Tensor, sd: float, seed: list) -> tuple[torch.Tensor, torch.Tensor]:
    """The encoder's inputs: ``a``, ``b`` plus Gaussian noise of ``sd`` (a denoising autoencoder: the
    reconstruction target stays the clean patch). Seeded per step, so a resumed run draws the same noise."""
    if sd <= 0:
        return a, b
    rng = np.random.default_rng(seed)
    return tuple(x + torch.from_numpy(rng.standard_normal(x.shape, dtype=np.float32) * np.float32(sd)) for x in (a, b))

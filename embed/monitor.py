"""Watching a run: progress bar, ``metrics.jsonl``, TensorBoard, collapse warnings.

Every logged value goes to ``RUN_DIR/metrics.jsonl`` (one JSON object per line:
``{"step": ..., "split": "train" | "val", name: value, ...}``) and to TensorBoard under
``RUN_DIR/tb`` as ``split/name``. Open it with ``tensorboard --logdir RUN_DIR/tb``.
TensorBoard also gets a reconstruction grid per validation, the run's hyper-parameters with its
final validation metrics (HPARAMS tab) and a sample of validation embeddings for the projector
(PROJECTOR tab, labelled by subject and slice).

Validation diagnostics (held-out controls): ``reconstruction``; ``cos_colocated`` vs
``cos_random`` (cosines of centred embeddings) and their difference ``cos_gap``; ``spread`` and
``effective_rank`` (collapse: the agreement term alone drives every embedding to one point or one
line); ``retrieval``: the fraction of voxels whose embedding in one held-out control is nearest to
the other control's embedding at the same voxel among its 27 neighbours (chance = 1/27).

On resume, :func:`truncate_metrics` drops lines at or after the checkpoint's step and the
TensorBoard writer purges the same steps, so no step is logged twice.
"""

from __future__ import annotations

import json
import math
import statistics
from pathlib import Path

import numpy as np
from tqdm.auto import tqdm

from .files import write_text

# Below these the embedding has collapsed onto (nearly) one point or one line
# (common practice, no source; the values are ours).
MIN_SPREAD = 1e-3
MIN_EFFECTIVE_RANK = 1.5
# Below this, random pairs have a raw cosine above 0.995: every embedding points one way, the
# collapse that the raw agreement term alone drives to (measured on the tiny test cohort:
# agreement-only runs reach 1e-3 .. 2e-4, runs with reconstruction stay near 0.07).
MIN_DIRECTION_SPREAD = 5e-3
# A validation total above this multiple of the median of the previous 5 is a loss spike. Spikes
# seen on the demo with agreement weight 2 were 2.5-5x and passed within 100 steps; ordinary
# validation-to-validation changes late in a run stayed under 1.3x.
SPIKE_FACTOR = 1.5


def collapse_warning(diag: dict[str, float]) -> str | None:
    """A one-line warning when validation diagnostics show a collapsed embedding, else None."""
    if diag.get("spread", 1.0) < MIN_SPREAD:
        return f"embedding collapse: spread {diag['spread']:.2e} < {MIN_SPREAD} (all embeddings nearly equal)"
    if diag.get("direction_spread", 1.0) < MIN_DIRECTION_SPREAD:
        return (f"embedding collapse: random pairs have raw cosine {1 - diag['direction_spread']:.4f} > "
                f"{1 - MIN_DIRECTION_SPREAD} (every embedding points the same way); raise "
                "loss.reconstruction_weight or lower loss.agreement_weight")
    if diag.get("effective_rank", 2.0) < MIN_EFFECTIVE_RANK:
        return (f"embedding collapse: effective rank {diag['effective_rank']:.2f} < {MIN_EFFECTIVE_RANK} "
                "(embeddings lie on a line); lower loss.agreement_weight")
    return None


def spike_warning(totals: list[float]) -> str | None:
    """A one-line warning when the last of the validation ``totals`` is a loss spike, else None.

    A spike: above ``SPIKE_FACTOR`` times the median of the (up to) 5 validations before it; needs
    at least 3 before it.
    """
    if len(totals) < 4:
        return None
    median = statistics.median(totals[-6:-1])
    if not totals[-1] > SPIKE_FACTOR * median:
        return None
    return (f"the run ended on a validation loss spike: total {totals[-1]:.4f}, {totals[-1] / median:.1f}x the median "
            f"{median:.4f} of the validations before it, so the exported encoder is caught mid-spike; train it "
            "again with a slightly different train.steps or a lower train.lr")


def recon_grid(x: np.ndarray, recon: np.ndarray, n: int = 8) -> np.ndarray:
    """Image of inputs above reconstructions: ``x, recon: (N, C, p, p)`` -> ``(2 * C * p, n * p)`` in [0, 1].

    Rows per contrast: input, then reconstruction; columns: the first ``n`` patches. Each
    contrast is scaled by the input's range over the shown patches. Cubes ``(N, C, p, p, p)``
    show their middle slice along the last axis.
    """
    if x.ndim == 5:
        x, recon = x[..., x.shape[-1] // 2], recon[..., recon.shape[-1] // 2]
    n = min(n, len(x))
    rows = []
    for c in range(x.shape[1]):
        lo, hi = float(x[:n, c].min()), float(x[:n, c].max())
        scale = hi - lo if hi > lo else 1.0
        for src in (x, recon):
            rows.append(np.concatenate([(src[i, c] - lo) / scale for i in range(n)], axis=1))
    return np.clip(np.concatenate(rows, axis=0), 0.0, 1.0).astype(np.float32)


def truncate_metrics(path: Path, step: int) -> int:
    """Keep the lines of ``metrics.jsonl`` whose step is below ``step`` (complete JSON lines only).

    Rewrites the file atomically; returns the number of lines kept.
    """
    path = Path(path)
    if not path.exists():
        return 0
    kept = []
    for line in path.read_text(encoding="utf-8").splitlines():
        try:
            row = json.loads(line)
        except json.JSONDecodeError:  # a line cut short by a kill
            continue
        if isinstance(row, dict) and isinstance(row.get("step"), int) and row["step"] < step:
            kept.append(line)
    write_text(path, "".join(x + "\n" for x in kept))
    return len(kept)


class Monitor:
    """Progress bar + metrics file + TensorBoard writer for one run."""

    def __init__(self, run_dir: Path, total_steps: int, progress: bool = True, start_step: int = 0):
        from torch.utils.tensorboard import SummaryWriter  # slow import; only when a run starts

        self.run_dir = Path(run_dir)
        self.metrics_path = self.run_dir / "metrics.jsonl"
        self._metrics = open(self.metrics_path, "a", encoding="utf-8")
        self.tb = SummaryWriter(log_dir=str(self.run_dir / "tb"), purge_step=start_step or None)
        self.bar = tqdm(total=total_steps, initial=start_step, desc="train", unit="step",
                        disable=not progress, dynamic_ncols=True)
        self.warnings: list[str] = []

    def log(self, step: int, split: str, values: dict[str, float]) -> None:
        clean = {k: float(v) for k, v in values.items()}
        self._metrics.write(json.dumps({"step": step, "split": split, **clean}) + "\n")
        self._metrics.flush()
        for k, v in clean.items():
            if math.isfinite(v):
                self.tb.add_scalar(f"{split}/{k}", v, step)

    def image(self, tag: str, img: np.ndarray, step: int) -> None:
        """``img: (H, W)`` in [0, 1]."""
        self.tb.add_image(tag, img[None], step, dataformats="CHW")

    def advance(self, n: int, postfix: dict[str, float]) -> None:
        self.bar.set_postfix({k: f"{v:.4f}" for k, v in postfix.items()}, refresh=False)
        self.bar.update(n)

    def warn(self, message: str) -> None:
        if message not in self.warnings:
            self.warnings.append(message)
            self.bar.write(f"warning: {message}")

    def hparams(self, hparams: dict, metrics: dict[str, float]) -> None:
        flat = {k: (v if isinstance(v, (int, float, str, bool)) else str(v)) for k, v in hparams.items()}
        self.tb.add_hparams(flat, {f"hparam/{k}": float(v) for k, v in metrics.items()}, run_name="hparams")

    def projector(self, z: np.ndarray, val, subjects: tuple[str, ...], axis: int | None, step: int) -> None:
        """Validation embeddings ``z: (N, D)`` of the first patches of ``val`` for the projector.

        Labels: the subject and the slice along ``axis`` (3D patches, ``axis=None``: the voxel "x,y,z")."""
        n = len(z)
        where = (lambda c: str(int(c[axis]))) if axis is not None else (lambda c: ",".join(str(int(v)) for v in c))
        meta = [[subjects[int(s)], where(c)] for s, c in zip(val.subject_a[:n], val.centres[:n])]
        header = ["subject", "slice" if axis is not None else "voxel"]
        self.tb.add_embedding(np.asarray(z, dtype=np.float32), metadata=meta, metadata_header=header,
                              global_step=step, tag="val_embeddings")

    def close(self) -> None:
        self.bar.close()
        self.tb.close()
        self._metrics.close()

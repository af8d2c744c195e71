"""Watching a run: progress bar, ``metrics.jsonl``, TensorBoard, collapse warnings.

Every logged value goes to ``RUN_DIR/metrics.jsonl`` (one JSON object per line:
``{"step": ..., "split": "train" | "val", name: value, ...}``) and to TensorBoard under
``RUN_DIR/tb`` as ``split/name``. Open it with ``tensorboard --logdir RUN_DIR/tb``.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
from tqdm.auto import tqdm

# Below these the embedding has collapsed onto (nearly) one point or one line
# (common practice, no source; the values are ours).
MIN_SPREAD = 1e-3
MIN_EFFECTIVE_RANK = 1.5


def collapse_warning(diag: dict[str, float]) -> str | None:
    """A one-line warning when validation diagnostics show a collapsed embedding, else None."""
    if diag.get("spread", 1.0) < MIN_SPREAD:
        return f"embedding collapse: spread {diag['spread']:.2e} < {MIN_SPREAD} (all embeddings nearly equal)"
    if diag.get("effective_rank", 2.0) < MIN_EFFECTIVE_RANK:
        return (f"embedding collapse: effective rank {diag['effective_rank']:.2f} < {MIN_EFFECTIVE_RANK} "
                "(embeddings lie on a line); lower loss.agreement_weight")
    return None


def recon_grid(x: np.ndarray, recon: np.ndarray, n: int = 8) -> np.ndarray:
    """Image of inputs above reconstructions: ``x, recon: (N, C, p, p)`` -> ``(2 * C * p, n * p)`` in [0, 1].

    Rows per contrast: input, then reconstruction; columns: the first ``n`` patches. Each
    contrast is scaled by the input's range over the shown patches.
    """
    n = min(n, len(x))
    rows = []
    for c in range(x.shape[1]):
        lo, hi = float(x[:n, c].min()), float(x[:n, c].max())
        scale = hi - lo if hi > lo else 1.0
        for src in (x, recon):
            rows.append(np.concatenate([(src[i, c] - lo) / scale for i in range(n)], axis=1))
    return np.clip(np.concatenate(rows, axis=0), 0.0, 1.0).astype(np.float32)


class Monitor:
    """Progress bar + metrics file + TensorBoard writer for one run."""

    def __init__(self, run_dir: Path, total_steps: int, progress: bool = True, start_step: int = 0):
        from torch.utils.tensorboard import SummaryWriter  # slow import; only when a run starts

        self.run_dir = Path(run_dir)
        self.metrics_path = self.run_dir / "metrics.jsonl"
        self._metrics = open(self.metrics_path, "a", encoding="utf-8")
        self.tb = SummaryWriter(log_dir=str(self.run_dir / "tb"))
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

    def close(self) -> None:
        self.bar.close()
        self.tb.close()
        self._metrics.close()

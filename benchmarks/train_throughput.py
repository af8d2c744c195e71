"""Pair sampling and training-step throughput on the demo grid, measured in one run.

    python benchmarks/train_throughput.py [--steps 40] [--batch 128]

Prints co-located pairs per second for (a) the pair sampler alone, (b) one fp32 training step
of the demo architecture, (c) the same step under bf16 autocast, and the ratios between them.
Uses a random cohort stack of the demo's shape (20 controls, 2 contrasts, 99x117x95 voxels),
so it needs no data on disk. Numbers are wall-clock on this machine; run it on an idle machine.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch

from embed.config import Config
from embed.model import build
from embed.objective import pair_loss
from embed.pairs import sample_pairs


def timed(fn, repeats: int) -> float:
    fn()  # warm-up
    fn()
    t0 = time.perf_counter()
    for _ in range(repeats):
        fn()
    return (time.perf_counter() - t0) / repeats


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--steps", type=int, default=40)
    ap.add_argument("--batch", type=int, default=Config().train.batch_size)
    args = ap.parse_args()
    cfg = Config()
    rng = np.random.default_rng(0)
    data = rng.normal(size=(20, 2, 99, 117, 95)).astype(np.float32)
    voxels = np.argwhere(np.ones((99, 117, 95), bool))[::7]
    pool = np.arange(20)
    n, p = args.batch, cfg.patch.size

    t_sample = timed(lambda: sample_pairs(data, pool, voxels, n, p, 2, rng), args.steps)
    batch = sample_pairs(data, pool, voxels, n, p, 2, rng)
    a, b = torch.from_numpy(batch.a), torch.from_numpy(batch.b)
    results = {}
    for precision in ("fp32", "bf16"):
        model = build(2, p, cfg.model.channels, cfg.model.dim, 0)
        opt = torch.optim.Adam(model.parameters(), lr=1e-3)

        def step():
            ctx = torch.autocast("cpu", dtype=torch.bfloat16, enabled=precision == "bf16")
            with ctx:
                z, r = model(torch.cat([a, b]))
            z, r = z.float(), r.float()
            loss = pair_loss(a, b, r[:n], r[n:], z[:n], z[n:], 0.5)["total"]
            opt.zero_grad()
            loss.backward()
            opt.step()

        results[precision] = timed(step, args.steps)
    print(f"threads {torch.get_num_threads()}, batch {n} pairs, patch {p}, channels {list(cfg.model.channels)}, "
          f"dim {cfg.model.dim}")
    print(f"sampler alone     {n / t_sample:>10.0f} pairs/s")
    for k, v in results.items():
        print(f"train step {k}   {n / v:>10.0f} pairs/s")
    print(f"ratio sampler / fp32 step: {results['fp32'] / t_sample:.1f}x  (above 1: the sampler is not the bottleneck)")
    print(f"ratio bf16 / fp32 step:    {results['fp32'] / results['bf16']:.2f}x")


if __name__ == "__main__":
    main()

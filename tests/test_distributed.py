"""Data-parallel training under torchrun (gloo): 2 local processes match one process that takes the
same two shards as one batch; a world of 1 is the plain path, bit for bit."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import torch

from embed.cohort import load_cohort
from embed.config import load_config
from embed.fit import forward_pair, split_controls, train
from embed.model import build
from embed.objective import agreement_weight, pair_loss
from embed.pairs import sample_pairs

from .conftest import TINY_OVERRIDES

STEPS = 6
SETS = TINY_OVERRIDES + [f"train.steps={STEPS}", "train.val_every=3", "train.checkpoint_every=3", "train.threads=1",
                         "train.precision=fp32", "train.projector_points=0", "export.example_map=false"]


def _torchrun(manifest, out, nproc: int) -> subprocess.CompletedProcess:
    sets = [x for kv in SETS + [f'cohort.manifest="{manifest.as_posix()}"'] for x in ("--set", kv)]
    cmd = [sys.executable, "-m", "torch.distributed.run", "--nproc_per_node", str(nproc), "--standalone",
           "-m", "embed.cli", "train", "--quiet", "--out", str(out), *sets]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    # One retry for a rendezvous port taken by another process between torchrun's pick and bind
    # (an environment race, not a twinpatch failure); any other failure is reported as is.
    if done.returncode != 0 and any(k in done.stderr for k in ("Address already in use", "EADDRINUSE", "RendezvousError")):
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    return done


def _weights(run):
    return torch.load(run / "checkpoints" / "last.pt", weights_only=True)


def test_two_processes_average_gradients_over_their_shards(tiny_manifest, tmp_path):
    done = _torchrun(tiny_manifest, tmp_path / "ddp", 2)
    assert done.returncode == 0, done.stderr[-2000:]
    run = tmp_path / "ddp"
    ckpt = _weights(run)
    assert ckpt["step"] == STEPS and ckpt["world_size"] == 2
    assert (run / "encoder.safetensors").is_file()
    rows = [json.loads(x) for x in (run / "metrics.jsonl").read_text().splitlines()]
    keys = [(r["step"], r["split"]) for r in rows]
    assert len(keys) == len(set(keys))  # only rank 0 writes
    # The same steps in one process: shard r of step t comes from default_rng([seed, 2, t, r]);
    # the mean loss over both shards as one batch has the average of the shard gradients.
    cfg = load_config(None, SETS + [f'cohort.manifest="{tiny_manifest.as_posix()}"'])
    cohort = load_cohort(tiny_manifest, progress=False)
    tc, lc = cfg.train, cfg.loss
    train_idx, _ = split_controls(cohort.indices("control"), cfg.cohort.val_controls, np.random.default_rng(tc.seed))
    voxels = np.argwhere(cohort.mask)
    model = build(2, cfg.patch.size, cfg.model.channels, cfg.model.dim, tc.seed)
    opt = torch.optim.Adam(model.parameters(), lr=tc.lr)
    for step in range(STEPS):
        shards = [sample_pairs(cohort.data, train_idx, voxels, tc.batch_size // 2, cfg.patch.size, 2,
                               np.random.default_rng([tc.seed, 2, step, r])) for r in range(2)]
        a = torch.from_numpy(np.concatenate([s.a for s in shards]))
        b = torch.from_numpy(np.concatenate([s.b for s in shards]))
        w = agreement_weight(step, STEPS, lc.agreement_weight, lc.schedule, lc.ramp_fraction)
        z1, z2, r1, r2 = forward_pair(model, a, b, "fp32")
        opt.zero_grad()
        pair_loss(a, b, r1, r2, z1, z2, w)["total"].backward()
        opt.step()
    for k, v in model.state_dict().items():
        torch.testing.assert_close(ckpt["model"][k], v, rtol=1e-4, atol=1e-5)


def test_world_of_one_is_the_plain_path(tiny_manifest, tmp_path):
    done = _torchrun(tiny_manifest, tmp_path / "one", 1)
    assert done.returncode == 0, done.stderr[-2000:]
    cfg = load_config(None, SETS + [f'cohort.manifest="{tiny_manifest.as_posix()}"'])
    train(cfg, load_cohort(tiny_manifest, progress=False), tmp_path / "plain", progress=False)
    a, b = _weights(tmp_path / "one")["model"], _weights(tmp_path / "plain")["model"]
    assert all(torch.equal(a[k], b[k]) for k in a)

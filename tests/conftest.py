"""Shared fixtures: a tiny synthetic cohort (4 mm grid) and one short training run on it."""

from __future__ import annotations

import pytest

from embed.config import load_config


@pytest.fixture(scope="session")
def tiny_manifest(tmp_path_factory):
    """6 controls + 2 cases on the 4 mm MNI152 grid (synthetic; built once per test session)."""
    from embed.synth import make_cohort

    return make_cohort(tmp_path_factory.mktemp("tiny") / "cohort", n_controls=6, n_cases=2, seed=3,
                       voxel_size=4.0, progress=False)


TINY_OVERRIDES = ["train.steps=30", "train.batch_size=32", "train.val_every=10", "train.val_pairs=64",
                  "model.channels=[8, 16]", "model.dim=8", "patch.size=5", "cohort.val_controls=2", "cohort.contrasts=[]",
                  "patch.dims=2", "train.precision=bf16",  # small and fast: 2D patches, the bf16 path
                  "loss.agreement_weight=2.0"]


@pytest.fixture(scope="session")
def tiny_run(tmp_path_factory, tiny_manifest):
    """A finished 30-step run on the tiny cohort; returns the outputs dict of ``train_job``."""
    from embed.jobs import train_job

    cfg = load_config(None, TINY_OVERRIDES + [f'cohort.manifest="{tiny_manifest.as_posix()}"'])
    return train_job(cfg, tmp_path_factory.mktemp("run") / "run", progress=False, log=lambda m: None)

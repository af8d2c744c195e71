"""Diagnostics of a run: collapse shows in an agreement-only run and not in the default one;
TensorBoard gets scalars, the reconstruction grid, hyper-parameters and a projector sample."""

from __future__ import annotations

import json

import pytest

from embed.cohort import load_cohort
from embed.config import load_config
from embed.fit import train
from embed.monitor import MIN_DIRECTION_SPREAD, SPIKE_FACTOR, collapse_warning, spike_warning

from .conftest import TINY_OVERRIDES

COLLAPSE_RUN = ["train.steps=150", "train.val_every=50", "train.projector_points=0", "train.threads=1"]


@pytest.fixture(scope="module")
def cohort(tiny_manifest):
    return load_cohort(tiny_manifest, progress=False)


def _run(tiny_manifest, cohort, path, *extra):
    cfg = load_config(None, TINY_OVERRIDES + COLLAPSE_RUN + [f'cohort.manifest="{tiny_manifest.as_posix()}"', *extra])
    return train(cfg, cohort, path, progress=False)


def test_collapse_is_visible_in_agreement_only_run_and_absent_with_reconstruction(tiny_manifest, cohort, tmp_path):
    # The same agreement weight with and without the reconstruction term. (The shipped default, weight
    # 2 on the demo's 32-dimensional model, keeps direction spread 0.006-0.007 and effective rank 17-19
    # there; this 8-dimensional model trained 150 steps is too small to hold weight 2.)
    only = _run(tiny_manifest, cohort, tmp_path / "only", "loss.reconstruction_weight=0", "loss.agreement_weight=1",
                "loss.schedule=constant")
    default = _run(tiny_manifest, cohort, tmp_path / "default", "loss.agreement_weight=1")
    # Agreement alone turns every embedding towards one direction: random pairs agree as well as
    # co-located ones (raw cosine), and the monitor says so; with reconstruction it does not happen.
    assert only.final["direction_spread"] < MIN_DIRECTION_SPREAD < default.final["direction_spread"]
    assert "embedding collapse" in collapse_warning(only.final)
    assert collapse_warning(default.final) is None
    assert default.final["spread"] > 10 * only.final["spread"]
    # The diagnostics are in metrics.jsonl for every validation.
    rows = [json.loads(x) for x in (tmp_path / "only" / "metrics.jsonl").read_text().splitlines()]
    val = [r for r in rows if r["split"] == "val"]
    assert [r["step"] for r in val] == [49, 99, 149]
    assert {"retrieval", "cos_gap", "direction_spread", "effective_rank", "spread", "reconstruction"} <= set(val[0])


def test_tensorboard_holds_scalars_images_hparams_and_projector(tiny_run):
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    tb = tiny_run["run_dir"] / "tb"
    acc = EventAccumulator(str(tb))
    acc.Reload()
    tags = acc.Tags()
    assert {"val/retrieval", "val/cos_gap", "val/effective_rank", "train/total"} <= set(tags["scalars"])
    assert "val/reconstruction" in tags["images"]
    assert [e.step for e in acc.Scalars("val/retrieval")] == [9, 19, 29]
    hp = EventAccumulator(str(tb / "hparams"))
    hp.Reload()
    assert "hparam/retrieval" in hp.Tags()["scalars"]
    # Projector: config + tensor + metadata (TensorBoard projector plugin layout).
    assert (tb / "projector_config.pbtxt").is_file()
    meta = next(tb.rglob("metadata.tsv")).read_text().splitlines()
    assert meta[0] == "subject\tslice" and len(meta) == 1 + 64  # train.val_pairs=64 < projector_points
    assert all(row.split("\t")[0].startswith("ctl") for row in meta[1:])


def test_spike_warning_fires_only_when_the_last_validation_jumps():
    # Totals seen on the demo (agreement weight 2): a run that ended on a spike, one that recovered.
    ended = [0.0245, 0.0230, 0.0231, 0.0228, 0.0224, 0.1027]
    message = spike_warning(ended)
    assert message and "4.5x the median 0.0230" in message and "train.steps" in message
    assert spike_warning([0.0245, 0.0230, 0.1002, 0.0228, 0.0224, 0.0231]) is None  # spike earlier, recovered
    assert spike_warning([0.02, 0.02, 0.02 * SPIKE_FACTOR]) is None  # too few validations to judge
    assert spike_warning([0.02, 0.02, 0.02, 0.02 * SPIKE_FACTOR]) is None  # equal to the factor: not above it
    assert spike_warning([0.02, 0.02, 0.02, 0.02 * SPIKE_FACTOR * 1.01]) is not None

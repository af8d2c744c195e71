"""Tests of embed.jobs.export_run: a finished run directory -> bundle."""

import json
import pathlib

import numpy as np
import pytest
import torch

from embed.bundle import load_encoder, read_bundle
from embed.errors import BundleError, InputError
from embed.jobs import export_run
from embed.model import build

from .test_bundle import CHANNELS, DIM, C, P, make_card


def fake_run(run_dir: pathlib.Path, model) -> pathlib.Path:
    (run_dir / "checkpoints").mkdir(parents=True)
    torch.save({"model": model.state_dict(), "step": 3}, run_dir / "checkpoints" / "last.pt")
    (run_dir / "run.json").write_text(json.dumps(make_card()), encoding="utf-8")
    return run_dir


def test_export_run_roundtrip(tmp_path):
    model = build(C, P, CHANNELS, DIM, seed=4)
    run = fake_run(tmp_path / "run", model)
    out = export_run(run)
    assert out == run / "encoder.safetensors"
    enc = load_encoder(out)
    x = torch.from_numpy(np.random.default_rng(5).normal(size=(5, C, P, P)).astype(np.float32))
    with torch.no_grad():
        np.testing.assert_array_equal(enc.embed_patches(x), model.encoder.embed(x).numpy())
    assert set(read_bundle(out)[0]) == set(model.encoder.state_dict())  # decoder weights left out
    other = export_run(run, tmp_path / "elsewhere" / "enc.safetensors")
    assert read_bundle(other)[1]["weights_sha256"] == read_bundle(out)[1]["weights_sha256"]


@pytest.mark.parametrize("missing", ["run.json", "last.pt"])
def test_export_run_unfinished(tmp_path, missing):
    run = fake_run(tmp_path / "run", build(C, P, CHANNELS, DIM, seed=0))
    (run / "run.json" if missing == "run.json" else run / "checkpoints" / "last.pt").unlink()
    with pytest.raises(BundleError, match=rf"run is not a finished run: {missing} is missing; finish \(or re-run\) "
                                          r"`twinpatch train --out RUN_DIR` first"):
        export_run(run)


def test_export_run_damaged(tmp_path):
    run = fake_run(tmp_path / "run", build(C, P, CHANNELS, DIM, seed=0))
    (run / "run.json").write_text("{broken", encoding="utf-8")
    with pytest.raises(BundleError, match=r"run: cannot read run\.json or checkpoints/last\.pt \(JSONDecodeError: "):
        export_run(run)
    (run / "run.json").write_text(json.dumps(make_card()), encoding="utf-8")
    (run / "checkpoints" / "last.pt").write_bytes(b"garbage")
    with pytest.raises(BundleError, match=r"cannot read run\.json or checkpoints/last\.pt"):
        export_run(run)


def test_train_from_a_histogram_cache_and_normalise_a_case_through_the_bundle(tiny_manifest, tmp_path):
    # Issue 3's promise: a case normalised through a bundle matches the controls' normalisation.
    from embed.cache import load_cache, prepare
    from embed.cohort import load_subject
    from embed.config import load_config
    from embed.jobs import train_job

    from .conftest import TINY_OVERRIDES

    cache = prepare(tiny_manifest, out=tmp_path / "cache", normalisation="histogram", progress=False).cache
    cfg = load_config(None, TINY_OVERRIDES + [f'cohort.manifest="{cache.as_posix()}"', "train.steps=4",
                                              "train.val_every=2", "cohort.normalisation=histogram"])
    out = train_job(cfg, tmp_path / "run", progress=False, log=lambda m: None)
    card = load_encoder(out["bundle"]).card
    assert card["normalisation"]["method"] == "histogram" and "landmarks" in card["normalisation"]
    cohort = load_cache(cache)
    i = cohort.subjects.index("ctl02")
    root = tiny_manifest.parent
    subject = load_subject({"T1w": root / "images" / "ctl02_T1w.nii.gz", "FLAIR": root / "images" / "ctl02_FLAIR.nii.gz"},
                           mask=root / "masks" / "ctl02_mask.nii.gz", normalisation=card["normalisation"])
    np.testing.assert_array_equal(subject.data, np.asarray(cohort.data[i]))
    bad = load_config(None, TINY_OVERRIDES + [f'cohort.manifest="{cache.as_posix()}"'])
    with pytest.raises(InputError, match="was prepared with normalisation 'histogram'"):
        train_job(bad, tmp_path / "run2", progress=False, log=lambda m: None)

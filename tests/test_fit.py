"""Training end to end on the tiny synthetic cohort: outputs, determinism, the example map."""

from __future__ import annotations

import json
import tomllib

import nibabel as nib
import numpy as np
import pytest
import torch

from embed import load_encoder
from embed.cohort import load_cohort
from embed.config import from_dict, load_config
from embed.errors import ConfigError
from embed.fit import check_setup, train

from .conftest import TINY_OVERRIDES


def _cfg(manifest, *extra):
    return load_config(None, TINY_OVERRIDES + [f'cohort.manifest="{manifest.as_posix()}"', *extra])


def test_run_directory_holds_every_output(tiny_run, tiny_manifest):
    run = tiny_run["run_dir"]
    # The resolved config round-trips through tomllib (Python standard library TOML reader).
    cfg = from_dict(tomllib.loads((run / "config.toml").read_text()))
    assert cfg == _cfg(tiny_manifest)
    lines = [json.loads(x) for x in (run / "metrics.jsonl").read_text().splitlines()]
    train_lines = [x for x in lines if x["split"] == "train"]
    val_lines = [x for x in lines if x["split"] == "val"]
    assert {"total", "reconstruction", "agreement", "weight", "lr", "cosine"} <= set(train_lines[0])
    assert {"cos_colocated", "cos_random", "effective_rank", "spread"} <= set(val_lines[0])
    assert [x["step"] for x in val_lines] == [9, 19, 29]
    assert list((run / "tb").glob("events.out.tfevents.*"))
    # Checkpoints hold only tensors and plain values: weights_only=True loads them (PyTorch docs, torch.load).
    ckpt = torch.load(run / "checkpoints" / "last.pt", weights_only=True)
    assert ckpt["step"] == 30
    meta = json.loads((run / "run.json").read_text())
    assert meta["contrasts"] == ["T1w", "FLAIR"]
    assert meta["patch"] == {"size": 5, "plane": "axial", "axis": 2, "padding": "zeros"}
    assert len(meta["training"]["train_controls"]) == 4 and len(meta["training"]["val_controls"]) == 2
    assert not set(meta["training"]["train_controls"]) & set(meta["training"]["val_controls"])
    assert not list(run.rglob(".*partial*"))


def test_training_lowers_validation_reconstruction(tiny_run):
    lines = [json.loads(x) for x in (tiny_run["run_dir"] / "metrics.jsonl").read_text().splitlines()]
    val = [x["reconstruction"] for x in lines if x["split"] == "val"]
    assert val[-1] < val[0]


def test_same_seed_gives_identical_weights(tiny_manifest, tmp_path):
    cohort = load_cohort(tiny_manifest, progress=False)
    cfg = _cfg(tiny_manifest, "train.steps=6", "train.val_every=3")
    for name in ("a", "b"):
        train(cfg, cohort, tmp_path / name, progress=False)
    a = torch.load(tmp_path / "a" / "checkpoints" / "last.pt", weights_only=True)["model"]
    b = torch.load(tmp_path / "b" / "checkpoints" / "last.pt", weights_only=True)["model"]
    assert all(torch.equal(a[k], b[k]) for k in a)
    c_cfg = _cfg(tiny_manifest, "train.steps=6", "train.val_every=3", "train.seed=1")
    train(c_cfg, cohort, tmp_path / "c", progress=False)
    c = torch.load(tmp_path / "c" / "checkpoints" / "last.pt", weights_only=True)["model"]
    assert not all(torch.equal(a[k], c[k]) for k in a)


def test_example_map_is_the_dense_embedding_of_the_case(tiny_run, tiny_manifest):
    enc = load_encoder(tiny_run["bundle"])
    cohort = load_cohort(tiny_manifest, progress=False)
    case = int(cohort.indices("case")[0])
    img = nib.load(tiny_run["map"])
    assert img.shape == cohort.mask.shape + (enc.dim,)
    # Same grid as the input: affine within float32 rounding (NIfTI-1 stores the sform as float32).
    np.testing.assert_allclose(img.affine, cohort.affine, atol=1e-4)
    assert nib.aff2axcodes(img.affine) == ("R", "A", "S")  # nibabel; the MNI152 grid is RAS+
    want = enc.embed_volume(cohort.data[case], cohort.masks[case])
    np.testing.assert_allclose(np.moveaxis(img.get_fdata(dtype=np.float32), -1, 0), want, atol=1e-6)
    side = json.loads(tiny_run["map"].with_name(f"{cohort.subjects[case]}_embedding.json").read_text())
    assert side["bundle"]["weights_sha256"] == enc.card["weights_sha256"]


def test_setup_errors_before_anything_is_written(tiny_manifest, tmp_path):
    cohort = load_cohort(tiny_manifest, progress=False)
    with pytest.raises(ConfigError, match="patch.size=61 is larger than the grid"):
        check_setup(_cfg(tiny_manifest, "patch.size=61"), cohort)
    with pytest.raises(ConfigError, match="cohort.val_controls=5 with 6 controls"):
        check_setup(_cfg(tiny_manifest, "cohort.val_controls=5"), cohort)
    with pytest.raises(ConfigError, match="too small for model.channels"):
        check_setup(_cfg(tiny_manifest, "patch.size=3"), cohort)
    with pytest.raises(ConfigError, match="patch.size=61"):
        train(_cfg(tiny_manifest, "patch.size=61"), cohort, tmp_path / "never")
    assert not (tmp_path / "never").exists()

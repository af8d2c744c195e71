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
from embed.config import from_dict, load_config, to_dict
from embed.errors import ConfigError
from embed.fit import train
from embed.runsetup import check_setup

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
    assert meta["patch"] == {"size": 5, "dims": 2, "plane": "axial", "axis": 2, "padding": "zeros"}
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


# --------------------------------------------------------------------------------------------
# early stopping, --init, ablation switches, and the training config keys


def test_early_stopping_stops_and_leaves_a_finished_run(tiny_manifest, tmp_path):
    cohort = load_cohort(tiny_manifest, progress=False)
    # With a learning rate of 1e-12 the retrieval score cannot change: no validation improves on
    # the first, so the run stops after `patience` more validations.
    cfg = _cfg(tiny_manifest, "train.steps=100", "train.val_every=5", "train.lr=1e-12", "train.early_stop=retrieval",
               "train.patience=2", "train.projector_points=0")
    result = train(cfg, cohort, tmp_path / "run", progress=False)
    assert result.stopped_early and result.steps == 15
    assert torch.load(tmp_path / "run" / "checkpoints" / "last.pt", weights_only=True)["step"] == 15
    assert json.loads((tmp_path / "run" / "run.json").read_text())["training"]["finished"] is True


@pytest.mark.parametrize("extra", [
    ["loss.schedule=cosine_ramp", "loss.batch_norm=true", "loss.reconstruction=l1"],
    ["loss.schedule=step", "loss.centred=true", "train.precision=fp32"],
    ["loss.agreement_weight=0", "model.channels=[4, 4, 4]", "patch.size=9", "patch.plane=coronal"],
    ["loss.mmd_weight=1.0", "loss.reconstruction_weight=0.5"],
])
def test_ablation_switches_train(tiny_manifest, tmp_path, extra):
    cohort = load_cohort(tiny_manifest, progress=False)
    cfg = _cfg(tiny_manifest, "train.steps=4", "train.val_every=2", "train.projector_points=0", *extra)
    result = train(cfg, cohort, tmp_path / "run", progress=False)
    assert result.steps == 4 and np.isfinite(result.final["total"])
    card = json.loads((tmp_path / "run" / "run.json").read_text())
    assert card["config"]["loss"] == to_dict(cfg)["loss"]  # the card records the resolved switches


def test_init_starts_from_the_bundle(tiny_run, tiny_manifest, tmp_path):
    from embed.bundle import read_bundle

    cohort = load_cohort(tiny_manifest, progress=False)
    bundle = tiny_run["bundle"]
    cfg = _cfg(tiny_manifest, "train.steps=1", "train.lr=1e-12", "train.projector_points=0",
               f'train.init="{bundle.as_posix()}"')
    train(cfg, cohort, tmp_path / "run", progress=False)
    tensors, _ = read_bundle(bundle)
    state = torch.load(tmp_path / "run" / "checkpoints" / "last.pt", weights_only=True)["model"]
    for k, v in tensors.items():
        torch.testing.assert_close(state[f"encoder.{k}"], v, rtol=0, atol=1e-9)
    assert json.loads((tmp_path / "run" / "run.json").read_text())["training"]["init"] == bundle.as_posix()


@pytest.mark.parametrize("extra, match", [
    (["model.dim=6"], r"--init .*: the bundle's model\.dim is 8, this run's is 6; set model\.dim=8"),
    (["patch.size=7"], r"the bundle's patch size is 5, this run's is 7; set patch\.size=5"),
    (["patch.plane=coronal"], r"the bundle's patch voxel axis is 2, this run's is 1; set patch\.plane='axial'"),
    (["model.channels=[8, 8]"], r"the bundle's model\.channels is \[8, 16\], this run's is \[8, 8\]"),
    (["patch.dims=3"], r"the bundle's patch dims is 2, this run's is 3; set patch\.dims=2"),
])
def test_init_refuses_a_bundle_that_does_not_fit(tiny_run, tiny_manifest, tmp_path, extra, match):
    from embed.errors import BundleError

    cohort = load_cohort(tiny_manifest, progress=False)
    cfg = _cfg(tiny_manifest, f'train.init="{tiny_run["bundle"].as_posix()}"', *extra)
    with pytest.raises(BundleError, match=match) as exc:
        train(cfg, cohort, tmp_path / "never", progress=False)
    assert "\n" not in str(exc.value)
    assert not (tmp_path / "never").exists()


def test_init_from_the_cli(tiny_run, tiny_manifest, tmp_path, capsys):
    from embed.cli import main

    base = ["train", "--quiet", "--cohort", str(tiny_manifest), "--out", str(tmp_path / "run")]
    sets = [x for kv in TINY_OVERRIDES + ["train.steps=2", "export.example_map=false"] for x in ("--set", kv)]
    assert main(base + sets + ["--init", str(tmp_path / "missing.safetensors")]) == 2
    assert "missing.safetensors not found" in capsys.readouterr().err
    assert main(base + sets + ["--init", str(tiny_run["bundle"])]) == 0


def test_setup_refuses_nothing_to_train_and_an_unsplittable_batch(tiny_manifest, monkeypatch):
    import embed.runsetup

    cohort = load_cohort(tiny_manifest, progress=False)
    with pytest.raises(ConfigError, match=r"loss\.reconstruction_weight and loss\.agreement_weight are both 0"):
        check_setup(_cfg(tiny_manifest, "loss.reconstruction_weight=0", "loss.agreement_weight=0"), cohort)
    monkeypatch.setattr(embed.runsetup, "world_info", lambda: (0, 3))
    with pytest.raises(ConfigError, match=r"train\.batch_size=32 does not split over 3 processes; use a multiple of 3"):
        check_setup(_cfg(tiny_manifest), cohort)


# The rules this engine added to embed.config (mirrors tests/test_config.py's BAD / EDGE tables).
TRAIN_BAD = [
    ("loss.reconstruction_weight", -1.0, "a number >= 0"),
    ("loss.mmd_weight", -0.5, "a number >= 0"),
    ("loss.schedule", "linear", r"one of \('constant', 'ramp', 'cosine_ramp', 'step'\)"),
    ("train.checkpoint_every", 0, "an integer >= 1"),
    ("train.early_stop", "loss", r"one of \('none', 'total', 'reconstruction', 'retrieval', 'cos_gap'\)"),
    ("train.patience", 0, "an integer >= 1"),
    ("train.retrieval_voxels", 0, "an integer >= 1"),
    ("train.projector_points", -1, r"an integer >= 0 \(0 = none\)"),
]
TRAIN_EDGE = [("loss.reconstruction_weight", 0.0), ("loss.mmd_weight", 0.0), ("loss.schedule", "cosine_ramp"), ("loss.schedule", "step"),
              ("train.checkpoint_every", 1), ("train.early_stop", "cos_gap"), ("train.patience", 1),
              ("train.retrieval_voxels", 1), ("train.projector_points", 0)]


@pytest.mark.parametrize("key, value, want", TRAIN_BAD)
def test_training_config_rules_reject(key, value, want):
    section, name = key.split(".")
    with pytest.raises(ConfigError, match=rf"run\.toml: {key} must be {want}, got "):
        from_dict({section: {name: value}}, where="run.toml")


@pytest.mark.parametrize("key, value", TRAIN_EDGE)
def test_training_config_rules_accept_edge(key, value):
    section, name = key.split(".")
    assert getattr(getattr(from_dict({section: {name: value}}), section), name) == value


def test_denoising_input_noise_is_seeded_and_leaves_targets_alone():
    """train.input_noise: the encoder sees x + N(0, sd^2) noise drawn from the step's seed."""
    import torch

    from embed.fit import noisy

    a, b = torch.zeros(4000, 2, 5, 5), torch.ones(4000, 2, 5, 5)
    assert noisy(a, b, 0.0, [0, 5, 1, 0]) == (a, b)  # off: the very same tensors
    na, nb = noisy(a, b, 0.3, [0, 5, 1, 0])
    assert float(na.std()) == pytest.approx(0.3, rel=0.02) and float((nb - 1).mean()) == pytest.approx(0, abs=0.01)
    assert not torch.equal(na, nb - 1)  # independent noise for the two patches
    again = noisy(a, b, 0.3, [0, 5, 1, 0])
    assert torch.equal(again[0], na) and torch.equal(again[1], nb)  # same step seed, same noise (exact resume)
    assert not torch.equal(noisy(a, b, 0.3, [0, 5, 2, 0])[0], na)
    assert float(a.abs().max()) == 0 and float(b.min()) == 1  # inputs (the reconstruction targets) untouched

"""Tests of embed.config: TOML loading, --set overrides, the validation table, dumps round trip."""

import dataclasses
import pathlib
import re
import tomllib  # the Python standard library's TOML reader (Python >= 3.11), our outside reference

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from embed.config import (
    EARLY_STOP, PLANES, PRECISIONS, RECONSTRUCTIONS, SCHEDULES, _RULES, Config, CohortConfig, LossConfig,
    ModelConfig, PatchConfig, TrainConfig, dumps, from_dict, load_config, parse_override, to_dict,
)
from embed.errors import ConfigError

REPO = pathlib.Path(__file__).resolve().parent.parent


def write(path: pathlib.Path, text: str) -> pathlib.Path:
    path.write_text(text, encoding="utf-8")
    return path


def one_line(exc_info) -> str:
    """The error message, checked to be a single line (house rule for user-facing errors)."""
    msg = str(exc_info.value)
    assert "\n" not in msg, msg
    return msg


# --------------------------------------------------------------------------------------------
# defaults and TOML loading


def test_no_file_gives_defaults():
    assert load_config(None) == Config()


def test_demo_config_equals_builtin_defaults():
    # configs/demo.toml promises in its first line to be identical to the built-in defaults.
    assert load_config(REPO / "configs" / "demo.toml") == Config()


def test_toml_file_values_are_read_and_typed(tmp_path):
    path = write(tmp_path / "run.toml", """
[cohort]
manifest = "study/manifest.csv"
val_controls = 4

[patch]
size = 9
plane = "coronal"

[model]
channels = [8, 16, 24]
dim = 12

[loss]
agreement_weight = 2      # an integer is accepted where a number is expected
schedule = "constant"
centred = true
reconstruction = "l1"

[train]
steps = 20
lr = 3e-4
""")
    cfg = load_config(path)
    assert cfg.cohort == CohortConfig(manifest="study/manifest.csv", val_controls=4)
    assert cfg.patch == PatchConfig(size=9, plane="coronal")
    assert cfg.model == ModelConfig(channels=(8, 16, 24), dim=12)
    assert isinstance(cfg.model.channels, tuple)
    assert cfg.loss == LossConfig(agreement_weight=2.0, schedule="constant", centred=True, reconstruction="l1")
    assert type(cfg.loss.agreement_weight) is float
    assert cfg.train == TrainConfig(steps=20, lr=3e-4)
    assert cfg.export == Config().export  # untouched section keeps its defaults


def test_config_sections_are_frozen():
    cfg = Config()
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.train.steps = 3  # type: ignore[misc]


def test_missing_config_file(tmp_path):
    with pytest.raises(ConfigError, match=r"config file .*nope\.toml not found; pass an existing TOML file") as exc:
        load_config(tmp_path / "nope.toml")
    one_line(exc)


def test_directory_is_not_a_config_file(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path)


@pytest.mark.parametrize("text", [
    "[train\nsteps = 3\n",          # unclosed table header
    "[train]\nsteps = \n",          # missing value
    "[train]\nsteps = 3\nsteps = 4\n",  # duplicate key
])
def test_invalid_toml(tmp_path, text):
    path = write(tmp_path / "bad.toml", text)
    with pytest.raises(ConfigError, match=r"bad\.toml: not valid TOML \(.*\); fix the file") as exc:
        load_config(path)
    one_line(exc)


def test_non_utf8_file_is_invalid_toml(tmp_path):
    path = tmp_path / "latin1.toml"
    path.write_bytes('[cohort]\nmanifest = "d\xe9mo.csv"\n'.encode("latin-1"))
    with pytest.raises(ConfigError, match=r"latin1\.toml: not valid TOML"):
        load_config(path)


# --------------------------------------------------------------------------------------------
# --set overrides


@pytest.mark.parametrize("text, key, value", [
    ("train.steps=200", "train.steps", 200),
    ("  train.steps = 200  ", "train.steps", 200),
    ("train.lr=1e-4", "train.lr", 1e-4),
    ("loss.agreement_weight=0.25", "loss.agreement_weight", 0.25),
    ("loss.centred=true", "loss.centred", True),
    ("export.example_map=false", "export.example_map", False),
    ("model.channels=[16,32]", "model.channels", [16, 32]),
    ("model.channels=[ 8, 16, 32 ]", "model.channels", [8, 16, 32]),
    ("patch.plane=coronal", "patch.plane", "coronal"),                       # bare string
    ("cohort.manifest=data/site A/manifest.csv", "cohort.manifest", "data/site A/manifest.csv"),
    ("cohort.manifest=a=b.csv", "cohort.manifest", "a=b.csv"),               # split on the first '='
    ('cohort.manifest="2024"', "cohort.manifest", "2024"),                   # quoted: a TOML string
])
def test_parse_override(text, key, value):
    got_key, got = parse_override(text)
    assert got_key == key
    assert got == value
    assert type(got) is type(value)  # 1 is not True, 200 is not 200.0


@pytest.mark.parametrize("text, match", [
    ("train.steps", r"--set 'train\.steps': expected section\.key=value, e\.g\. --set train\.steps=200"),
    ("steps=3", r"--set 'steps=3': key must be section\.key, e\.g\. train\.steps; got 'steps'"),
    ("a.b.c=3", r"key must be section\.key.*got 'a\.b\.c'"),
    (".steps=3", r"key must be section\.key.*got '\.steps'"),
    ("train.=3", r"key must be section\.key.*got 'train\.'"),
])
def test_parse_override_errors(text, match):
    with pytest.raises(ConfigError, match=match) as exc:
        parse_override(text)
    one_line(exc)


def test_overrides_apply_over_file(tmp_path):
    path = write(tmp_path / "run.toml", "[train]\nsteps = 20\nseed = 5\n")
    cfg = load_config(path, ["train.steps=7", "model.channels=[4]", "patch.plane=sagittal", "loss.centred=true"])
    assert cfg.train.steps == 7 and cfg.train.seed == 5
    assert cfg.model.channels == (4,)
    assert cfg.patch.plane == "sagittal"
    assert cfg.loss.centred is True


def test_overrides_without_file():
    cfg = load_config(None, ["train.lr=0.01", "train.lr=0.02"])  # the last one wins
    assert cfg.train.lr == 0.02
    assert dataclasses.replace(cfg, train=TrainConfig()) == Config()


def test_bad_override_value_names_the_key_and_the_set():
    with pytest.raises(ConfigError, match=r"defaults with --set: train\.steps must be an integer, got 'many' \(str\)"):
        load_config(None, ["train.steps=many"])


def test_override_into_a_section_that_is_not_a_table(tmp_path):
    path = write(tmp_path / "odd.toml", "train = 3\n")
    with pytest.raises(ConfigError, match=r"odd\.toml: \[train\] must be a table of keys"):
        load_config(path, ["train.steps=4"])


# --------------------------------------------------------------------------------------------
# unknown sections and keys, wrong types


def test_unknown_section():
    with pytest.raises(ConfigError, match=r"run\.toml: unknown section \[training\]; valid sections are "
                                          r"cohort, patch, model, loss, train, export") as exc:
        from_dict({"training": {"steps": 3}}, where="run.toml")
    one_line(exc)


def test_unknown_key():
    with pytest.raises(ConfigError, match=r"run\.toml: unknown key train\.step; valid keys in \[train\] are "
                                          r"steps, batch_size") as exc:
        from_dict({"train": {"step": 3}}, where="run.toml")
    one_line(exc)


def test_unknown_key_from_set():
    with pytest.raises(ConfigError, match=r"unknown key loss\.weight; valid keys in \[loss\]"):
        load_config(None, ["loss.weight=1"])


def test_section_must_be_a_table():
    with pytest.raises(ConfigError, match=r"run\.toml: \[patch\] must be a table of keys, got 7"):
        from_dict({"patch": 7}, where="run.toml")


@pytest.mark.parametrize("key, value, want", [
    ("train.steps", "100", "an integer"),
    ("train.steps", 100.0, "an integer"),
    ("train.steps", True, "an integer"),          # TOML true is not 1
    ("train.lr", "0.001", "a number"),
    ("train.lr", False, "a number"),
    ("loss.centred", 1, "true or false"),
    ("loss.centred", "yes", "true or false"),
    ("patch.plane", 2, "a string"),
    ("cohort.manifest", ["a.csv"], "a string"),
    ("model.channels", 32, r"a list of integers, e\.g\. \[32, 64\]"),
    ("model.channels", [32, 64.0], r"a list of integers, e\.g\. \[32, 64\]"),
    ("model.channels", [32, True], r"a list of integers, e\.g\. \[32, 64\]"),
    ("model.channels", "32,64", r"a list of integers, e\.g\. \[32, 64\]"),
])
def test_wrong_type(key, value, want):
    section, name = key.split(".")
    with pytest.raises(ConfigError, match=rf"run\.toml: {re.escape(key)} must be {want}, got .* \(\w+\)") as exc:
        from_dict({section: {name: value}}, where="run.toml")
    one_line(exc)


def test_integer_accepted_for_a_number():
    cfg = from_dict({"train": {"lr": 1}})
    assert cfg.train.lr == 1.0 and type(cfg.train.lr) is float


# --------------------------------------------------------------------------------------------
# the validation table: one bad value per rule (and a good value at the edge)

BAD = [
    ("cohort.normalisation", "minmax", rf"one of {re.escape(str(('zscore', 'histogram')))}"),
    ("cohort.val_controls", 1, r"an integer >= 2 \(a validation pair needs two controls\)"),
    ("cohort.val_controls", 0, r"an integer >= 2 \(a validation pair needs two controls\)"),
    ("cohort.split_seed", -1, "an integer >= 0"),
    ("cohort.contrasts", ["T1w", "T1w"], r"a list of distinct contrast names \(\[\] = all\)"),
    ("train.input_noise", -0.1, r"a number >= 0 \(0 = no denoising\)"),
    ("patch.size", 4, "an odd integer >= 3"),
    ("patch.size", 1, "an odd integer >= 3"),
    ("patch.plane", "oblique", re.escape(f"one of {PLANES}")),
    ("patch.dims", 1, r"2 \(square patches in patch\.plane\) or 3 \(cubes\)"),
    ("model.channels", [], "a non-empty list of positive integers"),
    ("model.channels", [16, 0], "a non-empty list of positive integers"),
    ("model.dim", 1, "an integer >= 2"),
    ("loss.agreement_weight", -0.1, "a number >= 0"),
    ("loss.agreement_weight", float("nan"), "a number >= 0"),
    ("loss.schedule", "cosine", re.escape(f"one of {SCHEDULES}")),
    ("loss.ramp_fraction", 0.0, r"a number in \(0, 1\]"),
    ("loss.ramp_fraction", 1.5, r"a number in \(0, 1\]"),
    ("loss.reconstruction", "huber", re.escape(f"one of {RECONSTRUCTIONS}")),
    ("train.steps", 0, "an integer >= 1"),
    ("train.batch_size", 1, r"an integer >= 2 \(random pairs need two patches\)"),
    ("train.lr", 0.0, "a number > 0"),
    ("train.lr", float("nan"), "a number > 0"),
    ("train.seed", -1, "an integer >= 0"),
    ("train.val_every", 0, "an integer >= 1"),
    ("train.val_pairs", 1, "an integer >= 2"),
    ("train.threads", -1, r"an integer >= 0 \(0 = all cores\)"),
    ("train.precision", "fp16", re.escape(f"one of {PRECISIONS}")),
    ("loss.reconstruction_weight", -1.0, "a number >= 0"),
    ("loss.mmd_weight", -0.5, "a number >= 0"),
    ("train.checkpoint_every", 0, "an integer >= 1"),
    ("train.early_stop", "loss", re.escape(f"one of {EARLY_STOP}")),
    ("train.patience", 0, "an integer >= 1"),
    ("train.retrieval_voxels", 0, "an integer >= 1"),
    ("train.projector_points", -1, r"an integer >= 0 \(0 = none\)"),
]

EDGE = [
    ("cohort.normalisation", "zscore"),
    ("cohort.val_controls", 2),
    ("cohort.split_seed", 0),
    ("cohort.contrasts", []),
    ("train.input_noise", 0.0),
    ("patch.size", 3),
    ("patch.plane", "sagittal"),
    ("patch.dims", 2),
    ("model.channels", [1]),
    ("model.dim", 2),
    ("loss.agreement_weight", 0.0),
    ("loss.schedule", "constant"),
    ("loss.ramp_fraction", 1.0),
    ("loss.reconstruction", "l1"),
    ("train.steps", 1),
    ("train.batch_size", 2),
    ("train.lr", 1e-12),
    ("train.seed", 0),
    ("train.val_every", 1),
    ("train.val_pairs", 2),
    ("train.threads", 0),
    ("train.precision", "fp32"),
    ("loss.reconstruction_weight", 0.0),
    ("loss.mmd_weight", 0.0),
    ("train.checkpoint_every", 1),
    ("train.early_stop", "cos_gap"),
    ("train.patience", 1),
    ("train.retrieval_voxels", 1),
    ("train.projector_points", 0),
]


def test_every_rule_has_a_bad_and_an_edge_value_test():
    assert {k for k, _, _ in BAD} == set(_RULES)
    assert {k for k, _ in EDGE} == set(_RULES)


@pytest.mark.parametrize("key, value, want", BAD, ids=[f"{k}={v!r}" for k, v, _ in BAD])
def test_rule_rejects_out_of_range(key, value, want):
    section, name = key.split(".")
    with pytest.raises(ConfigError, match=rf"run\.toml: {re.escape(key)} must be {want}, got ") as exc:
        from_dict({section: {name: value}}, where="run.toml")
    one_line(exc)


@pytest.mark.parametrize("key, value", EDGE, ids=[f"{k}={v!r}" for k, v in EDGE])
def test_rule_accepts_edge_value(key, value):
    section, name = key.split(".")
    cfg = from_dict({section: {name: value}})
    got = getattr(getattr(cfg, section), name)
    assert got == (tuple(value) if isinstance(value, list) else value)


def test_val_controls_rule_matches_split_controls():
    from embed.pairs import split_controls

    # split_controls needs >= 2 validation controls whatever the cohort; the config table
    # rejects any value split_controls can never accept, before training starts.
    rng = np.random.default_rng(0)
    with pytest.raises(ConfigError):
        split_controls(np.arange(20), 1, rng)
    with pytest.raises(ConfigError, match=r"cohort\.val_controls must be"):
        from_dict({"cohort": {"val_controls": 1}})


# --------------------------------------------------------------------------------------------
# dumps -> tomllib.loads -> from_dict round trip


def roundtrip(cfg: Config) -> Config:
    return from_dict(tomllib.loads(dumps(cfg)), where="dumped")  # tomllib: Python standard library


def test_dumps_writes_every_key():
    assert tomllib.loads(dumps(Config())) == to_dict(Config())


def test_roundtrip_defaults():
    assert roundtrip(Config()) == Config()


def test_roundtrip_non_defaults():
    cfg = Config(
        cohort=CohortConfig(manifest='C:\\data\\"site"\tA\\manifest.csv', val_controls=5),
        patch=PatchConfig(size=11, plane="coronal"),
        model=ModelConfig(channels=(3, 5, 7, 9), dim=2),
        loss=LossConfig(agreement_weight=1e-5, schedule="constant", ramp_fraction=0.1, centred=True,
                        reconstruction="l1"),
        train=TrainConfig(steps=1, batch_size=2, lr=0.1 + 0.2, seed=2**40, threads=3, precision="bf16"),
        export=dataclasses.replace(Config().export, example_map=False),
    )
    back = roundtrip(cfg)
    assert back == cfg
    assert back.train.lr == 0.1 + 0.2  # floats survive bit for bit (repr is exact)


def test_roundtrip_after_overrides():
    cfg = load_config(None, ["model.channels=[16]", "loss.agreement_weight=0", "patch.plane=sagittal"])
    assert roundtrip(cfg) == cfg


# Any text a Python str can hold and TOML can carry: every Unicode scalar value (no lone surrogates),
# control characters included (dumps must escape those; TOML 1.0, "String").
any_text = st.text(st.characters(blacklist_categories=("Cs",)), max_size=30)


@settings(max_examples=60, deadline=None)
@given(
    manifest=any_text,
    val_controls=st.integers(2, 10**6),
    size=st.integers(1, 20).map(lambda k: 2 * k + 1),
    plane=st.sampled_from(PLANES),
    channels=st.lists(st.integers(1, 512), min_size=1, max_size=5),
    dim=st.integers(2, 4096),
    weight=st.floats(0, 1e6, allow_nan=False),
    ramp=st.floats(1e-9, 1.0, exclude_min=False),
    centred=st.booleans(),
    lr=st.floats(1e-12, 10.0),
    seed=st.integers(0, 2**63 - 1),
)
def test_roundtrip_property(manifest, val_controls, size, plane, channels, dim, weight, ramp, centred, lr, seed):
    cfg = Config(
        cohort=CohortConfig(manifest=manifest, val_controls=val_controls),
        patch=PatchConfig(size=size, plane=plane),
        model=ModelConfig(channels=tuple(channels), dim=dim),
        loss=LossConfig(agreement_weight=weight, ramp_fraction=ramp, centred=centred),
        train=TrainConfig(lr=lr, seed=seed),
    )
    assert roundtrip(cfg) == cfg


@pytest.mark.parametrize("manifest", ["site\nA/manifest.csv", "bell\x07.csv", "del\x7f.csv", "nul\x00.csv",
                                      "us\x1f.csv", "cr\r\n.csv", "tab\t.csv", '\\"\\u0041"'])
def test_roundtrip_string_with_control_characters(manifest):
    # TOML 1.0 (toml.io, "String"; from memory, and tomllib enforces it): control characters other
    # than tab must be escaped in basic strings.
    cfg = Config(cohort=CohortConfig(manifest=manifest))
    assert roundtrip(cfg) == cfg


# --------------------------------------------------------------------------------------------
# packaging: config.py needs tomllib


def test_requires_python_has_tomllib():
    from packaging.specifiers import SpecifierSet

    # tomllib was added to the standard library in Python 3.11 (Python docs, "tomllib"; from memory).
    meta = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    spec = SpecifierSet(meta["project"]["requires-python"])
    assert "3.10.14" not in spec


def test_contrasts_must_be_a_list_of_strings():
    with pytest.raises(ConfigError, match=r"cohort.contrasts must be a list of strings"):
        from_dict({"cohort": {"contrasts": "FLAIR"}})
    assert from_dict({"cohort": {"contrasts": ["FLAIR"]}}).cohort.contrasts == ("FLAIR",)


def test_a_run_written_before_a_key_existed_keeps_what_it_was(tmp_path):
    # A config.toml from before patch.dims / cohort.contrasts / cohort.split_seed / train.input_noise:
    # dumps() of today's config with those keys removed.
    from embed.config import ADDED_LATER, load_run_config

    old = Config(patch=PatchConfig(size=9, dims=2), cohort=dataclasses.replace(Config().cohort, contrasts=()))
    text = dumps(old)
    for keys in ADDED_LATER.values():
        text = "\n".join(line for line in text.splitlines() if line.split(" = ")[0] not in keys)
    path = tmp_path / "config.toml"
    path.write_text(text + "\n")
    assert "dims" not in path.read_text() and "contrasts" not in path.read_text()
    run = load_run_config(path)
    assert run == old  # a 2D run on every contrast, as it was trained
    assert load_config(path).patch.dims == Config().patch.dims == 3  # a user config takes today's defaults
    whole = tmp_path / "whole.toml"
    whole.write_text(dumps(Config()))
    assert load_run_config(whole) == Config()  # keys present are never replaced

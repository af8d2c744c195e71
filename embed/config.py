"""Run configuration: frozen dataclasses per section, TOML loading, ``--set`` overrides.

A configuration file is TOML with the sections below; every key is optional and falls back to
the default shown. ``--set section.key=value`` overrides a key; the value is read as a TOML
value (``--set train.steps=200``, ``--set loss.centred=true``, ``--set model.channels=[16,32]``)
and, when it does not parse as TOML, as a plain string (``--set patch.plane=coronal``).

Relative paths in a configuration (``cohort.manifest``) are taken relative to the current
working directory, as on the command line.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import ConfigError

PLANES = ("axial", "coronal", "sagittal")
SCHEDULES = ("constant", "ramp", "cosine_ramp", "step")
RECONSTRUCTIONS = ("mse", "l1")
NORMALISATIONS = ("zscore", "histogram")
PRECISIONS = ("fp32", "bf16")
EARLY_STOP = ("none", "total", "reconstruction", "retrieval", "cos_gap")


@dataclass(frozen=True)
class CohortConfig:
    manifest: str = "demo_data/manifest.csv"  # a manifest.csv, or a cache folder written by `twinpatch prepare`
    normalisation: str = "zscore"
    val_controls: int = 3  # controls held out of training, for validation pairs (and the bench)
    split_seed: int = 0  # which controls are held out; apart from train.seed, so seeds share one split
    contrasts: tuple[str, ...] = ("T1w",)  # contrasts to train on, by name (BIDS suffixes); () = every contrast


@dataclass(frozen=True)
class PatchConfig:
    size: int = 7  # voxels per side (odd); about 15 mm of tissue is common practice, no source
    plane: str = "axial"  # plane of a 2D patch (unused by 3D patches)
    dims: int = 3  # 3 = cubes (3D convolutions; chosen by the 3D sweep); 2 = squares in `plane`, faster


@dataclass(frozen=True)
class ModelConfig:
    channels: tuple[int, ...] = (32, 64)  # widths of the 3x3 valid convolutions
    dim: int = 32  # embedding size D


@dataclass(frozen=True)
class LossConfig:
    agreement_weight: float = 4.0  # final weight w of (1 - cosine); 0 = plain autoencoder; chosen by sweep
    schedule: str = "ramp"  # constant | ramp (linear 0 -> w) | cosine_ramp | step (0, then w)
    ramp_fraction: float = 0.5  # fraction of the steps the ramp takes (step: where w switches on)
    centred: bool = False  # agreement on batch-centred embeddings
    batch_norm: bool = False  # agreement after a non-affine batch normalisation (implies centring)
    reconstruction: str = "mse"
    reconstruction_weight: float = 1.0  # 0 = agreement only (shows collapse)
    mmd_weight: float = 0.0  # Wasserstein-autoencoder latent regulariser: MMD to a standard Gaussian


@dataclass(frozen=True)
class TrainConfig:
    steps: int = 3000
    batch_size: int = 256  # co-located pairs per step
    lr: float = 1e-3
    seed: int = 0
    val_every: int = 100
    val_pairs: int = 1024
    threads: int = 0  # torch intra-op threads; 0 = all cores
    precision: str = "fp32"  # fp32: float32 convolutions; bf16: bfloat16 matrix products (faster for 2D patches only)
    checkpoint_every: int = 250  # steps between checkpoints (also written at the end and on Ctrl-C)
    deterministic: bool = False  # torch.use_deterministic_algorithms(True)
    early_stop: str = "none"  # validation metric to stop on: none | total | reconstruction | retrieval | cos_gap
    patience: int = 5  # validations without improvement before early stopping
    retrieval_voxels: int = 256  # held-out voxels for the co-location retrieval score
    projector_points: int = 512  # validation embeddings written for the TensorBoard projector; 0 = none
    init: str = ""  # encoder bundle to start from (--init BUNDLE); "" = random initialisation
    input_noise: float = 0.0  # sd of Gaussian noise added to the encoder's input (denoising); 0 = off


@dataclass(frozen=True)
class ExportConfig:
    example_map: bool = True  # after export, write the embedding map of one case


@dataclass(frozen=True)
class Config:
    cohort: CohortConfig = field(default_factory=CohortConfig)
    patch: PatchConfig = field(default_factory=PatchConfig)
    model: ModelConfig = field(default_factory=ModelConfig)
    loss: LossConfig = field(default_factory=LossConfig)
    train: TrainConfig = field(default_factory=TrainConfig)
    export: ExportConfig = field(default_factory=ExportConfig)


# One validation table: key -> (check, what a valid value is).
_RULES: dict[str, tuple[Any, str]] = {
    "cohort.normalisation": (lambda v: v in NORMALISATIONS, f"one of {NORMALISATIONS}"),
    "cohort.val_controls": (lambda v: v >= 2, "an integer >= 2 (a validation pair needs two controls)"),
    "cohort.split_seed": (lambda v: v >= 0, "an integer >= 0"),
    "cohort.contrasts": (lambda v: len(set(v)) == len(v) and all(v), "a list of distinct contrast names ([] = all)"),
    "patch.size": (lambda v: v >= 3 and v % 2 == 1, "an odd integer >= 3"),
    "patch.plane": (lambda v: v in PLANES, f"one of {PLANES}"),
    "patch.dims": (lambda v: v in (2, 3), "2 (square patches in patch.plane) or 3 (cubes)"),
    "model.channels": (lambda v: len(v) >= 1 and all(c >= 1 for c in v), "a non-empty list of positive integers"),
    "model.dim": (lambda v: v >= 2, "an integer >= 2"),
    "loss.agreement_weight": (lambda v: v >= 0, "a number >= 0"),
    "loss.schedule": (lambda v: v in SCHEDULES, f"one of {SCHEDULES}"),
    "loss.ramp_fraction": (lambda v: 0 < v <= 1, "a number in (0, 1]"),
    "loss.reconstruction": (lambda v: v in RECONSTRUCTIONS, f"one of {RECONSTRUCTIONS}"),
    "loss.reconstruction_weight": (lambda v: v >= 0, "a number >= 0"),
    "loss.mmd_weight": (lambda v: v >= 0, "a number >= 0"),
    "train.steps": (lambda v: v >= 1, "an integer >= 1"),
    "train.batch_size": (lambda v: v >= 2, "an integer >= 2 (random pairs need two patches)"),
    "train.lr": (lambda v: v > 0, "a number > 0"),
    "train.input_noise": (lambda v: v >= 0, "a number >= 0 (0 = no denoising)"),
    "train.seed": (lambda v: v >= 0, "an integer >= 0"),
    "train.val_every": (lambda v: v >= 1, "an integer >= 1"),
    "train.val_pairs": (lambda v: v >= 2, "an integer >= 2"),
    "train.threads": (lambda v: v >= 0, "an integer >= 0 (0 = all cores)"),
    "train.precision": (lambda v: v in PRECISIONS, f"one of {PRECISIONS}"),
    "train.checkpoint_every": (lambda v: v >= 1, "an integer >= 1"),
    "train.early_stop": (lambda v: v in EARLY_STOP, f"one of {EARLY_STOP}"),
    "train.patience": (lambda v: v >= 1, "an integer >= 1"),
    "train.retrieval_voxels": (lambda v: v >= 1, "an integer >= 1"),
    "train.projector_points": (lambda v: v >= 0, "an integer >= 0 (0 = none)"),
}


def _coerce(key: str, value: Any, typ: Any, where: str) -> Any:
    """Check a TOML value against a field type; ints are accepted for floats."""
    name = getattr(typ, "__name__", str(typ))
    if typ in ("bool", bool):
        ok = isinstance(value, bool)
        want = "true or false"
    elif typ in ("int", int):
        ok = isinstance(value, int) and not isinstance(value, bool)
        want = "an integer"
    elif typ in ("float", float):
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        value = float(value) if ok else value
        want = "a number"
    elif typ in ("str", str):
        ok = isinstance(value, str)
        want = "a string"
    elif str(typ).startswith("tuple[str"):
        ok = isinstance(value, (list, tuple)) and all(isinstance(v, str) for v in value)
        value = tuple(value) if ok else value
        want = 'a list of strings, e.g. ["T1w", "FLAIR"]'
    elif str(typ).startswith("tuple[int"):
        ok = isinstance(value, (list, tuple)) and all(isinstance(v, int) and not isinstance(v, bool) for v in value)
        value = tuple(value) if ok else value
        want = "a list of integers, e.g. [32, 64]"
    else:  # pragma: no cover - internal: a field type this table does not know
        raise AssertionError(f"unsupported config type {name} for {key}")
    if not ok:
        raise ConfigError(f"{where}: {key} must be {want}, got {value!r} ({type(value).__name__})")
    return value


def from_dict(data: dict[str, Any], where: str = "config") -> Config:
    """Build a validated :class:`Config` from nested dicts (as TOML gives them)."""
    sections = {f.name: f for f in dataclasses.fields(Config)}
    built = {}
    for name, value in data.items():
        if name not in sections:
            raise ConfigError(
                f"{where}: unknown section [{name}]; valid sections are {', '.join(sections)}"
            )
        if not isinstance(value, dict):
            raise ConfigError(f"{where}: [{name}] must be a table of keys, got {value!r}")
    for name, sec_field in sections.items():
        cls = sec_field.default_factory  # type: ignore[misc]
        given = data.get(name, {})
        keys = {f.name: f for f in dataclasses.fields(cls)}
        kwargs = {}
        for key, value in given.items():
            if key not in keys:
                raise ConfigError(
                    f"{where}: unknown key {name}.{key}; valid keys in [{name}] are {', '.join(keys)}"
                )
            full = f"{name}.{key}"
            value = _coerce(full, value, keys[key].type, where)
            check, want = _RULES.get(full, (lambda v: True, ""))
            if not check(value):
                raise ConfigError(f"{where}: {full} must be {want}, got {value!r}")
            kwargs[key] = value
        built[name] = cls(**kwargs)
    return Config(**built)


def to_dict(cfg: Config) -> dict[str, dict[str, Any]]:
    """Nested plain dicts (tuples as lists), ready for TOML or JSON."""
    out = {}
    for sec in dataclasses.fields(cfg):
        values = dataclasses.asdict(getattr(cfg, sec.name))
        out[sec.name] = {k: list(v) if isinstance(v, tuple) else v for k, v in values.items()}
    return out


def parse_value(raw: str) -> Any:
    """A ``--set`` value: TOML (numbers, booleans, lists, quoted strings); anything else stays a string."""
    try:
        return tomllib.loads(f"v = {raw.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        return raw.strip()


def read_toml(path: str | Path, what: str, example: str) -> dict[str, Any]:
    """The TOML file ``path`` as a dict; ConfigError naming ``what`` and a file to start from."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"{what} {path} not found; pass an existing TOML file, e.g. {example}")
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc}); fix the file or start from {example}") from None


def parse_override(text: str) -> tuple[str, Any]:
    """``"train.steps=200"`` -> ``("train.steps", 200)``; a value that is not TOML stays a string."""
    if "=" not in text:
        raise ConfigError(f"--set {text!r}: expected section.key=value, e.g. --set train.steps=200")
    key, raw = text.split("=", 1)
    key = key.strip()
    if key.count(".") != 1 or not all(key.split(".")):
        raise ConfigError(f"--set {text!r}: key must be section.key, e.g. train.steps; got {key!r}")
    return key, parse_value(raw)


def load_config(path: str | Path | None = None, overrides: list[str] = ()) -> Config:
    """Read a TOML file (or the defaults when ``path`` is None) and apply ``--set`` overrides."""
    data: dict[str, Any] = {}
    where = "defaults"
    if path is not None:
        where = str(path)
        data = read_toml(path, "config file", "configs/demo.toml")
    for text in overrides:
        key, value = parse_override(text)
        section, name = key.split(".")
        if section in data and not isinstance(data[section], dict):
            raise ConfigError(f"{where}: [{section}] must be a table of keys")
        data.setdefault(section, {})[name] = value
    return from_dict(data, where=where if not overrides else f"{where} with --set")


def _toml_string(text: str) -> str:
    """A TOML basic string: backslash, quote and control characters escaped (TOML 1.0, "String")."""
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ch == "\t":
            out.append(ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise AssertionError(f"cannot write {value!r} as TOML")  # internal invariant


# Keys added after twinpatch first wrote run directories, with the value every run written before
# them used. A run's own config.toml holds every key known when it was written, so a missing key
# means "older than the key"; today's default would change the run (resume a 2D run as 3D).
ADDED_LATER: dict[str, dict[str, Any]] = {
    "cohort": {"contrasts": [], "split_seed": 0},
    "patch": {"dims": 2},
    "train": {"input_noise": 0.0},
}


def load_run_config(path: str | Path) -> Config:
    """A run directory's ``config.toml``; keys it lacks take their :data:`ADDED_LATER` values."""
    data = read_toml(path, "run configuration", "the config.toml that `twinpatch train` writes")
    for section, keys in ADDED_LATER.items():
        table = data.setdefault(section, {})
        if isinstance(table, dict):
            for key, value in keys.items():
                table.setdefault(key, value)
    return from_dict(data, where=str(path))


def dumps(cfg: Config) -> str:
    """The resolved configuration as TOML text (every key written, defaults included)."""
    lines = ["# resolved twinpatch configuration: every key, defaults included"]
    for section, values in to_dict(cfg).items():
        lines.append(f"\n[{section}]")
        lines.extend(f"{k} = {_toml_value(v)}" for k, v in values.items())
    return "\n".join(lines) + "\n"

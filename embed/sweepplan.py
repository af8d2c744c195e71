"""Sweep files and their plan: validation, run ids, the resolved configuration of every run.

See :mod:`embed.sweep` for the file format; this module reads a sweep file and lists its runs
without running anything (:mod:`embed.sweep` runs them, :mod:`embed.sweepout` summarises them).
"""

from __future__ import annotations

import itertools
import json
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .config import Config, from_dict, load_config, read_toml, to_dict
from .errors import ConfigError, InputError

METRICS = ("auroc", "auprc", "dice", "sens@1", "sens@3", "sens@5", "sens@10", "signal_ratio")  # all: higher is better
KINDS = ("intensity", "texture", "geometry", "mixed")  # the bench's lesion kinds
SECTIONS = ("sweep", "grid", "set", "bench")
SWEEP_KEYS = ("base", "seeds", "metric", "kinds")
EXAMPLE = "configs/sweep_agreement.toml"
BUNDLE = "encoder.safetensors"


@dataclass(frozen=True)
class Sweep:
    path: Path  # the sweep file
    base_config: Config  # the base config file (or the defaults), before [set]
    grid: tuple  # ((key, (value, ...)), ...) in file order
    seeds: tuple  # (int, ...)
    metric: str
    kinds: tuple  # (str, ...)
    fixed: dict  # [set]: key -> value
    bench: dict  # [bench]: passed to the bench as its settings


@dataclass(frozen=True)
class RunSpec:
    id: str
    config: dict  # grid key -> value (as written in the sweep file)
    seed: int
    cfg: Config  # the resolved configuration of this run


def fmt_value(v: Any) -> str:
    """A grid value as it appears in run ids: 0.0 -> "0", True -> "true", "a_b" -> "a+b", [8, 16] -> "8x16"."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return format(v, "g")
    if isinstance(v, str):
        return re.sub(r"[^A-Za-z0-9.+-]", "+", v)
    if isinstance(v, (list, tuple)):
        return "x".join(fmt_value(e) for e in v)
    raise AssertionError(f"grid value {v!r} of an unexpected type")  # config validation admits no other type


def short_names(keys: list[str]) -> dict[str, str]:
    """Key -> the part after the last "." (the full key when two keys share that part)."""
    tails = [k.rsplit(".", 1)[-1] for k in keys]
    return {k: t if tails.count(t) == 1 else k for k, t in zip(keys, tails)}


def run_id(config: dict, seed: int) -> str:
    """``{"loss.agreement_weight": 0.1, "patch.size": 7}``, seed 0 -> ``agreement_weight-0.1_size-7_seed-0``."""
    short = short_names(list(config))
    return "_".join(f"{short[k]}-{fmt_value(v)}" for k, v in config.items()) + f"_seed-{seed}"


def _put(data: dict, key: str, value: Any) -> dict:
    """Copy of nested config dicts with ``section.key`` set."""
    section, name = key.split(".")
    return {**data, section: {**data.get(section, {}), name: value}}


def _check_key(path: Path, section: str, key: str, value: Any, known: dict) -> None:
    parts = key.split(".")
    if len(parts) != 2 or not all(parts) or isinstance(value, dict):
        raise ConfigError(f"{path}: [{section}] key {key!r} is not section.key; write each key in quotes, "
                          f'e.g. "patch.size" = {"[5, 7]" if section == "grid" else "7"}')
    if parts[0] not in known or parts[1] not in known[parts[0]]:
        valid = ", ".join(f"{s}.{k}" for s, keys in known.items() for k in keys)
        raise ConfigError(f"{path}: [{section}] {key} is not a config key; valid keys are {valid}")
    if key == "train.seed":
        raise ConfigError(f"{path}: [{section}] train.seed is set by [sweep] seeds; remove it and list the seeds there")


def _base_config(path: Path, base: Any) -> Config:
    if not isinstance(base, str):
        raise ConfigError(f"{path}: [sweep] base must be a string, got {base!r}; e.g. base = \"demo.toml\" "
                          "(relative to the sweep file), or \"\" for the built-in defaults")
    if not base:
        return load_config(None)
    file = path.parent / base
    if not file.is_file():
        raise ConfigError(f"{path}: [sweep] base = {base!r}: config file {file} not found (taken relative to the "
                          "sweep file); fix the path, or use \"\" for the built-in defaults")
    return load_config(file)


def _check_head(path: Path, head: dict) -> tuple:
    for key in head:
        if key not in SWEEP_KEYS:
            raise ConfigError(f"{path}: unknown key {key!r} in [sweep]; valid keys are {', '.join(SWEEP_KEYS)}")
    checks = {"seeds": (lambda s: type(s) is int and s >= 0, "integers >= 0", "[0, 1, 2]"),
              "kinds": (lambda k: isinstance(k, str) and k in KINDS, f"lesion kinds from {', '.join(KINDS)}",
                        '["texture", "mixed"]')}
    for key, (ok, what, example) in checks.items():
        value = head.get(key)
        if not isinstance(value, list) or not value or not all(map(ok, value)) or len(set(value)) != len(value):
            raise ConfigError(f"{path}: [sweep] {key} must be a non-empty list of distinct {what}, got {value!r}; "
                              f"e.g. {key} = {example}")
    if head.get("metric") not in METRICS:
        raise ConfigError(f"{path}: [sweep] metric must be one of {', '.join(METRICS)}, got {head.get('metric')!r}; "
                          'e.g. metric = "sens@10"')
    return tuple(head["seeds"]), head["metric"], tuple(head["kinds"])


def load_sweep(path: str | Path) -> Sweep:
    """Read and validate a sweep file; every run's configuration is built (and checked) here."""
    path = Path(path)
    data = read_toml(path, "sweep file", EXAMPLE)
    for name, value in data.items():
        if name not in SECTIONS:
            raise ConfigError(f"{path}: unknown section [{name}]; valid sections are "
                              f"{', '.join(f'[{s}]' for s in SECTIONS)}")
        if not isinstance(value, dict):
            raise ConfigError(f"{path}: [{name}] must be a table, got {value!r}")
    for name in ("sweep", "grid"):
        if name not in data:
            raise ConfigError(f"{path}: section [{name}] is missing; add it (see {EXAMPLE})")
    seeds, metric, kinds = _check_head(path, data["sweep"])
    base = _base_config(path, data["sweep"].get("base", ""))
    known = to_dict(base)
    fixed = data.get("set", {})
    for key, value in fixed.items():
        _check_key(path, "set", key, value, known)
        from_dict(_put(known, key, value), where=f"{path} [set]")
    if not data["grid"]:
        raise ConfigError(f'{path}: [grid] is empty; add at least one key with its values, e.g. "patch.size" = [5, 7]')
    for key, values in data["grid"].items():
        _check_key(path, "grid", key, values, known)
        if key in fixed:
            raise ConfigError(f"{path}: {key} is both in [grid] and in [set]; keep it in one of them")
        if key in ("cohort.manifest", "cohort.val_controls", "cohort.split_seed"):
            raise ConfigError(f"{path}: [grid] {key}: every run is benched on one cohort with one set of held-out "
                              "controls; set it in [set] or in the base config instead")
        if not isinstance(values, list) or not values:
            section, name = key.split(".")
            raise ConfigError(f'{path}: [grid] {key} must be a non-empty list of values, got {values!r}; '
                              f'e.g. "{key}" = [{json.dumps(known[section][name])}]')
        for value in values:
            from_dict(_put(known, key, value), where=f"{path} [grid]")
    bench = data.get("bench", {})
    if "kinds" in bench and isinstance(bench["kinds"], list) and not set(kinds) <= set(bench["kinds"]):
        raise ConfigError(f"{path}: [sweep] kinds {list(kinds)} are not all benched ([bench] kinds = "
                          f"{bench['kinds']}); average over benched kinds only, or bench them")
    grid = tuple((k, tuple(v)) for k, v in data["grid"].items())
    sweep = Sweep(path, base, grid, seeds, metric, kinds, dict(fixed), dict(bench))
    plan(sweep)  # every run's config through embed.config's validation; refuses two runs with one id
    return sweep


def plan(sweep: Sweep) -> list[RunSpec]:
    """The runs in order: seeds outer, the grid's Cartesian product inner (file order)."""
    data = to_dict(sweep.base_config)
    for key, value in sweep.fixed.items():
        data = _put(data, key, value)
    keys = [k for k, _ in sweep.grid]
    specs, seen = [], {}
    for seed in sweep.seeds:
        for combo in itertools.product(*(values for _, values in sweep.grid)):
            config = dict(zip(keys, combo))
            rid = run_id(config, seed)
            if rid in seen:
                raise ConfigError(f"{sweep.path}: [grid] values {seen[rid]} and {config} give one run id {rid}; "
                                  "make the values of each key distinct")
            seen[rid] = config
            run = _put(data, "train.seed", seed)
            for key, value in config.items():
                run = _put(run, key, value)
            specs.append(RunSpec(rid, config, seed, from_dict(run, where=f"{sweep.path} run {rid}")))
    return specs


def _read_json(path: Path, strict: bool = True) -> dict:
    """A JSON file; ``strict=False``: {} when it is missing or damaged (a run.json being rewritten)."""
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        if not strict:
            return {}
        raise InputError(f"{path}: not valid JSON ({exc}); delete it and run the sweep again to redo that step") from None

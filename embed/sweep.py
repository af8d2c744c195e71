"""Ablation sweeps: a grid of config overrides x seeds -> one training run and one bench per cell, one summary.

The sweep file (TOML) has [sweep] (base config, seeds, metric, lesion kinds), [grid] (``"section.key"
= [values]``, full Cartesian product in file order), optional [set] (fixed overrides) and [bench]
(bench settings); ``configs/sweep_agreement.toml`` is the annotated example. Paths inside a config
(``cohort.manifest``) stay relative to the working directory. ``OUT`` holds ``baselines/`` (the bench
of the encoder-free methods), ``runs/<id>/`` (a training run, its ``bench/``, and ``error.txt``
when it failed) and ``summary.json`` / ``.csv`` / ``.md`` / ``metric_vs_<key>.png``. Finished steps
are found on disk and skipped; a run whose ``config.toml`` differs from the plan is refused, not reused.
"""

from __future__ import annotations

import itertools
import json
import os
import pickle
import re
import shlex
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from .config import Config, from_dict, load_config, to_dict
from .errors import ConfigError, InputError
from .files import write_text

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
    if not path.is_file():
        raise ConfigError(f"sweep file {path} not found; pass an existing TOML file, e.g. {EXAMPLE}")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc}); fix the file or start from {EXAMPLE}") from None
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


def check_existing(spec: RunSpec, run_dir: Path) -> None:
    """Refuse a run folder whose ``config.toml`` is not the planned configuration."""
    saved = run_dir / "config.toml"
    if not saved.is_file():
        return
    have = to_dict(load_config(saved))
    for section, values in to_dict(spec.cfg).items():
        for key, want in values.items():
            if have[section][key] != want:
                raise InputError(f"sweep run {spec.id}: {saved} has {section}.{key} = {have[section][key]!r} but the "
                                 f"sweep plans {want!r}; the sweep changed since that run was trained: restore the "
                                 f"sweep file, or use a new --out, or delete {run_dir}")


def _read_json(path: Path, strict: bool = True) -> dict:
    """A JSON file; ``strict=False``: {} when it is missing or damaged (a run.json being rewritten)."""
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        if not strict:
            return {}
        raise InputError(f"{path}: not valid JSON ({exc}); delete it and run the sweep again to redo that step") from None


def _train_run(cfg: Config, run_dir: Path, progress: bool) -> str:
    """Reuse, export, resume or train one run; returns what was done."""
    from .jobs import export_run, train_job

    finished = bool(_read_json(run_dir / "run.json", False).get("training", {}).get("finished"))
    has_ckpt = (run_dir / "checkpoints" / "last.pt").is_file()
    log = print if progress else (lambda message: None)
    if finished and (run_dir / BUNDLE).is_file():
        return "training reused"
    if finished and has_ckpt:
        export_run(run_dir)
        return "exported"
    if has_ckpt:
        train_job(cfg, run_dir, resume=True, progress=progress, log=log)
        return "resumed"
    train_job(cfg, run_dir, overwrite=True, progress=progress, log=log)
    return "trained"


def execute_run(spec_id: str, cfg: Config, run_dir: Path, cohort: Path, settings: dict, bench_fn: Callable,
                progress: bool = True, threads: int = 0) -> dict:
    """Train (or reuse) and bench one run; a failure goes to ``run_dir/error.txt`` (one line), never raised.

    ``threads`` > 0 sets torch's thread count (worker processes) without touching the config, so
    ``config.toml`` stays the plan; a non-zero ``train.threads`` of the run still wins in training.
    """
    if threads:
        import torch

        torch.set_num_threads(threads)
    run_dir = Path(run_dir)
    (run_dir / "error.txt").unlink(missing_ok=True)
    try:
        done = _train_run(cfg, run_dir, progress)
        if not (run_dir / "bench" / "metrics.json").is_file():
            bench_fn({"embedding": run_dir / BUNDLE}, cohort, run_dir / "bench", baselines=False,
                     settings=settings, progress=progress)
            done += ", benched"
        return {"id": spec_id, "status": "benched", "done": done, "error": None}
    except Exception as exc:  # recorded, and the sweep goes on
        return _failed(spec_id, run_dir, exc)


def _failed(spec_id: str, run_dir: Path, exc: BaseException) -> dict:
    line = " ".join(f"{type(exc).__name__}: {exc}".split())
    run_dir.mkdir(parents=True, exist_ok=True)
    write_text(run_dir / "error.txt", line + "\n")
    return {"id": spec_id, "status": "failed", "done": "failed", "error": line}


def heldout_controls(cfg, progress: bool = False) -> list[str]:
    """The controls training leaves out (``cohort.val_controls``, drawn with ``cohort.split_seed``
    exactly as :mod:`embed.fit` does): the held-out controls every run's bench uses."""
    import numpy as np

    from .jobs import load_any_cohort
    from .pairs import split_controls

    cohort = load_any_cohort(Path(cfg.cohort.manifest), cfg.cohort.normalisation, progress=progress)
    _, val = split_controls(cohort.indices("control"), cfg.cohort.val_controls,
                            np.random.default_rng(cfg.cohort.split_seed))
    return [cohort.subjects[i] for i in val]


def run_sweep(path: str | Path, out: str | Path, *, jobs: int = 1, only: str | None = None, progress: bool = True,
              bench_fn: Callable | None = None, log: Callable[[str], None] = print) -> dict:
    """Run a sweep (or the one run ``only``) into ``out``: baselines, then each run, then the summary.

    ``jobs`` > 1: runs go to that many spawned worker processes, each with max(1, cores // jobs)
    torch threads and no progress bars. ``bench_fn`` defaults to :func:`embed.bench.run_bench`
    and must be picklable (a module-level function). A failing run is recorded and the sweep goes
    on; a failing baselines bench stops it before any training (its settings are every run's).
    Returns the :func:`summarise` dict.
    """
    if type(jobs) is not int or jobs < 1:
        raise InputError(f"--jobs {jobs}: expected an integer >= 1, e.g. --jobs 2")
    if jobs > 1 and bench_fn is not None:
        try:
            pickle.dumps(bench_fn)
        except Exception as exc:
            raise InputError(f"--jobs {jobs}: bench_fn {bench_fn!r} cannot be sent to worker processes ({exc}); "
                             "pass a module-level function, or --jobs 1") from None
    sweep, out = load_sweep(path), Path(out)
    specs = all_specs = plan(sweep)
    if only is not None:
        specs = [s for s in specs if s.id == only]
        if not specs:
            raise InputError(f"--only {only}: {path} has no run with that id; valid ids: "
                             f"{', '.join(s.id for s in all_specs)}")
    for spec in specs:  # before anything is trained: never silently reuse another configuration
        check_existing(spec, out / "runs" / spec.id)
    if bench_fn is None:
        from .bench import run_bench as bench_fn
    cohort = Path(all_specs[0].cfg.cohort.manifest)  # one cohort for all ([grid] cannot change it)
    if not (out / "baselines" / "metrics.json").is_file():
        from .jobs import ensure_demo_cohort

        ensure_demo_cohort(cohort, log, progress)
        log(f"bench of the baselines -> {out / 'baselines'}")
        settings = {"heldout": heldout_controls(all_specs[0].cfg, progress), **sweep.bench}
        bench_fn({}, cohort, out / "baselines", baselines=True, settings=settings, progress=progress)
    todo = [s for s in specs if not (out / "runs" / s.id / "bench" / "metrics.json").is_file()]
    if len(todo) < len(specs):
        log(f"{len(specs) - len(todo)} run(s) already benched: skipped")
    args = [(s.id, s.cfg, out / "runs" / s.id, cohort, sweep.bench, bench_fn) for s in todo]
    if jobs == 1 or len(todo) < 2:
        for i, a in enumerate(args):
            log(f"run {i + 1}/{len(args)}: {a[0]}")
            _report(execute_run(*a, progress=progress), log)
    else:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor, as_completed

        threads, workers = max(1, (os.cpu_count() or 1) // jobs), min(jobs, len(args))
        log(f"{len(args)} run(s) on {workers} worker processes, {threads} torch thread(s) each")
        with ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn")) as pool:
            futures = {pool.submit(execute_run, *a, progress=False, threads=threads): a for a in args}
            for future in as_completed(futures):
                a = futures[future]
                try:
                    result = future.result()
                except Exception as exc:  # the worker itself died (e.g. out of memory)
                    result = _failed(a[0], a[2], exc)
                _report(result, log)
    return summarise(path, out)


def _report(r: dict, log: Callable[[str], None]) -> None:
    log(f"  {r['id']}: " + (f"FAILED ({r['error']}); see runs/{r['id']}/error.txt" if r["error"] else r["done"]))


def summarise(path: str | Path, out: str | Path) -> dict:
    """Gather whatever has finished in ``out`` into the summary (see :func:`embed.sweepout.summarise`)."""
    from .sweepout import summarise as gather

    return gather(path, out)


def list_commands(path: str | Path, out: str | Path) -> list[str]:
    """One shell command per run (for a job scheduler), then the summary step as the last item."""
    head = f"twinpatch sweep {shlex.quote(str(path))} --out {shlex.quote(str(out))}"
    return [f"{head} --only {shlex.quote(s.id)}" for s in plan(load_sweep(path))] + [f"{head} --summary-only"]

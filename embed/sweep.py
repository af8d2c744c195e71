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

import os
import pickle
import shlex
from pathlib import Path
from typing import Callable

from .config import Config, load_run_config, to_dict
from .errors import InputError
from .files import write_text

from .sweepout import summarise
from .sweepplan import (BUNDLE, EXAMPLE, KINDS, METRICS, RunSpec, Sweep, _read_json, fmt_value, load_sweep, plan,
                        run_id, short_names)

__all__ = ["BUNDLE", "EXAMPLE", "KINDS", "METRICS", "RunSpec", "Sweep", "fmt_value", "load_sweep", "plan", "run_id",
           "short_names", "summarise", "run_sweep", "execute_run", "check_existing", "heldout_controls", "list_commands"]


def check_existing(spec: RunSpec, run_dir: Path) -> None:
    """Refuse a run folder whose ``config.toml`` is not the planned configuration."""
    saved = run_dir / "config.toml"
    if not saved.is_file():
        return
    have = to_dict(load_run_config(saved))
    for section, values in to_dict(spec.cfg).items():
        for key, want in values.items():
            if have[section][key] != want:
                raise InputError(f"sweep run {spec.id}: {saved} has {section}.{key} = {have[section][key]!r} but the "
                                 f"sweep plans {want!r}; the sweep changed since that run was trained: restore the "
                                 f"sweep file, or use a new --out, or delete {run_dir}")


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


def list_commands(path: str | Path, out: str | Path) -> list[str]:
    """One shell command per run (for a job scheduler), then the summary step as the last item."""
    head = f"twinpatch sweep {shlex.quote(str(path))} --out {shlex.quote(str(out))}"
    return [f"{head} --only {shlex.quote(s.id)}" for s in plan(load_sweep(path))] + [f"{head} --summary-only"]

"""Tests of embed.sweep: run ids, planning, validation, summaries, and a real tiny sweep end to end."""

from __future__ import annotations

import csv
import json
import os
import shlex
import shutil
from pathlib import Path

import numpy as np
import pytest

from embed.config import dumps, load_config, to_dict
from embed.errors import ConfigError, InputError
from embed.sweep import fmt_value, list_commands, load_sweep, plan, run_id, run_sweep, summarise
from embed.sweepout import method_values

from .conftest import TINY_OVERRIDES

ROOT = Path(__file__).resolve().parents[1]
KIND_SHARE = {"texture": 1.0, "mixed": 0.5, "intensity": 7.0, "geometry": 9.0}  # run value x share per kind


def bench_metrics(values: dict[str, float], seconds: float = 1.5) -> dict:
    """A metrics.json in the bench schema: method -> base value; summary rows per kind (group "all")
    plus size-bin rows and other metrics that the sweep must ignore."""
    summary = []
    for method, v in values.items():
        for kind, share in KIND_SHARE.items():
            summary.append({"method": method, "kind": kind, "group": "all", "bin": "all", "n": 4, "auroc": [0.99, 0.9, 1.0],
                            "sens@10": [v * share, v * share - 0.1, v * share + 0.1], "signal_ratio": None})
            summary.append({"method": method, "kind": kind, "group": "size", "bin": "small", "n": 2,
                            "auroc": [0.5, 0.4, 0.6], "sens@10": [-5.0, None, None], "signal_ratio": None})
    methods = [{"name": m, "family": "baseline" if m == "intensities" else "encoder", "description": ""} for m in values]
    return {"kind": "twinpatch bench", "seconds": seconds, "methods": methods, "summary": summary}


def expected(v: float) -> float:
    """The sweep's value of a run whose bench got ``v``: sens@10 averaged over texture and mixed."""
    return (v * KIND_SHARE["texture"] + v * KIND_SHARE["mixed"]) / 2


def fake_bench(bundles, cohort, out, *, baselines=True, settings=None, progress=True):
    """Stand-in for embed.bench.run_bench (picklable: module level). The value comes from the bundle's
    card (its final validation reconstruction), so each run gets its own; each call is logged."""
    import torch

    from embed.bundle import read_bundle

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    if baselines:
        values = {"intensities": len(Path(cohort).read_text(encoding="utf-8").splitlines()) / 100}
    else:
        rec = read_bundle(bundles["embedding"])[1]["training"]["final_validation"]["reconstruction"]
        values = {"embedding": rec, "embedding+intensities": rec + 0.1}
    with open(settings["calls"], "a", encoding="utf-8") as f:
        held = ",".join(settings.get("heldout", [])) if baselines else "-"
        f.write(f"{'baselines' if baselines else out.parent.name} {os.getpid()} {torch.get_num_threads()} {held}\n")
    (out / "metrics.json").write_text(json.dumps(bench_metrics(values)), encoding="utf-8")
    return bench_metrics(values)


def calls(path: Path) -> list[list[str]]:
    return [line.split() for line in path.read_text(encoding="utf-8").splitlines()] if path.exists() else []


# ---------------------------------------------------------------- run ids, plan, validation

def test_run_id_rule():
    assert run_id({"loss.agreement_weight": 0.1, "patch.size": 7}, 0) == "agreement_weight-0.1_size-7_seed-0"
    assert [fmt_value(v) for v in (0.0, 0.1, 0.5, 1e-05, 2.0, 3)] == ["0", "0.1", "0.5", "1e-05", "2", "3"]
    assert fmt_value(True) == "true" and fmt_value(False) == "false"
    assert fmt_value("cosine_ramp") == "cosine+ramp" and fmt_value("runs/a b.v2-x+y") == "runs+a+b.v2-x+y"
    assert fmt_value([16, 32]) == "16x32" and fmt_value([]) == ""
    # two keys sharing the part after the last ".": both use the full key
    assert run_id({"loss.centred": True, "model.centred": [8, 16], "patch.size": 5}, 2) == \
        "loss.centred-true_model.centred-8x16_size-5_seed-2"


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def test_plan_order_base_and_set(tmp_path):
    write(tmp_path / "base.toml", "[train]\nsteps = 12\n")
    sweep = load_sweep(write(tmp_path / "s.toml", '[sweep]\nbase = "base.toml"\nseeds = [3, 1]\nmetric = "auroc"\n'
                             'kinds = ["mixed"]\n[grid]\n"loss.agreement_weight" = [0.0, 0.5]\n"patch.size" = [5, 7]\n'
                             '[set]\n"export.example_map" = false\n[bench]\nrepeats = 1\n'))
    assert sweep.grid == (("loss.agreement_weight", (0.0, 0.5)), ("patch.size", (5, 7)))
    assert (sweep.seeds, sweep.metric, sweep.kinds, sweep.bench) == ((3, 1), "auroc", ("mixed",), {"repeats": 1})
    specs = plan(sweep)
    combos = [(0.0, 5), (0.0, 7), (0.5, 5), (0.5, 7)]
    assert [(s.seed, s.config["loss.agreement_weight"], s.config["patch.size"]) for s in specs] == \
        [(seed, a, p) for seed in (3, 1) for a, p in combos]
    for s in specs:
        assert s.id == run_id(s.config, s.seed)
        assert (s.cfg.train.seed, s.cfg.loss.agreement_weight, s.cfg.patch.size) == \
            (s.seed, s.config["loss.agreement_weight"], s.config["patch.size"])
        assert s.cfg.train.steps == 12 and s.cfg.export.example_map is False  # base file, then [set]
    assert sweep.base_config.export.example_map is True  # [set] is applied by plan, not to the base


def test_example_sweep_file():
    sweep = load_sweep(ROOT / "configs" / "sweep_agreement.toml")
    assert sweep.base_config == load_config(ROOT / "configs" / "demo.toml")
    specs = plan(sweep)
    assert len(specs) == 3 * 2 * 3 and specs[0].id == "agreement_weight-0_size-5_seed-0"
    assert specs[3].id == "agreement_weight-0.1_size-7_seed-0" and not specs[0].cfg.export.example_map


HEAD = '[sweep]\nseeds = [0]\nmetric = "sens@10"\nkinds = ["texture"]\n'
GRID = '[grid]\n"patch.size" = [5, 7]\n'


@pytest.mark.parametrize("text, match", [
    ("[sweep\n", r"s\.toml: not valid TOML \(.*\); fix the file or start from configs/sweep_agreement\.toml"),
    (HEAD + GRID + "[extra]\na = 1\n", r"unknown section \[extra\]; valid sections are \[sweep\], \[grid\], \[set\], \[bench\]"),
    ("bench = 3\n" + HEAD + GRID, r"s\.toml: \[bench\] must be a table, got 3"),
    (GRID, r"section \[sweep\] is missing; add it"),
    (HEAD, r"section \[grid\] is missing; add it"),
    (HEAD + "seed = 1\n" + GRID, r"unknown key 'seed' in \[sweep\]; valid keys are base, seeds, metric, kinds"),
    (HEAD.replace("seeds = [0]\n", "") + GRID, r"\[sweep\] seeds must be a non-empty list of distinct integers >= 0, got None"),
    (HEAD.replace("[0]", '[0, "1"]') + GRID, r"seeds must be a non-empty list of distinct integers >= 0, got \[0, '1'\]"),
    (HEAD.replace("[0]", "[1, 1]") + GRID, r"seeds must be .* got \[1, 1\]; e\.g\. seeds = \[0, 1, 2\]"),
    (HEAD.replace("[0]", "[true]") + GRID, r"seeds must be .* got \[True\]"),
    (HEAD.replace("[0]", "[-1]") + GRID, r"seeds must be .* got \[-1\]"),
    (HEAD.replace("sens@10", "accuracy") + GRID, r"\[sweep\] metric must be one of auroc, auprc, dice, sens@1, .*got 'accuracy'"),
    (HEAD.replace('["texture"]', '["blur"]') + GRID,
     r"\[sweep\] kinds must be a non-empty list of distinct lesion kinds from intensity, texture, geometry, mixed, "
     r"got \['blur'\]"),
    (HEAD.replace('["texture"]', "[]") + GRID, r"kinds must be a non-empty list .* got \[\]"),
    (HEAD + 'base = "missing.toml"\n' + GRID,
     r"base = 'missing\.toml': config file .*missing\.toml not found \(taken relative to the sweep file\)"),
    (HEAD + "base = 3\n" + GRID, r"\[sweep\] base must be a string, got 3"),
    (HEAD + "[grid]\n", r"\[grid\] is empty; add at least one key"),
    (HEAD + '[grid]\n"loss.nonsense" = [1]\n', r"\[grid\] loss\.nonsense is not a config key; valid keys are cohort\.manifest, "),
    (HEAD + '[grid]\n"lost.steps" = [1]\n', r"\[grid\] lost\.steps is not a config key"),
    (HEAD + "[grid]\nloss.agreement_weight = [0.1]\n", r"\[grid\] key 'loss' is not section\.key; write each key in quotes"),
    (HEAD + '[grid]\n"size" = [5]\n', r"\[grid\] key 'size' is not section\.key"),
    (HEAD + '[grid]\n"patch.size" = []\n', r'\[grid\] patch\.size must be a non-empty list of values, got \[\]; e\.g\. "patch\.size" = \[7\]'),
    (HEAD + '[grid]\n"patch.size" = 5\n', r"\[grid\] patch\.size must be a non-empty list of values, got 5"),
    (HEAD + '[grid]\n"patch.size" = [5, 4]\n', r"s\.toml \[grid\]: patch\.size must be an odd integer >= 3, got 4"),
    (HEAD + '[grid]\n"loss.centred" = [1]\n', r"\[grid\]: loss\.centred must be true or false, got 1"),
    (HEAD + '[grid]\n"train.seed" = [1, 2]\n', r"\[grid\] train\.seed is set by \[sweep\] seeds; remove it"),
    (HEAD + GRID + '[set]\n"train.seed" = 4\n', r"\[set\] train\.seed is set by \[sweep\] seeds"),
    (HEAD + GRID + '[set]\n"patch.size" = 5\n', r"patch\.size is both in \[grid\] and in \[set\]; keep it in one of them"),
    (HEAD + GRID + '[set]\n"train.steps" = 0\n', r"s\.toml \[set\]: train\.steps must be an integer >= 1, got 0"),
    (HEAD + GRID + '[set]\n"train.stepz" = 3\n', r"\[set\] train\.stepz is not a config key"),
    (HEAD + '[grid]\n"cohort.manifest" = ["a.csv", "b.csv"]\n', r"\[grid\] cohort\.manifest: every run is benched on one cohort"),
    (HEAD + '[grid]\n"cohort.split_seed" = [0, 1]\n', r"\[grid\] cohort\.split_seed: every run is benched on one cohort with one set"),
    (HEAD + '[grid]\n"loss.agreement_weight" = [0.5, 0.5]\n', r"give one run id agreement_weight-0\.5_seed-0; make the values"),
    (HEAD + '[grid]\n"train.init" = ["a b", "a+b"]\n', r"give one run id init-a\+b_seed-0"),
    (HEAD + GRID + '[bench]\nkinds = ["mixed"]\n', r"\[sweep\] kinds \['texture'\] are not all benched \(\[bench\] kinds"),
])
def test_validation_errors(tmp_path, text, match):
    with pytest.raises(ConfigError, match=match):
        load_sweep(write(tmp_path / "s.toml", text))


def test_missing_sweep_file_and_bad_jobs(tmp_path):
    with pytest.raises(ConfigError, match=r"sweep file .*nope\.toml not found; pass an existing TOML file"):
        load_sweep(tmp_path / "nope.toml")
    sweep = write(tmp_path / "s.toml", HEAD + GRID)
    with pytest.raises(InputError, match=r"--jobs 0: expected an integer >= 1, e\.g\. --jobs 2"):
        run_sweep(sweep, tmp_path / "out", jobs=0, bench_fn=fake_bench)
    with pytest.raises(InputError, match=r"--jobs 2: bench_fn <function .*<lambda>.*> cannot be sent to worker processes "
                                         r"\(.*\); pass a module-level function, or --jobs 1"):
        run_sweep(sweep, tmp_path / "out", jobs=2, bench_fn=lambda *a, **k: {})
    assert not (tmp_path / "out").exists()  # refused before anything was written


def test_list_commands(tmp_path):
    sweep = write(tmp_path / "my sweep.toml", HEAD.replace("[0]", "[0, 1]") + GRID)
    out = tmp_path / "out dir"
    cmds = list_commands(sweep, out)
    ids = ["size-5_seed-0", "size-7_seed-0", "size-5_seed-1", "size-7_seed-1"]
    head = f"twinpatch sweep {shlex.quote(str(sweep))} --out {shlex.quote(str(out))}"
    assert cmds == [f"{head} --only {i}" for i in ids] + [f"{head} --summary-only"]
    # the quoting survives a POSIX shell split (Python's shlex)
    assert shlex.split(cmds[0]) == ["twinpatch", "sweep", str(sweep), "--out", str(out), "--only", ids[0]]


# ---------------------------------------------------------------- summaries from hand-made bench folders

def test_method_values_rules():
    m = bench_metrics({"a": 0.4, "b": 0.2})
    assert method_values(m, "sens@10", ("texture", "mixed"), Path("x")) == {"a": expected(0.4), "b": expected(0.2)}
    assert method_values(m, "signal_ratio", ("texture",), Path("x")) == {"a": None, "b": None}  # null field
    m["summary"] = [r for r in m["summary"] if r["kind"] == "texture"]
    with pytest.raises(InputError, match=r"m\.json: no summary row for method 'a', kind 'mixed' \(group all\); that bench "
                                         r"covers kinds \['texture'\]; set \[sweep\] kinds to benched kinds"):
        method_values(m, "sens@10", ("texture", "mixed"), Path("m.json"))


def test_summarise_hand_made(tmp_path):
    sweep = write(tmp_path / "s.toml", '[sweep]\nseeds = [0, 1, 2]\nmetric = "sens@10"\nkinds = ["texture", "mixed"]\n'
                  '[grid]\n"loss.agreement_weight" = [0.0, 0.5]\n"patch.size" = [5, 7]\n')
    out = tmp_path / "out"
    rng = np.random.default_rng(7)
    given = {}  # run id -> {method: bench value}
    states = {"agreement_weight-0.5_size-7_seed-1": "failed", "agreement_weight-0.5_size-7_seed-2": "pending",
              "agreement_weight-0_size-7_seed-2": "trained", "agreement_weight-0.5_size-5_seed-2": "pending"}
    for spec in plan(load_sweep(sweep)):
        run = out / "runs" / spec.id
        state = states.get(spec.id, "benched")
        run.mkdir(parents=True)
        if state == "failed":
            write(run / "error.txt", "ConfigError: patch.size=7 is larger than the grid\n")
        elif state == "trained":
            write(run / "encoder.safetensors", "")
        elif state == "benched":
            given[spec.id] = {"embedding": float(rng.uniform(0, 1)), "embedding+intensities": float(rng.uniform(0, 1))}
            (run / "bench").mkdir()
            write(run / "bench" / "metrics.json", json.dumps(bench_metrics(given[spec.id], seconds=2.5)))
            write(run / "run.json", json.dumps({"training": {"finished": True, "seconds": 3.25}}))
    (out / "baselines").mkdir()
    write(out / "baselines" / "metrics.json", json.dumps(bench_metrics({"intensities": 0.3, "zscore": 0.6})))
    s = summarise(sweep, out)

    assert s["kind"] == "twinpatch sweep" and "not a diagnostic device" in s["caution"]
    assert (s["metric"], s["lesion_kinds"], s["keys"], s["seeds"]) == \
        ("sens@10", ["texture", "mixed"], ["loss.agreement_weight", "patch.size"], [0, 1, 2])
    runs = {r["id"]: r for r in s["runs"]}
    for rid, r in runs.items():
        assert r["status"] == states.get(rid, "benched")
        if rid in given:
            assert r["values"] == pytest.approx({m: expected(v) for m, v in given[rid].items()})
            assert (r["seconds_train"], r["seconds_bench"]) == (3.25, 2.5)
        else:
            assert r["values"] == {}
    assert runs["agreement_weight-0.5_size-7_seed-1"]["error"] == "ConfigError: patch.size=7 is larger than the grid"
    # ranking: mean and sample sd (ddof=1) against numpy's mean / std, per (config, method) over its benched seeds
    assert len(s["ranking"]) == 4 * 2
    for row in s["ranking"]:
        vals = [expected(given[rid][row["method"]]) for rid in given if runs[rid]["config"] == row["config"]]
        assert row["values"] == pytest.approx(vals) and row["n_seeds"] == len(vals)
        assert row["mean"] == pytest.approx(np.mean(vals))
        if len(vals) > 1:
            assert row["sd"] == pytest.approx(np.std(vals, ddof=1))
        else:
            assert row["sd"] is None
    means = [r["mean"] for r in s["ranking"]]
    assert means == sorted(means, reverse=True)
    counts = {json.dumps(r["config"]): r["n_seeds"] for r in s["ranking"]}
    assert counts == {'{"loss.agreement_weight": 0.0, "patch.size": 5}': 3, '{"loss.agreement_weight": 0.0, "patch.size": 7}': 2,
                      '{"loss.agreement_weight": 0.5, "patch.size": 5}': 2, '{"loss.agreement_weight": 0.5, "patch.size": 7}': 1}
    best = s["ranking"][0]
    assert best["label"] == (f"agreement_weight={fmt_value(best['config']['loss.agreement_weight'])}, "
                             f"size={best['config']['patch.size']} / {best['method']}")
    assert s["baselines"] == [{"name": "intensities", "value": pytest.approx(expected(0.3))},
                              {"name": "zscore", "value": pytest.approx(expected(0.6))}]
    assert json.loads((out / "summary.json").read_text(encoding="utf-8")) == json.loads(json.dumps(s))
    # CSV: the ranking in order, then the baselines
    rows = list(csv.DictReader((out / "summary.csv").open(encoding="utf-8")))
    assert [r["family"] for r in rows] == ["sweep"] * 8 + ["baseline"] * 2
    assert [float(r["mean"]) for r in rows[:8]] == pytest.approx(means)
    assert rows[0]["method"] == best["method"] and rows[0]["patch.size"] == str(best["config"]["patch.size"])
    assert rows[0]["values"] == ";".join(map(str, best["values"])) and rows[8]["method"] == "intensities"
    # Markdown: ranking row of the best, baselines, the failed run
    md = (out / "summary.md").read_text(encoding="utf-8")
    sd = "n/a" if best["sd"] is None else f"{best['sd']:.3f}"
    assert (f"| 1 | {fmt_value(best['config']['loss.agreement_weight'])} | {best['config']['patch.size']} | "
            f"{best['method']} | {best['n_seeds']} | {best['mean']:.3f} | {sd} |") in md
    assert f"| zscore | {expected(0.6):.3f} |" in md and "| agreement_weight-0.5_size-7_seed-1 | ConfigError: " in md
    assert "Runs: 12 (8 benched, 1 trained, 1 failed, 2 pending)" in md
    assert s["figures"] == ["metric_vs_agreement_weight.png", "metric_vs_size.png"]
    for name in s["figures"]:
        assert (out / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, 5.2)
    assert not list(out.glob(".*partial*"))  # no temporary file left behind


def test_summarise_nothing_finished(tmp_path):
    sweep = write(tmp_path / "s.toml", HEAD + GRID)
    s = summarise(sweep, tmp_path / "out")
    assert [r["status"] for r in s["runs"]] == ["pending", "pending"]
    assert (s["ranking"], s["baselines"], s["figures"]) == ([], [], [])
    assert (tmp_path / "out" / "summary.md").is_file()


# ---------------------------------------------------------------- a real tiny sweep

FAST = ["train.steps=2", "train.val_every=2", "train.val_pairs=64", "train.projector_points=0",
        "train.retrieval_voxels=16"]


@pytest.fixture(scope="module")
def base_toml(tiny_manifest, tmp_path_factory):
    cfg = load_config(None, TINY_OVERRIDES + FAST + [f'cohort.manifest="{tiny_manifest.as_posix()}"'])
    return write(tmp_path_factory.mktemp("base") / "base.toml", dumps(cfg))


def tiny_sweep(folder: Path, base: Path, grid: str, seeds: str = "[0]", extra: str = "") -> Path:
    return write(folder / "sweep.toml", f'[sweep]\nbase = "{base.as_posix()}"\nseeds = {seeds}\nmetric = "sens@10"\n'
                 f'kinds = ["texture", "mixed"]\n[grid]\n{grid}\n[set]\n"export.example_map" = false\n{extra}'
                 f'[bench]\ncalls = "{(folder / "calls.txt").as_posix()}"\n')


@pytest.fixture(scope="module")
def swept(base_toml, tmp_path_factory):
    """Two real 2-step trainings (patch 5, seeds 0 and 1) and two runs that fail (patch 101 > the grid),
    on two spawned worker processes (the later tests run in this process)."""
    folder = tmp_path_factory.mktemp("sweep")
    sweep = tiny_sweep(folder, base_toml, '"patch.size" = [5, 101]', seeds="[0, 1]")
    messages = []
    summary = run_sweep(sweep, folder / "out", jobs=2, progress=False, bench_fn=fake_bench, log=messages.append)
    return sweep, folder / "out", summary, messages


def stamps(out: Path) -> dict:
    return {p: p.stat().st_mtime_ns for p in (out / "runs").rglob("*") if p.is_file() and p.name != "error.txt"}


def test_sweep_end_to_end(swept):
    from embed.bundle import read_bundle

    sweep, out, s, messages = swept
    logged = calls(sweep.parent / "calls.txt")
    assert logged[0][:2] == ["baselines", str(os.getpid())]  # baselines first, in this process
    card = read_bundle(out / "runs" / "size-5_seed-1" / "encoder.safetensors")[1]["training"]
    assert sorted(logged[0][3].split(",")) == sorted(card["val_controls"])  # the controls no run trained on
    other = read_bundle(out / "runs" / "size-5_seed-0" / "encoder.safetensors")[1]["training"]
    assert other["val_controls"] == card["val_controls"]  # cohort.split_seed, not train.seed, picks them
    assert sorted(c[0] for c in logged[1:]) == ["size-5_seed-0", "size-5_seed-1"]
    for c in logged[1:]:  # runs in worker processes, with max(1, cores // jobs) torch threads each
        assert c[1] != str(os.getpid()) and int(c[2]) == max(1, (os.cpu_count() or 1) // 2)
    assert "4 run(s) on 2 worker processes, " in messages[1]
    status = {r["id"]: r for r in s["runs"]}
    assert [status[i]["status"] for i in ("size-5_seed-0", "size-101_seed-0", "size-5_seed-1", "size-101_seed-1")] == \
        ["benched", "failed", "benched", "failed"]
    error = (out / "runs" / "size-101_seed-0" / "error.txt").read_text(encoding="utf-8")
    assert error.startswith("ConfigError: patch.size=101 is larger than the grid") and error.count("\n") == 1
    assert status["size-101_seed-1"]["error"] == error.strip()
    assert any("size-101_seed-0: FAILED (ConfigError" in m for m in messages)
    for spec in plan(load_sweep(sweep)):
        run = out / "runs" / spec.id
        if spec.config["patch.size"] == 5:
            assert to_dict(load_config(run / "config.toml")) == to_dict(spec.cfg)  # saved config == plan
            rec = read_bundle(run / "encoder.safetensors")[1]["training"]["final_validation"]["reconstruction"]
            assert status[spec.id]["values"] == pytest.approx({"embedding": expected(rec),
                                                               "embedding+intensities": expected(rec + 0.1)})
            assert status[spec.id]["seconds_train"] > 0 and status[spec.id]["seconds_bench"] == 1.5
    top = s["ranking"][0]
    assert (top["config"], top["method"], top["n_seeds"]) == ({"patch.size": 5}, "embedding+intensities", 2)
    assert top["values"][0] != top["values"][1]  # the seeds trained different encoders
    assert top["sd"] == pytest.approx(np.std(top["values"], ddof=1))
    manifest_lines = len(Path(load_sweep(sweep).base_config.cohort.manifest).read_text().splitlines())
    assert s["baselines"] == [{"name": "intensities", "value": pytest.approx(expected(manifest_lines / 100))}]
    assert (out / "summary.md").is_file() and (out / "metric_vs_size.png").is_file()
    assert s == json.loads((out / "summary.json").read_text(encoding="utf-8"))


def test_sweep_second_call_skips_finished_work(swept, tmp_path):
    sweep, out0, _, _ = swept
    out = shutil.copytree(out0, tmp_path / "out")
    before, n_calls = stamps(out), len(calls(sweep.parent / "calls.txt"))
    messages = []
    s = run_sweep(sweep, out, progress=False, bench_fn=fake_bench, log=messages.append)
    assert stamps(out) == before  # nothing trained, exported or benched again
    assert len(calls(sweep.parent / "calls.txt")) == n_calls
    assert "2 run(s) already benched: skipped" in messages
    assert [r["status"] for r in s["runs"]] == ["benched", "failed", "benched", "failed"]  # failures are retried


def test_sweep_resumes_and_exports(swept, tmp_path):
    sweep, out0, _, _ = swept
    out = shutil.copytree(out0, tmp_path / "out")
    r0, r1 = out / "runs" / "size-5_seed-0", out / "runs" / "size-5_seed-1"
    card = json.loads((r0 / "run.json").read_text(encoding="utf-8"))
    card["training"]["finished"] = False  # as if interrupted after the last checkpoint
    write(r0 / "run.json", json.dumps(card))
    for run in (r0, r1):
        (run / "encoder.safetensors").unlink()
        shutil.rmtree(run / "bench")
    config_stamp = (r0 / "config.toml").stat().st_mtime_ns
    messages = []
    s = run_sweep(sweep, out, progress=False, bench_fn=fake_bench, log=messages.append)
    assert "  size-5_seed-0: resumed, benched" in messages and "  size-5_seed-1: exported, benched" in messages
    assert (r0 / "config.toml").stat().st_mtime_ns == config_stamp  # resumed in place, not retrained
    assert json.loads((r0 / "run.json").read_text(encoding="utf-8"))["training"]["finished"] is True
    assert [r["status"] for r in s["runs"]] == ["benched", "failed", "benched", "failed"]


def test_sweep_only_one_run(swept, tmp_path):
    sweep, out0, _, _ = swept
    out = shutil.copytree(out0, tmp_path / "out")
    shutil.rmtree(out / "runs" / "size-5_seed-1" / "bench")
    failed = out / "runs" / "size-101_seed-0" / "error.txt"
    failed_stamp, n_calls = failed.stat().st_mtime_ns, len(calls(sweep.parent / "calls.txt"))
    messages = []
    s = run_sweep(sweep, out, only="size-5_seed-1", progress=False, bench_fn=fake_bench, log=messages.append)
    assert "  size-5_seed-1: training reused, benched" in messages
    assert [c[:2] for c in calls(sweep.parent / "calls.txt")[n_calls:]] == [["size-5_seed-1", str(os.getpid())]]
    assert failed.stat().st_mtime_ns == failed_stamp  # other runs untouched
    assert s["runs"][2]["status"] == "benched" and s["runs"][2]["values"] == swept[2]["runs"][2]["values"]
    with pytest.raises(InputError, match=r"--only size-9_seed-0: .*sweep\.toml has no run with that id; valid ids: "
                                         r"size-5_seed-0, size-101_seed-0, size-5_seed-1, size-101_seed-1"):
        run_sweep(sweep, out, only="size-9_seed-0", bench_fn=fake_bench)


def test_sweep_refuses_a_changed_config(swept, tmp_path, base_toml):
    sweep, out0, _, _ = swept
    out = shutil.copytree(out0, tmp_path / "out")
    changed = tiny_sweep(tmp_path, base_toml, '"patch.size" = [5, 101]', seeds="[0, 1]", extra='"train.lr" = 0.01\n')
    before = stamps(out)
    with pytest.raises(InputError, match=r"sweep run size-5_seed-0: .*config\.toml has train\.lr = 0\.001 but the sweep "
                                         r"plans 0\.01; the sweep changed since that run was trained"):
        run_sweep(changed, out, progress=False, bench_fn=fake_bench)
    assert stamps(out) == before and not calls(tmp_path / "calls.txt")  # refused before any work


@pytest.mark.parametrize("path", sorted((ROOT / "configs").glob("sweep_*.toml")), ids=lambda p: p.name)
def test_every_shipped_sweep_file_plans(path):
    # The README's sweeps were measured on squares (before cubes became the default) except the 3D
    # ones: each file pins the patch shape it was measured with.
    specs = plan(load_sweep(path))
    assert specs and len({s.id for s in specs}) == len(specs)
    cubes = "patch3d" in path.name or "cubes" in path.name
    assert all(s.cfg.patch.dims == (3 if cubes else 2) for s in specs)

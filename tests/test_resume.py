"""Exact resume: a run killed (SIGKILL) or interrupted (SIGINT, as Ctrl-C) mid-way and resumed ends
with weights identical to an uninterrupted run of the same seed; metrics have no duplicate steps."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import pytest
import torch

from embed.bundle import read_bundle
from embed.cohort import load_cohort
from embed.errors import InputError
from embed.fit import train
from embed.jobs import export_run
from embed.monitor import truncate_metrics

from .conftest import TINY_OVERRIDES

STEPS = 160
RUN_SET = TINY_OVERRIDES + [f"train.steps={STEPS}", "train.batch_size=128", "train.checkpoint_every=10",
                            "train.val_every=40", "train.deterministic=true", "train.threads=1",
                            "train.projector_points=0", "export.example_map=false"]


def _cmd(manifest, *extra):
    sets = [x for kv in RUN_SET + [f'cohort.manifest="{manifest.as_posix()}"'] for x in ("--set", kv)]
    return [sys.executable, "-m", "embed.cli", "train", "--quiet", *sets, *extra]


def _ckpt_step(run) -> int:
    path = run / "checkpoints" / "last.pt"
    try:
        return int(torch.load(path, weights_only=True)["step"]) if path.exists() else -1
    except Exception:  # being replaced right now
        return -1


def _interrupt(manifest, run, sig) -> int:
    """Start a run, send ``sig`` once a checkpoint past step 0 exists; returns the exit code."""
    proc = subprocess.Popen(_cmd(manifest, "--out", str(run)), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    while _ckpt_step(run) < 10 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    proc.send_signal(sig)
    proc.communicate(timeout=120)
    return proc.returncode


@pytest.fixture(scope="module")
def reference(tiny_manifest, tmp_path_factory):
    """The uninterrupted run, in this process (same code, same thread count)."""
    from embed.config import load_config

    cfg = load_config(None, RUN_SET + [f'cohort.manifest="{tiny_manifest.as_posix()}"'])
    run = tmp_path_factory.mktemp("ref") / "run"
    train(cfg, load_cohort(tiny_manifest, progress=False), run, progress=False)
    return run


def _assert_same_run(run, reference):
    a = torch.load(run / "checkpoints" / "last.pt", weights_only=True)
    b = torch.load(reference / "checkpoints" / "last.pt", weights_only=True)
    assert a["step"] == b["step"] == STEPS
    assert a["model"].keys() == b["model"].keys()
    assert all(torch.equal(a["model"][k], b["model"][k]) for k in a["model"])
    assert all(torch.equal(x, y) for k in a["optimizer"]["state"]
               for x, y in zip(a["optimizer"]["state"][k].values(), b["optimizer"]["state"][k].values()))
    rows = [json.loads(x) for x in (run / "metrics.jsonl").read_text().splitlines()]
    ref_rows = [json.loads(x) for x in (reference / "metrics.jsonl").read_text().splitlines()]
    keys = [(r["step"], r["split"]) for r in rows]
    assert len(keys) == len(set(keys))  # no step logged twice
    assert keys == [(r["step"], r["split"]) for r in ref_rows]
    assert [r for r in rows if r["split"] == "train"] == [r for r in ref_rows if r["split"] == "train"]
    _, card = read_bundle(run / "encoder.safetensors")
    assert card["training"]["steps"] == STEPS and card["training"]["finished"]
    assert not list(run.rglob(".*partial*"))


def test_sigkill_then_resume_gives_identical_weights(tiny_manifest, tmp_path, reference):
    run = tmp_path / "run"
    code = _interrupt(tiny_manifest, run, signal.SIGKILL)
    assert code == -signal.SIGKILL
    killed_at = _ckpt_step(run)
    assert 10 <= killed_at < STEPS, "the run must be killed mid-way"
    # Killed mid-way the run dir can already be exported (weights of the last checkpoint).
    bundle = export_run(run, tmp_path / "partial.safetensors")
    assert read_bundle(bundle)[1]["training"]["finished"] is False
    done = subprocess.run([sys.executable, "-m", "embed.cli", "train", "--resume", str(run), "--quiet"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    _assert_same_run(run, reference)


def test_ctrl_c_writes_a_checkpoint_and_resume_matches(tiny_manifest, tmp_path, reference):
    run = tmp_path / "run"
    code = _interrupt(tiny_manifest, run, signal.SIGINT)
    assert code == 130  # the CLI's exit code for Ctrl-C
    stopped_at = _ckpt_step(run)
    assert 10 <= stopped_at < STEPS
    card = json.loads((run / "run.json").read_text())
    assert card["training"]["steps"] == stopped_at  # the checkpoint of the step it stopped at, not an older one
    done = subprocess.run([sys.executable, "-m", "embed.cli", "train", "--resume", str(run), "--quiet"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    _assert_same_run(run, reference)


def test_truncate_metrics_drops_late_and_broken_lines(tmp_path):
    path = tmp_path / "metrics.jsonl"
    path.write_text('{"step": 0, "split": "train"}\n{"step": 9, "split": "val"}\n{"step": 10, "split": "train"}\n'
                    '{"step": 11, "spl', encoding="utf-8")
    assert truncate_metrics(path, 10) == 2
    assert [json.loads(x)["step"] for x in path.read_text().splitlines()] == [0, 9]


def test_resume_errors(tmp_path, tiny_run):
    from embed.cli import main

    with pytest.raises(InputError, match=r"--resume .*: checkpoints/last.pt is missing, so this is not a resumable"):
        from embed.jobs import check_resumable

        (tmp_path / "config.toml").write_text("")
        check_resumable(tmp_path)
    # The CLI refuses options that would change the run, and folders that are not runs (exit 2).
    assert main(["train", "--resume", str(tiny_run["run_dir"]), "--set", "train.steps=5"]) == 2
    assert main(["train", "--resume", str(tmp_path / "nowhere")]) == 2
    with pytest.raises(InputError, match=r"--set cannot be combined with --resume"):
        from embed.cli import _cmd_train, build_parser

        _cmd_train(build_parser().parse_args(["train", "--resume", str(tiny_run["run_dir"]), "--set", "a.b=1"]))
    with pytest.raises(InputError, match=r"config.toml is missing, so this is not a twinpatch run"):
        _cmd_train(build_parser().parse_args(["train", "--resume", str(tmp_path / "nowhere")]))


def test_resuming_a_finished_run_changes_nothing(tiny_run, tmp_path):
    import shutil

    from embed.config import load_config

    run = tmp_path / "copy"
    shutil.copytree(tiny_run["run_dir"], run)
    before = torch.load(run / "checkpoints" / "last.pt", weights_only=True)
    cfg = load_config(run / "config.toml")
    lines = (run / "metrics.jsonl").read_text()
    result = train(cfg, load_cohort(cfg.cohort.manifest, progress=False), run, progress=False, resume=True)
    after = torch.load(run / "checkpoints" / "last.pt", weights_only=True)
    assert result.steps == before["step"] == after["step"]
    assert all(torch.equal(before["model"][k], after["model"][k]) for k in before["model"])
    assert (run / "metrics.jsonl").read_text() == lines
    assert os.path.getsize(run / "run.json") > 0

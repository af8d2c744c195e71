"""The summary of a sweep: gather finished runs, rank configurations across seeds, write tables and plots.

``summarise(path, out)`` writes ``summary.json`` / ``summary.csv`` / ``summary.md`` and one
``metric_vs_<key>.png`` per swept key into the sweep folder (see :mod:`embed.sweep`).
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np

from . import __version__
from .errors import InputError
from .files import write_json, write_text
from .sweepplan import BUNDLE, RunSpec, Sweep, _read_json, fmt_value, load_sweep, plan, short_names


def method_values(metrics: dict, metric: str, kinds: tuple, where: Path) -> dict:
    """Method -> mean over ``kinds`` of the bench summary's ``metric`` mean (group "all"); None if any is null."""
    rows = {(r.get("method"), r.get("kind")): r for r in metrics.get("summary", []) if r.get("group") == "all"}
    names = [m["name"] for m in metrics.get("methods", [])] or list(dict.fromkeys(m for m, _ in rows))
    values = {}
    for name in names:
        found = []
        for kind in kinds:
            if (name, kind) not in rows:
                have = sorted({k for m, k in rows if m == name})
                raise InputError(f"{where}: no summary row for method {name!r}, kind {kind!r} (group all); that bench "
                                 f"covers kinds {have}; set [sweep] kinds to benched kinds")
            cell = rows[(name, kind)].get(metric)
            found.append(cell[0] if cell else None)
        ok = all(isinstance(v, (int, float)) and math.isfinite(v) for v in found)
        values[name] = float(np.mean(found)) if ok else None
    return values


def _run_entry(sweep: Sweep, spec: RunSpec, run_dir: Path) -> dict:
    entry = {"id": spec.id, "config": spec.config, "seed": spec.seed, "status": "pending", "error": None,
             "values": {}, "seconds_train": _read_json(run_dir / "run.json", False).get("training", {}).get("seconds"), "seconds_bench": None}
    metrics_path, error = run_dir / "bench" / "metrics.json", run_dir / "error.txt"
    if metrics_path.is_file():
        metrics = _read_json(metrics_path)
        entry.update(status="benched", values=method_values(metrics, sweep.metric, sweep.kinds, metrics_path),
                     seconds_bench=metrics.get("seconds"))
    elif error.is_file():
        entry.update(status="failed", error=error.read_text(encoding="utf-8").strip() or "(no message)")
    elif (run_dir / BUNDLE).is_file():
        entry["status"] = "trained"
    return entry


def _ranking(runs: list[dict], short: dict) -> list[dict]:
    groups: dict[tuple, dict] = {}
    for run in runs:  # plan order: seeds outer, so values come in seed order
        for method, value in run["values"].items():
            if value is not None:
                key = (json.dumps(run["config"]), method)
                groups.setdefault(key, {"config": run["config"], "method": method, "values": []})["values"].append(value)
    rows = []
    for g in groups.values():
        v = np.asarray(g["values"], dtype=float)
        label = ", ".join(f"{short[k]}={fmt_value(x)}" for k, x in g["config"].items())
        rows.append({"label": f"{label} / {g['method']}", "config": g["config"], "method": g["method"],
                     "n_seeds": len(v), "mean": float(v.mean()),
                     "sd": float(v.std(ddof=1)) if len(v) > 1 else None, "values": g["values"]})
    return sorted(rows, key=lambda r: -r["mean"])  # best first; ties keep plan order


def _figure(file: Path, key: str, values: tuple, runs: list[dict], baselines: list[dict], metric: str,
            kinds: tuple, caution: str) -> None:
    """Metric against one swept key: points per run (all seeds and other keys), mean line per method."""
    from .figures import pyplot, save_figure

    plt = pyplot()

    methods = list(dict.fromkeys(m for r in runs for m in r["values"]))
    labels = [fmt_value(v) for v in values]
    fig, ax = plt.subplots(figsize=(6.4, 4.2), constrained_layout=True)
    for j, method in enumerate(methods):
        shift = (j - (len(methods) - 1) / 2) * 0.06
        means = []
        for i, label in enumerate(labels):
            ys = [r["values"][method] for r in runs
                  if fmt_value(r["config"][key]) == label and r["values"].get(method) is not None]
            ax.scatter([i + shift] * len(ys), ys, s=16, alpha=0.55, color=f"C{j}")
            means.append(float(np.mean(ys)) if ys else np.nan)
        ax.plot(np.arange(len(labels)) + shift, means, marker="o", color=f"C{j}", label=f"{method} (mean)")
    for k, b in enumerate(baselines):
        if b["value"] is not None:
            ax.axhline(b["value"], ls="--", lw=1, color=f"C{len(methods) + k}", label=f"{b['name']} (baseline)")
    ax.set(xticks=range(len(labels)), xticklabels=labels, xlabel=key, ylabel=f"{metric}, mean over {', '.join(kinds)}")
    ax.legend(fontsize=7)
    ax.set_title("dots: single runs (every seed and other setting); line: their mean", fontsize=8)
    fig.supxlabel(caution, fontsize=7, color="#444444")
    save_figure(fig, file, dpi=100)


def _csv(summary: dict) -> str:
    keys = summary["keys"]
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["rank", "family", "method", *keys, "n_seeds", "mean", "sd", "values"])
    for i, r in enumerate(summary["ranking"], 1):
        w.writerow([i, "sweep", r["method"], *(json.dumps(r["config"][k]) for k in keys), r["n_seeds"], r["mean"],
                    "" if r["sd"] is None else r["sd"], ";".join(map(str, r["values"]))])
    for b in summary["baselines"]:
        w.writerow(["", "baseline", b["name"], *[""] * len(keys), "", "" if b["value"] is None else b["value"], "", ""])
    return buf.getvalue()


def _num(v: float | None) -> str:
    return "n/a" if v is None else f"{v:.3f}"


def _markdown(summary: dict, short: dict) -> str:
    from .detection import markdown_table

    keys, metric = summary["keys"], summary["metric"]
    counts = {s: sum(r["status"] == s for r in summary["runs"]) for s in ("benched", "trained", "failed", "pending")}
    parts = [f"# twinpatch sweep: {metric}, mean over lesion kinds {', '.join(summary['lesion_kinds'])}\n",
             f"> {summary['caution']}\n",
             f"Runs: {len(summary['runs'])} ({', '.join(f'{n} {s}' for s, n in counts.items())}); "
             f"seeds {summary['seeds']}. Higher is better; sd is over seeds.\n",
             "## Ranking\n",
             markdown_table(["rank", *(short[k] for k in keys), "method", "seeds", "mean", "sd"],
                            [[i, *(fmt_value(r["config"][k]) for k in keys), r["method"], r["n_seeds"],
                              _num(r["mean"]), _num(r["sd"])] for i, r in enumerate(summary["ranking"], 1)]),
             "## Baselines\n",
             markdown_table(["method", metric], [[b["name"], _num(b["value"])] for b in summary["baselines"]])]
    failed = [r for r in summary["runs"] if r["status"] == "failed"]
    if failed:
        parts += ["## Failed runs\n", markdown_table(["run", "error"], [[r["id"], r["error"]] for r in failed])]
    parts += [f"![{metric} vs {key}]({name})\n" for key, name in zip(keys, summary["figures"])]
    return "\n".join(parts)


def summarise(path: str | Path, out: str | Path) -> dict:
    """Gather whatever has finished in ``out`` into summary.json / .csv / .md and one PNG per swept key."""
    from .report import CAUTION

    sweep, out = load_sweep(path), Path(out)
    out.mkdir(parents=True, exist_ok=True)
    keys = [k for k, _ in sweep.grid]
    short = short_names(keys)
    runs = [_run_entry(sweep, spec, out / "runs" / spec.id) for spec in plan(sweep)]
    base_path = out / "baselines" / "metrics.json"
    baselines = []
    if base_path.is_file():
        values = method_values(_read_json(base_path), sweep.metric, sweep.kinds, base_path)
        baselines = [{"name": name, "value": v} for name, v in values.items()]
    figures = []
    if any(r["values"] for r in runs):
        for key, values in sweep.grid:
            name = f"metric_vs_{short[key]}.png"
            _figure(out / name, key, values, runs, baselines, sweep.metric, sweep.kinds, CAUTION)
            figures.append(name)
    summary = {"kind": "twinpatch sweep", "caution": CAUTION, "twinpatch_version": __version__,
               "metric": sweep.metric, "lesion_kinds": list(sweep.kinds), "keys": keys, "seeds": list(sweep.seeds),
               "runs": runs, "ranking": _ranking(runs, short), "baselines": baselines, "figures": figures}
    write_json(out / "summary.json", summary)
    write_text(out / "summary.csv", _csv(summary))
    write_text(out / "summary.md", _markdown(summary, short))
    return summary

"""What a bench writes: ``metrics.json``, ``table.csv``, ``table.md`` and its figures (PNG).

``table.*`` hold one row per method and lesion kind (summary rows of group "all"): n, then each
metric as mean and 95 % bootstrap interval, then false-positive clusters per lesion-free
held-out control. The Markdown table is what the README shows.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np

from .detection import format_ci, markdown_table
from .files import write_json, write_text

COLUMNS = ("auroc", "auprc", "dice", "sens@1", "sens@3", "sens@5", "sens@10", "signal_ratio")
LABELS = {"auroc": "AUROC", "auprc": "AUPRC", "dice": "Dice", "signal_ratio": "signal ratio"}


def main_rows(metrics: dict) -> list[dict]:
    """Summary rows of group 'all', in method order, kinds in bench order, 'all' last."""
    order = {m["name"]: i for i, m in enumerate(metrics["methods"])}
    kinds = {k: i for i, k in enumerate([*metrics["lesion_kinds"], "all"])}
    rows = [r for r in metrics["summary"] if r["group"] == "all" and r["method"] in order]
    return sorted(rows, key=lambda r: (order[r["method"]], kinds.get(r["kind"], len(kinds))))


def table_csv(metrics: dict) -> str:
    cols = [c for c in COLUMNS if "sens@" not in c or int(c[5:]) in metrics["ks"]]
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["method", "kind", "n", *[f"{c}{s}" for c in cols for s in ("", "_lo", "_hi")], "fp_clusters_per_control"])
    for r in main_rows(metrics):
        vals = []
        for c in cols:
            t = r.get(c) or [None, None, None]
            vals += ["" if v is None else f"{v:.4f}" for v in t]
        w.writerow([r["method"], r["kind"], r["n"], *vals,
                    f"{metrics['results'][r['method']]['fp_clusters_per_control']:.2f}"])
    return buf.getvalue()


def table_md(metrics: dict, kinds: tuple | None = None) -> str:
    cols = [c for c in COLUMNS if "sens@" not in c or int(c[5:]) in metrics["ks"]]
    header = ["method", "lesions", "n", *[LABELS.get(c, c) for c in cols], "FP clusters / control"]
    rows = []
    for r in main_rows(metrics):
        if kinds and r["kind"] not in kinds:
            continue
        rows.append([r["method"], r["kind"], r["n"], *[format_ci(r.get(c)) for c in cols],
                     f"{metrics['results'][r['method']]['fp_clusters_per_control']:.1f}"])
    return markdown_table(header, rows)


def write_outputs(out: Path, metrics: dict, cohort, heldout: list[int], cases: list, maps: dict) -> dict:
    """Write the bench folder; returns ``metrics`` with the figure list filled in."""
    from .figures import contrast_figure, example_figure, sensitivity_figure
    from .report import CAUTION

    out.mkdir(parents=True, exist_ok=True)
    metrics = {"kind": metrics["kind"], "caution": CAUTION, **{k: v for k, v in metrics.items() if k != "kind"}}
    figures = [sensitivity_figure(metrics, out / "sensitivity.png").name,
               contrast_figure(metrics, out / "contrast.png", k=max(metrics["ks"])).name]
    by_id = {c.id: c for c in cases}
    names = [m["name"] for m in metrics["methods"]]
    shown = [n for n in names if metrics["methods"][names.index(n)]["family"] == "encoder"][:1] + \
        [n for n in ("intensities",) if n in names]
    for case_id in sorted({cid for n in shown for cid in maps.get(n, {})}):
        c = by_id[case_id]
        background = np.array(cohort.data[heldout[c.control]][0], dtype=np.float32)
        background[c.box] = c.values[0]
        for n in shown:
            if case_id not in maps[n]:
                continue
            score_map, labels = maps[n][case_id]
            rank = metrics["results"][n]["per_lesion"][case_id]["rank"]
            title = (f"{case_id}: {c.record['kind']} lesion, radius {c.record['radius_mm']:g} mm, "
                     f"level {c.record['level']:g} ({c.record['subject']}); {n}: "
                     f"{'first overlapping cluster #' + str(rank) if rank else 'not in the top clusters'}")
            safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in n)
            path = example_figure(out / f"example_{case_id}_{safe}.png", background, score_map, c.lesion, labels,
                                  tuple(c.record["centre_vox"]), title)
            figures.append(Path(path).name)
    metrics["figures"] = figures
    write_json(out / "metrics.json", metrics)
    write_text(out / "table.csv", table_csv(metrics))
    write_text(out / "table.md", "\n".join([f"> {CAUTION}", "", f"> {metrics['small_n']}", "", table_md(metrics), ""]))
    return metrics

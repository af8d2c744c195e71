"""The evaluation subcommands of ``twinpatch``: ``bench``, ``sweep`` and ``report`` (thin, like cli.py)."""

from __future__ import annotations

from pathlib import Path

from .config import parse_value
from .errors import ConfigError, InputError


def add_commands(sub, add) -> None:
    """Register the subcommands on ``sub`` with cli's ``add(sub, name, help, example)``."""
    p = add(sub, "bench", "judge encoders on synthetic subtle lesions in held-out controls, against encoder-free "
            "baselines (research use only)",
            "twinpatch bench runs/demo/encoder.safetensors --cohort demo_data/manifest.csv --out bench/demo\n"
            "  twinpatch bench default=runs/demo/encoder.safetensors plain=runs/plain/encoder.safetensors "
            "--cohort demo_data/manifest.csv --out bench/two --set repeats=1")
    p.add_argument("bundles", metavar="[NAME=]BUNDLE", nargs="*",
                   help="encoder bundles to judge (none: baselines only, then --set heldout=[...] is needed)")
    p.add_argument("--cohort", metavar="MANIFEST_OR_CACHE", type=Path, required=True,
                   help="the cohort whose held-out controls receive lesions (manifest.csv or prepared cache)")
    p.add_argument("--out", metavar="DIR", type=Path, required=True)
    p.add_argument("--set", dest="settings", metavar="KEY=VALUE", action="append", default=[],
                   help="a bench setting (TOML value), e.g. --set repeats=1 --set 'kinds=[\"texture\"]' "
                        "--set 'heldout=[\"ctl03\"]' (see README for all keys)")
    p.add_argument("--no-baselines", action="store_true", help="judge only the encoders")
    p.add_argument("--quiet", action="store_true", help="no progress bars")

    p = add(sub, "sweep", "train, export and bench a grid of settings x seeds; resumable; summary table and plots",
            "twinpatch sweep configs/sweep_agreement.toml --out sweeps/agreement --jobs 2\n"
            "  twinpatch sweep configs/sweep_agreement.toml --out sweeps/agreement --list   # one command per run")
    p.add_argument("sweep_file", metavar="SWEEP.toml", type=Path)
    p.add_argument("--out", metavar="DIR", type=Path, required=True)
    p.add_argument("--jobs", type=int, default=1, help="runs in parallel processes (default 1)")
    mode = p.add_mutually_exclusive_group()
    mode.add_argument("--list", action="store_true", help="print one shell command per run (for a job array) and stop")
    mode.add_argument("--only", metavar="RUN_ID", help="run this run only")
    mode.add_argument("--summary-only", action="store_true", help="only gather finished runs into the summary")
    p.add_argument("--quiet", action="store_true", help="no progress bars")

    p = add(sub, "report", "turn a bench or sweep folder into one static HTML page (no network needed to view it)",
            "twinpatch report bench/demo")
    p.add_argument("folder", metavar="DIR", type=Path)


def parse_settings(items: list[str]) -> dict:
    """``KEY=VALUE`` strings -> dict; values are TOML (numbers, booleans, lists, quoted strings);
    anything that is not TOML is taken as a plain string."""
    out = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise ConfigError(f"--set {item!r}: expected KEY=VALUE, e.g. --set repeats=1")
        out[key.strip()] = parse_value(value)
    return out


def parse_bundles(items: list[str]) -> dict[str, Path]:
    """``[NAME=]PATH`` -> {name: path}; the name defaults to the bundle's run folder or file stem."""
    out: dict[str, Path] = {}
    for item in items:
        name, sep, path = item.partition("=")
        if not sep:
            path = item
            p = Path(path)
            name = p.parent.name if p.stem == "encoder" and p.parent.name else p.stem
        if not Path(path).is_file():
            raise InputError(f"bench: bundle {path} does not exist; pass an exported encoder (.safetensors)")
        if name in out:
            raise InputError(f"bench: two bundles are called {name!r}; name them, e.g. a={path}")
        out[name] = Path(path)
    return out


def cmd_bench(args) -> None:
    from .bench import run_bench
    from .benchout import table_md

    m = run_bench(parse_bundles(args.bundles), args.cohort, args.out, baselines=not args.no_baselines,
                  settings=parse_settings(args.settings), progress=not args.quiet)
    print(table_md(m))
    print(f"\n{len(m['lesions'])} lesions in {len(m['heldout'])} held-out controls, {len(m['fit_controls'])} fit "
          f"controls; {m['seconds']:.0f} s")
    print(f"  metrics  {args.out / 'metrics.json'}\n  table    {args.out / 'table.md'}")
    print(f"  page     twinpatch report {args.out}")
    print(m["small_n"])
    print(m["caution"])


def cmd_sweep(args) -> None:
    from . import sweep

    if args.list:
        print("\n".join(sweep.list_commands(args.sweep_file, args.out)))
        return
    if args.summary_only:
        summary = sweep.summarise(args.sweep_file, args.out)
    else:
        if args.jobs < 1:
            raise InputError(f"--jobs {args.jobs}: use 1 or more parallel runs")
        summary = sweep.run_sweep(args.sweep_file, args.out, jobs=args.jobs, only=args.only, progress=not args.quiet)
    print((args.out / "summary.md").read_text(encoding="utf-8") if (args.out / "summary.md").is_file() else "")
    done = sum(r["status"] == "benched" for r in summary["runs"])
    print(f"{done} of {len(summary['runs'])} runs benched; summary in {args.out / 'summary.json'}; "
          f"page: twinpatch report {args.out}")
    print(summary.get("caution", ""))


def cmd_report(args) -> None:
    from .report import write_html

    print(write_html(args.folder))


COMMANDS = {"bench": cmd_bench, "sweep": cmd_sweep, "report": cmd_report}

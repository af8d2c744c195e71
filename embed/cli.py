"""The ``twinpatch`` command. Thin: parse arguments, call :mod:`embed.jobs`, print where things are.
The evaluation commands (bench, sweep, report) live in :mod:`embed.cli_eval`.

Exit codes: 0 success; 2 bad input (one line on stderr naming the file or key, what was found and
the fix; no traceback); 130 interrupted with Ctrl-C.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from . import __version__, cli_eval
from .errors import InputError, TwinpatchError

RESEARCH_NOTE = ("research use only: not a diagnostic device; findings need expert review "
                 "and local clinical rules apply")


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error and exit code 2."""

    def error(self, message: str):  # noqa: D401 - argparse API
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _add(sub, name: str, help_: str, example: str):
    return sub.add_parser(name, help=help_, description=f"{help_}\n\nexample:\n  {example}",
                          formatter_class=argparse.RawDescriptionHelpFormatter)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="twinpatch", formatter_class=argparse.RawDescriptionHelpFormatter,
                     description="Train a site-specific patch encoder on healthy-control brain MRI (CPU only), "
                                 "export it, and turn volumes into per-voxel embedding maps.",
                     epilog=RESEARCH_NOTE)
    parser.add_argument("--version", action="version", version=f"twinpatch {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    p = _add(sub, "synth", "write a synthetic two-contrast cohort (controls + cases with subtle lesions)",
             "twinpatch synth demo_data --controls 20 --cases 4 --seed 0 --voxel-size 2")
    p.add_argument("out_dir", metavar="OUT_DIR", type=Path)
    p.add_argument("--controls", type=int, default=20, help="number of healthy controls (default 20)")
    p.add_argument("--cases", type=int, default=4, help="number of cases with one lesion each (default 4)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--voxel-size", type=float, default=2.0, metavar="MM", help="isotropic voxel size in mm (default 2)")

    p = _add(sub, "prepare", "validate, normalise and quality-control a cohort into a cache that training reads",
             "twinpatch prepare --manifest demo_data/manifest.csv --out cache/demo\n  twinpatch prepare --bids "
             "derivatives/ --space MNI152NLin2009cAsym --contrasts T1w,FLAIR --out cache/site --exclude-flagged")
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--manifest", metavar="CSV", type=Path, help="a manifest.csv (see README)")
    src.add_argument("--bids", metavar="DIR", type=Path, help="a BIDS derivatives folder of template-space images")
    p.add_argument("--space", help="with --bids: the space-<label> entity of the images")
    p.add_argument("--contrasts", help="with --bids: image suffixes, comma-separated, e.g. T1w,FLAIR")
    p.add_argument("--session", help="with --bids: the ses-<label> to use when subjects have several")
    p.add_argument("--participants", type=Path, help="with --bids: participants.tsv (default: ROOT/participants.tsv)")
    p.add_argument("--group-column", default="group", help="with --bids: participants.tsv column of the role "
                   "(default group)")
    p.add_argument("--control-values", default="control", help="with --bids: values meaning control (comma-separated)")
    p.add_argument("--case-values", default="case,patient", help="with --bids: values meaning case (comma-separated)")
    p.add_argument("--out", metavar="CACHE_DIR", type=Path, required=True)
    p.add_argument("--normalisation", choices=("zscore", "histogram"), default="zscore",
                   help="z-score inside the mask (default) or piecewise-linear histogram standardisation")
    p.add_argument("--jobs", type=int, default=1, help="parallel decoding threads (default 1)")
    p.add_argument("--exclude-flagged", action="store_true", help="leave out the controls that quality control flags")
    p.add_argument("--qc-threshold", type=float, default=3.5, help="flag below this robust z-score (default 3.5)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")

    p = _add(sub, "qc", "quality control of a prepared cohort: similarity to the cohort, outliers, montage",
             "twinpatch qc cache/demo")
    p.add_argument("cache", metavar="CACHE_DIR", type=Path)
    p.add_argument("--threshold", type=float, default=3.5, help="flag below this robust z-score (default 3.5)")
    p.add_argument("--no-montage", action="store_true", help="skip the PNG montage")
    p.add_argument("--quiet", action="store_true", help="no progress bars")

    p = _add(sub, "train", "train an encoder on a cohort's controls, export it, embed one example case",
             "twinpatch train configs/demo.toml --out runs/demo --set train.steps=500\n"
             "  twinpatch train --resume runs/demo            # continue after a crash or Ctrl-C\n"
             "  twinpatch train configs/demo.toml --cohort site_b/manifest.csv --init shared.safetensors --out runs/b\n"
             "  torchrun --nproc_per_node 2 -m embed.cli train configs/demo.toml --out runs/ddp   # data parallel")
    p.add_argument("config", metavar="CONFIG", nargs="?", type=Path,
                   help="TOML configuration (default: the built-in demo configuration, as configs/demo.toml)")
    p.add_argument("--cohort", metavar="MANIFEST", help="manifest.csv to train on (same as --set cohort.manifest=...)")
    p.add_argument("--out", metavar="RUN_DIR", type=Path, help="run directory (default runs/<config name>, or runs/demo)")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help="override a configuration key, e.g. --set train.steps=200 (repeatable)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing run in RUN_DIR")
    p.add_argument("--resume", metavar="RUN_DIR", type=Path,
                   help="continue an interrupted run from its last checkpoint, with its own config.toml")
    p.add_argument("--init", metavar="BUNDLE", type=Path,
                   help="start the encoder from an exported bundle (same contrasts, patch and architecture), "
                        "e.g. to fine-tune a shared encoder on this site's controls (same as --set train.init=...)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")

    p = _add(sub, "export", "bundle a finished run's encoder as one .safetensors file",
             "twinpatch export runs/demo --out site_encoder.safetensors")
    p.add_argument("run_dir", metavar="RUN_DIR", type=Path)
    p.add_argument("--out", metavar="FILE", type=Path, help="bundle path (default RUN_DIR/encoder.safetensors)")
    p.add_argument("--onnx", action="store_true", help="also write FILE with .onnx in place of .safetensors "
                   "(needs the onnx package)")

    p = _add(sub, "inspect", "show an encoder bundle's card in human form and check its weights checksum",
             "twinpatch inspect runs/demo/encoder.safetensors")
    p.add_argument("bundle", metavar="BUNDLE", type=Path)
    p.add_argument("--json", action="store_true", help="print the whole card as JSON")

    p = _add(sub, "embed", "turn images on the template grid into embedding maps, or a cohort into an embedding store",
             "twinpatch embed runs/demo/encoder.safetensors --image T1w=t1.nii.gz "
             "--out emb.nii.gz   # one --image per contrast the encoder reads (see inspect)\n  twinpatch embed runs/demo/encoder.safetensors --manifest demo_data/manifest.csv "
             "--out store/ --shard 1/4\n  twinpatch embed runs/demo/encoder.safetensors --manifest "
             "demo_data/manifest.csv --maps --out maps/")
    p.add_argument("bundle", metavar="BUNDLE", type=Path)
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--image", metavar="NAME=PATH", action="append", help="one contrast of one subject (repeat per contrast)")
    src.add_argument("--manifest", metavar="CSV", type=Path, help="embed every subject of a manifest into OUT (a folder)")
    p.add_argument("--mask", metavar="PATH", type=Path, help="with --image: the subject's brain mask (default: derived, "
                   "see README); with --manifest: the store's voxels (default: inside at least half the controls' masks)")
    p.add_argument("--out", metavar="PATH", type=Path, required=True,
                   help="with --image: output .nii.gz; with --manifest: the store folder (or maps folder with --maps)")
    p.add_argument("--maps", action="store_true", help="with --manifest: one 4D NIfTI map per subject, not a store")
    p.add_argument("--shard", metavar="I/N", help="with --manifest: embed every N-th subject from the I-th (1-based), "
                   "for job arrays; the run that finishes the last subject merges the store")
    p.add_argument("--float16", action="store_true", help="store embeddings as float16 (half the disk; rounding error "
                   "recorded per subject)")
    p.add_argument("--precision", choices=("fp32", "bf16"), default="fp32",
                   help="compute precision (bf16: faster on CPUs with bf16 support, error ~1e-2 relative)")
    p.add_argument("--allow-grid-mismatch", action="store_true",
                   help="embed images whose grid differs from the encoder's (the differences go into the sidecar)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")

    p = _add(sub, "score", "per-voxel novelty scoring: fit on a store's controls, apply to a case (research use only)",
             "twinpatch score fit store/ --out scorer/ --scorer ocsvm --nu 0.5\n  twinpatch score apply scorer/ "
             "--image T1w=t1.nii.gz --image FLAIR=flair.nii.gz --out case01/")
    score = p.add_subparsers(dest="score_command", metavar="fit|apply", parser_class=_Parser)
    score.required = True
    f = _add(score, "fit", "fit a scorer's leave-one-out standardisation on the controls of an embedding store "
             "(or of a manifest, embedded first with a bundle)",
             "twinpatch score fit store/ --out scorer/\n  twinpatch score fit encoder.safetensors --controls "
             "demo_data/manifest.csv --out scorer/")
    f.add_argument("source", metavar="STORE_OR_BUNDLE", type=Path)
    f.add_argument("--controls", metavar="MANIFEST", type=Path, help="with a bundle: the manifest to embed first "
                   "(into OUT/store); its controls fit the scorer")
    f.add_argument("--out", metavar="SCORER_DIR", type=Path, required=True)
    f.add_argument("--scorer", choices=("ocsvm", "gaussian", "knn"), default="ocsvm",
                   help="one-class SVM (default), Gaussian (Ledoit-Wolf), or k nearest controls")
    f.add_argument("--nu", type=float, default=0.5, help="ocsvm: nu (default 0.5)")
    f.add_argument("--gamma", default="scale", help="ocsvm: 'scale' (default), 'median' or a number")
    f.add_argument("--k", type=int, default=5, help="knn: neighbours (default 5)")
    f.add_argument("--jobs", type=int, default=None, help="ocsvm: threads over voxels (default: all cores)")
    f.add_argument("--quiet", action="store_true", help="no progress bars")
    a = _add(score, "apply", "score one case: standardised score map, ranked clusters, figures",
             "twinpatch score apply scorer/ --image T1w=t1.nii.gz --image FLAIR=flair.nii.gz --out case01/ "
             "--top-fraction 0.01")
    a.add_argument("scorer_dir", metavar="SCORER_DIR", type=Path)
    a.add_argument("--image", metavar="NAME=PATH", action="append", required=True, help="one contrast (repeat)")
    a.add_argument("--mask", metavar="PATH", type=Path, help="the case's brain mask (default: derived)")
    a.add_argument("--out", metavar="DIR", type=Path, required=True)
    cut = a.add_mutually_exclusive_group()
    cut.add_argument("--threshold", type=float, metavar="Z", help="keep voxels with standardised score >= Z")
    cut.add_argument("--top-fraction", type=float, metavar="F", help="keep the top F of the voxels (default 0.01)")
    a.add_argument("--connectivity", type=int, choices=(6, 18, 26), default=26)
    a.add_argument("--min-size-mm3", type=float, default=0.0, help="drop smaller clusters (default 0)")
    a.add_argument("--top-k", type=int, default=15, help="clusters kept in the table (default 15)")
    a.add_argument("--name", default="case", help="subject name for titles and the summary")
    a.add_argument("--allow-grid-mismatch", action="store_true")
    a.add_argument("--quiet", action="store_true", help="no progress bars")
    cli_eval.add_commands(sub, _add)
    return parser


def _parse_images(items: list[str]) -> dict[str, Path]:
    images: dict[str, Path] = {}
    for item in items:
        name, sep, path = item.partition("=")
        if not sep or not name or not path:
            raise InputError(f"--image {item!r}: expected NAME=PATH, e.g. --image T1w=sub01_T1w.nii.gz")
        if name in images:
            raise InputError(f"--image: contrast {name!r} given twice")
        images[name] = Path(path)
    return images


def _cmd_synth(args) -> None:
    from .synth import make_cohort

    manifest = make_cohort(args.out_dir, n_controls=args.controls, n_cases=args.cases, seed=args.seed,
                           voxel_size=args.voxel_size)
    print(f"wrote synthetic cohort: {manifest}")


def _cmd_prepare(args) -> None:
    from .cache import prepare

    bids = None
    if args.bids is not None:
        if not args.space or not args.contrasts:
            raise InputError("--bids needs --space LABEL and --contrasts T1w,FLAIR (the image suffixes)")
        from .bids import BidsQuery

        split = lambda text: tuple(x.strip() for x in text.split(",") if x.strip())  # noqa: E731
        bids = BidsQuery(args.bids, args.space, split(args.contrasts), session=args.session,
                         participants=args.participants, group_column=args.group_column,
                         control_values=split(args.control_values), case_values=split(args.case_values))
    elif args.space or args.contrasts or args.session:
        raise InputError("--space, --contrasts and --session go with --bids")
    res = prepare(args.manifest, bids=bids, out=args.out, normalisation=args.normalisation, jobs=args.jobs,
                  exclude_flagged=args.exclude_flagged, qc_threshold=args.qc_threshold, progress=not args.quiet)
    print(f"cache {res.cache}: {res.reason}; {len(res.subjects)} subjects")
    if res.flagged:
        print(f"quality control flagged: {', '.join(res.flagged)} (see {res.cache}/qc.csv and qc.png)")
    if res.excluded:
        print(f"excluded: {', '.join(res.excluded)}")
    if res.skipped:
        print(f"skipped {len(res.skipped)} BIDS files or subjects (see {res.cache}/skipped.csv)")


def _cmd_qc(args) -> None:
    from .cache import qc_cache

    report = qc_cache(args.cache, threshold=args.threshold, write_montage=not args.no_montage,
                      progress=not args.quiet)
    n = len({r.subject for r in report.rows})
    flagged = ", ".join(report.flagged) or "none"
    print(f"{n} subjects checked; flagged (robust z < -{report.threshold:g}): {flagged}; wrote {args.cache}/qc.csv")


def _cmd_train(args) -> None:
    from .config import load_config, load_run_config
    from .jobs import train_job

    overrides = list(args.overrides)
    if args.resume is not None:
        given = [flag for flag, v in (("CONFIG", args.config), ("--cohort", args.cohort), ("--out", args.out),
                                      ("--set", overrides), ("--overwrite", args.overwrite), ("--init", args.init)) if v]
        if given:
            raise InputError(f"--resume {args.resume}: {given[0]} cannot be combined with --resume (the run continues "
                             "with its own config.toml); drop it, or start a new run with --out")
        if not (args.resume / "config.toml").is_file():
            raise InputError(f"--resume {args.resume}: config.toml is missing, so this is not a twinpatch run; "
                             "pass the RUN_DIR of a run started with `twinpatch train --out RUN_DIR`")
        cfg = load_run_config(args.resume / "config.toml")
        out = train_job(cfg, args.resume, progress=not args.quiet, resume=True)
    else:
        if args.cohort:
            overrides.append(f'cohort.manifest="{Path(args.cohort).as_posix()}"')
        if args.init:
            overrides.append(f'train.init="{Path(args.init).as_posix()}"')
        cfg = load_config(args.config, overrides)
        demo = args.config is None and args.out is None
        run_dir = args.out or Path("runs") / (args.config.stem if args.config else "demo")
        out = train_job(cfg, run_dir, overwrite=args.overwrite or demo, progress=not args.quiet)
    if out["bundle"] is None:  # a non-zero rank under torchrun: rank 0 reports
        return
    r = out["result"]
    v = r.final
    print(f"\ndone in {out['seconds']:.0f} s ({r.pairs_per_second:.0f} training pairs/s)")
    print(f"  run directory   {out['run_dir']}")
    print(f"  encoder bundle  {out['bundle']}")
    if out["map"] is not None:
        print(f"  embedding map   {out['map']}  (4D NIfTI: X, Y, Z, {cfg.model.dim})")
    print(f"  metrics         {out['metrics']}")
    print(f"  TensorBoard     tensorboard --logdir {out['tensorboard']}")
    print(f"validation: reconstruction {v['reconstruction']:.4f}; centred cosine co-located "
          f"{v['cos_colocated']:.3f} vs random {v['cos_random']:.3f}; effective rank {v['effective_rank']:.1f} "
          f"of {cfg.model.dim}; co-location retrieval {v.get('retrieval', float('nan')):.2f}")
    if r.stopped_early:
        print(f"stopped early after {r.steps} of {cfg.train.steps} steps (train.early_stop={cfg.train.early_stop})")
    print(RESEARCH_NOTE)


def _cmd_export(args) -> None:
    from .bundle import export_onnx, load_encoder
    from .jobs import export_run

    bundle = export_run(args.run_dir, args.out)
    print(f"wrote {bundle}")
    if args.onnx:
        print(f"wrote {export_onnx(load_encoder(bundle), bundle.with_suffix('.onnx'))}")


def _cmd_inspect(args) -> None:
    import json

    from .bundle import describe, verify

    card, ok = verify(args.bundle)
    print(json.dumps(card, indent=2, sort_keys=True) if args.json else f"{args.bundle}\n{describe(card, ok)}")
    if not ok:
        raise InputError(f"{args.bundle}: weights checksum mismatch: the file was altered or damaged; re-export it")


def _parse_shard(text: str | None) -> tuple[int, int]:
    if text is None:
        return 1, 1
    index, sep, count = text.partition("/")
    if not sep or not index.isdigit() or not count.isdigit() or not 1 <= int(index) <= int(count):
        raise InputError(f"--shard {text!r}: expected I/N with 1 <= I <= N, e.g. --shard 2/8")
    return int(index), int(count)


def _cmd_embed(args) -> None:
    from .jobs import embed_maps, embed_store, embed_subject

    progress = not args.quiet
    if args.image and (args.maps or args.shard or args.float16):
        raise InputError("--maps, --shard and --float16 go with --manifest, not --image")
    if args.manifest and args.maps:
        if args.shard or args.float16 or args.mask:
            raise InputError("--shard, --float16 and --mask apply to a store; with --maps give masks in the manifest")
        written = embed_maps(args.bundle, args.manifest, args.out, progress=progress, precision=args.precision,
                             allow_grid_mismatch=args.allow_grid_mismatch)
        print(f"wrote {len(written)} embedding maps into {args.out}")
    elif args.manifest:
        res = embed_store(args.bundle, args.manifest, args.out, shard=_parse_shard(args.shard),
                          dtype="float16" if args.float16 else "float32", mask=args.mask, precision=args.precision,
                          allow_grid_mismatch=args.allow_grid_mismatch, progress=progress)
        state = "merged" if res["merged"] else f"{len(res['remaining'])} subjects still to embed (other shards)"
        print(f"store {res['store']}: {res['embedded']} subjects embedded, {res['skipped']} already done, "
              f"{res['n_voxels']} voxels; {state}")
    else:
        if not str(args.out).endswith((".nii", ".nii.gz")):
            raise InputError(f"--out {args.out}: with --image the output is one NIfTI file; end it in .nii.gz")
        out = embed_subject(args.bundle, _parse_images(args.image), args.out, mask=args.mask, progress=progress,
                            precision=args.precision, allow_grid_mismatch=args.allow_grid_mismatch)
        print(f"wrote {out}")
    print(RESEARCH_NOTE)


def _cmd_score(args) -> None:
    from .scoring import score_apply, score_fit

    progress = not args.quiet
    if args.score_command == "fit":
        if args.jobs is not None and args.jobs < 1:
            raise InputError(f"--jobs {args.jobs}: expected a whole number >= 1")
        params = {"ocsvm": {"nu": args.nu, "gamma": _gamma(args.gamma), "n_jobs": args.jobs}, "gaussian": {},
                  "knn": {"k": args.k}}
        store, bundle = args.source, None
        if args.source.suffix == ".safetensors":
            if args.controls is None:
                raise InputError(f"{args.source} is a bundle: pass --controls MANIFEST to embed the controls first")
            from .jobs import embed_store

            bundle, store = args.source, args.out / "store"
            embed_store(bundle, args.controls, store, progress=progress)
        elif args.controls is not None:
            raise InputError("--controls goes with a bundle; a store already holds its controls")
        out = score_fit(store, args.out, scorer=args.scorer, params=params[args.scorer], bundle=bundle,
                        progress=progress)
        print(f"wrote scorer {out} ({args.scorer}) from store {store}")
    else:
        summary = score_apply(args.scorer_dir, _parse_images(args.image), args.out, mask=args.mask,
                              value=args.threshold, top_fraction=args.top_fraction, connectivity=args.connectivity,
                              min_size_mm3=args.min_size_mm3, top_k=args.top_k, name=args.name,
                              allow_grid_mismatch=args.allow_grid_mismatch, progress=progress)
        print(f"{summary['n_clusters']} clusters; wrote {args.out}/score.nii.gz, clusters.nii.gz, clusters.csv, "
              f"{len(summary['figures'])} figures")
    print(RESEARCH_NOTE)


def _gamma(text: str):
    if text in ("scale", "median"):
        return text
    try:
        return float(text)
    except ValueError:
        raise InputError(f"--gamma {text!r}: use 'scale', 'median' or a positive number") from None


COMMANDS = {"synth": _cmd_synth, "prepare": _cmd_prepare, "qc": _cmd_qc, "train": _cmd_train, "export": _cmd_export, "inspect": _cmd_inspect,
            "embed": _cmd_embed, "score": _cmd_score, **cli_eval.COMMANDS}


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        COMMANDS[args.command](args)
    except TwinpatchError as exc:
        print(f"twinpatch {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:  # unwritable output, full disk, ...: the OS message names the file
        print(f"twinpatch {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"\ntwinpatch {args.command}: interrupted (the last checkpoint is kept)", file=sys.stderr)
        return 130
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

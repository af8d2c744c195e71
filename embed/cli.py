"""The ``twinpatch`` command. Thin: parse arguments, call :mod:`embed.jobs`, print where things are.

Exit codes: 0 success; 2 bad input (one line on stderr naming the file or key, what was found and
the fix; no traceback); 130 interrupted with Ctrl-C.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from . import __version__
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

    p = _add(sub, "train", "train an encoder on a cohort's controls, export it, embed one example case",
             "twinpatch train configs/demo.toml --out runs/demo --set train.steps=500")
    p.add_argument("config", metavar="CONFIG", nargs="?", type=Path,
                   help="TOML configuration (default: the built-in demo configuration, as configs/demo.toml)")
    p.add_argument("--cohort", metavar="MANIFEST", help="manifest.csv to train on (same as --set cohort.manifest=...)")
    p.add_argument("--out", metavar="RUN_DIR", type=Path, help="run directory (default runs/<config name>, or runs/demo)")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help="override a configuration key, e.g. --set train.steps=200 (repeatable)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing run in RUN_DIR")
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
             "twinpatch embed runs/demo/encoder.safetensors --image T1w=t1.nii.gz --image FLAIR=flair.nii.gz "
             "--out emb.nii.gz\n  twinpatch embed runs/demo/encoder.safetensors --manifest demo_data/manifest.csv "
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


def _cmd_train(args) -> None:
    from .config import load_config
    from .jobs import train_job

    overrides = list(args.overrides)
    if args.cohort:
        overrides.append(f'cohort.manifest="{Path(args.cohort).as_posix()}"')
    cfg = load_config(args.config, overrides)
    demo = args.config is None and args.out is None
    run_dir = args.out or Path("runs") / (args.config.stem if args.config else "demo")
    out = train_job(cfg, run_dir, overwrite=args.overwrite or demo, progress=not args.quiet)
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
          f"of {cfg.model.dim}")
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


COMMANDS = {"synth": _cmd_synth, "train": _cmd_train, "export": _cmd_export, "inspect": _cmd_inspect,
            "embed": _cmd_embed}


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

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

    p = _add(sub, "embed", "turn images on the template grid into 4D embedding maps (X, Y, Z, D)",
             "twinpatch embed runs/demo/encoder.safetensors --image T1w=t1.nii.gz --image FLAIR=flair.nii.gz "
             "--out emb.nii.gz\n  twinpatch embed runs/demo/encoder.safetensors --manifest demo_data/manifest.csv "
             "--out maps/")
    p.add_argument("bundle", metavar="BUNDLE", type=Path)
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--image", metavar="NAME=PATH", action="append", help="one contrast of one subject (repeat per contrast)")
    src.add_argument("--manifest", metavar="CSV", type=Path, help="embed every subject of a manifest into OUT (a folder)")
    p.add_argument("--mask", metavar="PATH", type=Path, help="brain mask for --image (default: derived, see README)")
    p.add_argument("--out", metavar="PATH", type=Path, required=True, help="output .nii.gz (with --image) or folder")
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
    from .jobs import export_run

    print(f"wrote {export_run(args.run_dir, args.out)}")


def _cmd_embed(args) -> None:
    from .jobs import embed_manifest, embed_subject

    if args.manifest:
        if args.mask:
            raise InputError("--mask applies to --image only; with --manifest give masks in its `mask` column")
        written = embed_manifest(args.bundle, args.manifest, args.out, progress=not args.quiet)
        print(f"wrote {len(written)} embedding maps into {args.out}")
    else:
        if not str(args.out).endswith((".nii", ".nii.gz")):
            raise InputError(f"--out {args.out}: with --image the output is one NIfTI file; end it in .nii.gz")
        out = embed_subject(args.bundle, _parse_images(args.image), args.out, mask=args.mask, progress=not args.quiet)
        print(f"wrote {out}")
    print(RESEARCH_NOTE)


COMMANDS = {"synth": _cmd_synth, "train": _cmd_train, "export": _cmd_export, "embed": _cmd_embed}


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

"""Embedding a whole 1 mm two-contrast volume: dense path vs per-patch path, in one run.

    python benchmarks/embed_speed.py [--patch 15] [--dims 2|3] [--sample 200000] [--dim 32] [--repeat 3]

The volume is one synthetic subject (T1w-like and FLAIR-like) built from the MNI152 2009 1 mm
templates that nilearn ships (grid 197 x 233 x 189, about 1.9 million brain voxels), z-scored in
its mask; the encoder has the demo architecture (channels [32, 64], dim 32) with random weights
(speed does not depend on the weights) and a 15-voxel patch: the demo's 14 mm patch (7 voxels of
2 mm) is 15 voxels on a 1 mm grid (``--patch 7`` measures the demo grid's voxel count); axial
squares by default, cubes with ``--dims 3``. Printed:

- dense path (``Encoder.embed_masked``: whole slices, only mask voxels kept) in fp32 and bf16,
  voxels/s and seconds per volume;
- per-patch path (gather each voxel's patch, batch, encode) on a random sample of the same mask
  voxels, voxels/s; the ratio dense / per-patch;
- the largest difference between the two paths on the sample (fp32), and the bf16 error;
- peak RSS of embedding the mask voxels only vs the full-grid map, each in a fresh process.

Other processes on the machine make absolute numbers noisy (PyTorch's OpenMP threads slow down
many-fold when another process takes a core): each path is timed ``--repeat`` times and the median
printed; the ratios come from one run.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def make_volume():
    from embed.cohort import normalise
    from embed.synth import load_template, make_subject

    template = load_template(1)
    subject = make_subject(template, np.random.default_rng([7, 0, 0]))
    mask = subject.mask.astype(bool)
    vol = np.stack([normalise(subject.images[c].astype(np.float32), mask)[0] for c in ("T1w", "FLAIR")])
    return vol, mask


def make_encoder(dim: int, patch: int = 7, dims: int = 2):
    from embed.dense import Encoder
    from embed.model import build

    module = build(2, patch, (32, 64), dim, 0, dims).encoder
    card_patch = ({"axis": 2, "plane": "axial", "size": patch, "dims": 2} if dims == 2
                  else {"axis": None, "size": patch, "dims": 3})
    return Encoder(module, {"contrasts": ["T1w", "FLAIR"], "patch": card_patch})


def vm_hwm_mb() -> float:
    """Peak resident set size of this process so far, in MB (Linux ``/proc/self/status``, VmHWM)."""
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError("no VmHWM in /proc/self/status")


def peak_rss_child(saved: str, mode: str, dim: int, patch: int, dims: int) -> tuple[float, float]:
    """Peak RSS (MB) of a fresh process that loads the saved volume and embeds it (``masked`` or ``full``).

    Returns (peak after loading the volume and the encoder, peak after embedding).
    """
    # VmHWM (peak resident set of this process image, Linux /proc) rather than ru_maxrss, which a
    # child started by fork + exec inherits from the parent's peak.
    code = (f"import numpy as np, sys; sys.path.insert(0, {str(Path(__file__).parents[1])!r}); "
            f"from benchmarks.embed_speed import make_encoder, vm_hwm_mb; d = np.load({saved!r}); "
            f"vol, mask = d['vol'], d['mask']; enc = make_encoder({dim}, {patch}, {dims}); "
            f"enc.embed_masked(vol[:, :, :, 90:94], mask[:, :, 90:94]); base = vm_hwm_mb(); "
            f"enc.{'embed_masked' if mode == 'masked' else 'embed_volume'}(vol, mask); "
            f"print(base, vm_hwm_mb())")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    before, after = map(float, out.stdout.split()[-2:])
    return before, after


def main() -> None:
    import torch

    from embed.pairs import gather_patches

    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sample", type=int, default=200_000, help="voxels for the per-patch path")
    ap.add_argument("--dim", type=int, default=32, help="embedding size")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per path; the median is printed")
    ap.add_argument("--dims", type=int, choices=(2, 3), default=2, help="2 = axial squares, 3 = cubes")
    ap.add_argument("--patch", type=int, default=15, help="patch side in voxels (default 15: the demo's 14 mm patch at 1 mm; the demo grid's 7)")
    args = ap.parse_args()

    t0 = time.perf_counter()
    vol, mask = make_volume()
    enc = make_encoder(args.dim, args.patch, args.dims)
    n_vox = int(mask.sum())
    print(f"volume {vol.shape} ({n_vox} mask voxels) built in {time.perf_counter() - t0:.1f} s; "
          f"{torch.get_num_threads()} threads; patch {args.patch} ({args.dims}D), channels [32, 64], dim {args.dim}")

    enc.embed_masked(vol[:, :, :, 90:94], mask[:, :, 90:94])  # warm-up (one-off allocator and kernel setup)
    times, results = {}, {}
    for precision in ("fp32", "bf16"):
        runs = []
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            results[precision] = enc.embed_masked(vol, mask, precision=precision)
            runs.append(time.perf_counter() - t0)
        times[precision] = float(np.median(runs))

    rng = np.random.default_rng(0)
    voxels = np.argwhere(mask)
    pick = np.sort(rng.choice(n_vox, size=min(args.sample, n_vox), replace=False))
    runs = []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        patches = gather_patches(vol[None], np.zeros(len(pick), np.int64), voxels[pick], args.patch,
                                 2 if args.dims == 2 else None)
        z = enc.embed_patches(patches, batch_size=4096)
        runs.append(time.perf_counter() - t0)
    t_patch = float(np.median(runs))

    rate_patch = len(pick) / t_patch
    print(f"per-patch path  fp32: {rate_patch:>10.0f} voxels/s  ({len(pick)} sampled voxels, {t_patch:.1f} s; "
          f"a whole volume would take {n_vox / rate_patch:.0f} s)")
    for precision in ("fp32", "bf16"):
        rate = n_vox / times[precision]
        print(f"dense path      {precision}: {rate:>10.0f} voxels/s  ({times[precision]:.1f} s per volume; "
              f"{rate / rate_patch:.1f}x the per-patch path)")
    diff = np.abs(results["fp32"][pick] - z).max()
    scale = np.abs(results["fp32"]).max()
    bf16_err = np.abs(results["bf16"] - results["fp32"])
    print(f"dense vs per-patch (fp32): max abs difference {diff:.2e}")
    print(f"bf16 vs fp32: max abs error {bf16_err.max():.2e}, mean {bf16_err.mean():.2e} "
          f"(largest |embedding| {scale:.2f}; relative {bf16_err.max() / scale:.2e})")
    with tempfile.TemporaryDirectory() as tmp:
        saved = str(Path(tmp) / "volume.npz")
        np.savez(saved, vol=vol, mask=mask)
        for mode in ("masked", "full"):
            before, after = peak_rss_child(saved, mode, args.dim, args.patch, args.dims)
            print(f"peak RSS, {mode:>6} output: {after:>6.0f} MB (volume and encoder loaded: {before:.0f} MB; "
                  f"embedding adds {after - before:.0f} MB)")


if __name__ == "__main__":
    main()

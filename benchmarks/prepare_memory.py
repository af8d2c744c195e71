"""Peak memory and speed of ``prepare`` on a 1 mm synthetic cohort: does memory grow with the cohort?

Generates DISTINCT synthetic subjects on the 1 mm MNI152 grid once (about 8 s and 1.3 GB of RAM
each, reused from --work on later runs), then builds manifests of N subjects for every N in
--subjects by repeating those files under new subject ids (subject k uses the files of distinct
subject k mod DISTINCT; every row is still decoded, checksummed and normalised on its own).
Each ``prepare`` runs in a fresh child process; its peak resident memory comes from
``os.wait4`` (Linux ``ru_maxrss``, KiB). As a reference, the in-RAM loader ``load_cohort`` runs on
the smallest N.

Figures depend on the machine and on whatever else runs on it (the CPU may be shared): compare the
ratios printed within one run. Timing includes QC and the montage. CPU/wall above 1 means the
decoding threads ran in parallel (gzip decoding, hashing and most numpy work release the GIL).

    python benchmarks/prepare_memory.py                      # 10 and 40 subjects, jobs 1 and 2
    python benchmarks/prepare_memory.py --subjects 4,8 --distinct 4 --jobs 1   # a quick run
"""

from __future__ import annotations

import argparse
import csv
import os
import pathlib
import shutil
import subprocess
import sys
import time

REPO = pathlib.Path(__file__).resolve().parent.parent


def child(code: str) -> tuple[float, float, float]:
    """Run ``code`` in a fresh Python; return (wall seconds, peak RSS in MiB, CPU seconds) of that child alone."""
    start = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-c", code], cwd=REPO)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise SystemExit(f"child failed with exit code {proc.returncode}: {code}")
    return wall, usage.ru_maxrss / 1024, usage.ru_utime + usage.ru_stime  # Linux reports ru_maxrss in KiB


def ensure_subjects(work: pathlib.Path, distinct: int) -> pathlib.Path:
    synth = work / f"synth{distinct}"
    manifest = synth / "manifest.csv"
    if not manifest.is_file():
        print(f"generating {distinct} synthetic subjects at 1 mm into {synth} (once; about 8 s each)", flush=True)
        wall, _, _ = child(f"from embed.synth import make_cohort; make_cohort({str(synth)!r}, n_controls={distinct}, "
                          f"n_cases=0, seed=0, voxel_size=1, progress=True)")
        print(f"  generated in {wall:.0f} s", flush=True)
    return manifest


def repeated_manifest(source: pathlib.Path, n: int, dest: pathlib.Path) -> pathlib.Path:
    with open(source, newline="") as f:
        rows = list(csv.DictReader(f))
    header = list(rows[0])
    with open(dest, "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=header, lineterminator="\n")
        w.writeheader()
        for k in range(n):
            row = dict(rows[k % len(rows)])
            row["subject"] = f"b{k + 1:03d}"
            for key in header:
                if key not in ("subject", "role") and row[key]:
                    row[key] = str((source.parent / row[key]).resolve())
            w.writerow(row)
    return dest


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--subjects", default="10,40", help="cohort sizes, comma-separated (default 10,40)")
    ap.add_argument("--distinct", type=int, default=10, help="distinct synthetic subjects to generate, >= 3 (default 10)")
    ap.add_argument("--jobs", default="1,2", help="decoding threads to compare, comma-separated (default 1,2)")
    ap.add_argument("--work", default="/tmp/twinpatch-prepare-bench", help="scratch folder (subjects are kept for reuse)")
    args = ap.parse_args()
    sizes = [int(v) for v in args.subjects.split(",")]
    jobs = [int(v) for v in args.jobs.split(",")]
    work = pathlib.Path(args.work)
    work.mkdir(parents=True, exist_ok=True)
    source = ensure_subjects(work, args.distinct)
    import nibabel as nib

    shape = nib.load(next((source.parent / "images").glob("*_T1w.nii.gz"))).shape
    print(f"grid {shape} (1 mm), 2 contrasts; {args.distinct} distinct subjects repeated under new ids")
    _, base, _ = child("import numpy, nibabel, embed.cache")
    print(f"python + numpy + nibabel + embed.cache imported: peak RSS {base:.0f} MiB")
    results = []
    for n in sizes:
        manifest = repeated_manifest(source, n, work / f"manifest{n}.csv")
        for j in jobs:
            out = work / f"cache{n}_j{j}"
            shutil.rmtree(out, ignore_errors=True)
            wall, rss, cpu = child(f"from embed.cache import prepare; prepare({str(manifest)!r}, out={str(out)!r}, jobs={j}, progress=False)")
            again, _, _ = child(f"from embed.cache import prepare; r = prepare({str(manifest)!r}, out={str(out)!r}, progress=False); assert not r.rebuilt")
            results.append((n, j, wall, rss, again))
            print(f"prepare  {n:3d} subjects  jobs {j}: peak RSS {rss:7.0f} MiB  wall {wall:6.1f} s  "
                  f"{2 * n / wall:5.2f} volumes/s  CPU/wall {cpu / wall:4.2f}  unchanged re-run {again:4.1f} s", flush=True)
            shutil.rmtree(out, ignore_errors=True)
    n0 = sizes[0]
    wall, rss_ram, _ = child(f"from embed.cohort import load_cohort; load_cohort({str(work / f'manifest{n0}.csv')!r}, progress=False)")
    print(f"load_cohort (in RAM) {n0} subjects: peak RSS {rss_ram:.0f} MiB  wall {wall:.1f} s")
    print("\nratios measured in this run:")
    by = {(n, j): (w, r) for n, j, w, r, _ in results}
    j0 = jobs[0]
    if len(sizes) > 1:
        lo, hi = sizes[0], sizes[-1]
        print(f"  peak RSS {hi} vs {lo} subjects (jobs {j0}): {by[hi, j0][1] / by[lo, j0][1]:.2f}x "
              f"for {hi / lo:.0f}x the subjects")
    print(f"  in-RAM load_cohort vs prepare, {n0} subjects: {rss_ram / by[n0, j0][1]:.1f}x the peak RSS")
    for n in sizes:
        for j in jobs[1:]:
            print(f"  {n} subjects: jobs {j} vs jobs {j0}: {by[n, j0][0] / by[n, j][0]:.2f}x faster")


if __name__ == "__main__":
    main()

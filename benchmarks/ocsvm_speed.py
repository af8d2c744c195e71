"""Per-voxel one-class SVM: VoxelOCSVM against a loop of scikit-learn's OneClassSVM, one run.

    python benchmarks/ocsvm_speed.py [--voxels 20000] [--sample 300] [--controls 60] [--dims 64]
                                     [--cases 8] [--nu 0.5] [--gamma scale] [--jobs N] [--rounds 3]

Same random data for both (float32 embeddings, per-voxel scale and offset, cases partly shifted;
controls voxel-major underneath, as the cohort embedding store hands them out).
Each round times, back to back, scikit-learn on a slice of the sample voxels (fit, then
``decision_function`` on the cases) and ``VoxelOCSVM`` on all voxels (fit, then ``score_many``);
the ratio uses the median per-voxel time of each, in wall-clock time and in CPU time (the CPU
ratio does not depend on how many cores are free). Compile time (numba) is excluded and printed.
Also prints the largest difference between the two sets of decision values on the sample voxels,
whether their signs agree, whether the solvers took the same number of iterations, the peak RSS
of the process and the load average before and after (other work on the machine slows both
sides, the threaded side more). Timings are wall-clock on a machine other people share: read
the ratio, measured in one run, not the absolute times.
"""

from __future__ import annotations

import os

# scikit-learn's libsvm takes its dot products from BLAS, on vectors of D = 64, where BLAS threads
# cannot help: with the other core idle, the reference took about 500 us per voxel with one BLAS
# thread and 850-900 us with two (measured once here; under load the two were alike). One thread
# is the faster, stricter reference. VoxelOCSVM does not use BLAS. Set before numpy loads BLAS.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import resource  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402


def make_data(rng: np.random.Generator, S: int, V: int, D: int, M: int):
    """controls (S, V, D) float32, voxel-major underneath (as blocks of the cohort embedding store
    are), and cases (M, V, D) float32."""
    scale = rng.uniform(0.5, 2.0, size=(V, 1, 1)).astype(np.float32)
    offset = rng.normal(size=(V, 1, D)).astype(np.float32)
    controls = rng.standard_normal((V, S, D), dtype=np.float32)
    controls *= scale
    controls += offset
    cases = rng.standard_normal((V, M, D), dtype=np.float32)
    cases *= scale
    cases += offset
    cases[: V // 4] += 1.5 * scale[: V // 4]  # a quarter of the voxels unusual in every case
    return controls.transpose(1, 0, 2), np.ascontiguousarray(cases.transpose(1, 0, 2))


def sklearn_loop(controls, cases, voxels, nu, gamma, n_iter=None):
    """Decision values (M, len(voxels)) from one scikit-learn OneClassSVM per voxel (and its
    solver's iteration counts into ``n_iter``, if given)."""
    from sklearn.svm import OneClassSVM

    out = np.empty((cases.shape[0], len(voxels)))
    for n, v in enumerate(voxels):
        model = OneClassSVM(kernel="rbf", nu=nu, gamma=gamma).fit(controls[:, v])
        out[:, n] = model.decision_function(cases[:, v])
        if n_iter is not None:
            n_iter[n] = np.ravel(model.n_iter_)[0]
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--voxels", type=int, default=20000)
    ap.add_argument("--sample", type=int, default=300)
    ap.add_argument("--controls", type=int, default=60)
    ap.add_argument("--dims", type=int, default=64)
    ap.add_argument("--cases", type=int, default=8)
    ap.add_argument("--nu", type=float, default=0.5)
    ap.add_argument("--gamma", default="scale", help="'scale' or a number (both sides use the same)")
    ap.add_argument("--jobs", type=int, default=None, help="threads for VoxelOCSVM (default: all cores)")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    gamma = args.gamma if args.gamma == "scale" else float(args.gamma)
    S, V, D, M = args.controls, args.voxels, args.dims, args.cases
    n_sample = min(args.sample, V)

    from embed.scorers import VoxelOCSVM

    rng = np.random.default_rng(args.seed)
    controls, cases = make_data(rng, S, V, D, M)
    sample = np.sort(rng.choice(V, size=n_sample, replace=False))
    print(f"data: {S} controls x {V} voxels x {D} dims (float32), {M} cases; sample of {n_sample} voxels; "
          f"threads: {args.jobs or os.cpu_count()} (BLAS: {os.environ['OPENBLAS_NUM_THREADS']}); "
          f"load average (1, 5, 15 min): {_load()}")
    rss_data = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB

    t0 = time.perf_counter()
    VoxelOCSVM(nu=args.nu, gamma=gamma, n_jobs=args.jobs).fit(controls[:, :4]).score_many(cases[:, :4])
    print(f"numba compile / cache load: {time.perf_counter() - t0:.1f} s (excluded)")

    # agreement on the sample voxels
    ref_iter = np.empty(n_sample, np.int64)
    ref = sklearn_loop(controls, cases, sample, args.nu, gamma, ref_iter)
    ours = VoxelOCSVM(nu=args.nu, gamma=gamma, n_jobs=args.jobs).fit(controls[:, sample])
    dec = ours.decision_function(cases[:, sample])
    print(f"agreement on {n_sample} voxels x {M} cases: max |ours - scikit-learn| = "
          f"{np.abs(dec - ref).max():.2e}, same sign everywhere: {bool((np.sign(dec) == np.sign(ref)).all())}, "
          f"same solver iterations on {int((ours.n_iter_ == ref_iter).sum())}/{n_sample} voxels "
          f"(mean {ref_iter.mean():.1f})")

    chunks = np.array_split(sample, args.rounds)
    wall = {"sk": [], "ours": [], "ours_sample": []}
    cpu = {"sk": [], "ours": []}
    for r in range(args.rounds):
        t0, c0 = time.perf_counter(), time.process_time()
        sklearn_loop(controls, cases, chunks[r], args.nu, gamma)
        wall["sk"].append((time.perf_counter() - t0) / len(chunks[r]))
        cpu["sk"].append((time.process_time() - c0) / len(chunks[r]))
        t0 = time.perf_counter()
        VoxelOCSVM(nu=args.nu, gamma=gamma, n_jobs=args.jobs).fit(controls[:, sample]).score_many(cases[:, sample])
        wall["ours_sample"].append((time.perf_counter() - t0) / n_sample)
        t0, c0 = time.perf_counter(), time.process_time()
        VoxelOCSVM(nu=args.nu, gamma=gamma, n_jobs=args.jobs).fit(controls).score_many(cases)
        wall["ours"].append((time.perf_counter() - t0) / V)
        cpu["ours"].append((time.process_time() - c0) / V)
        print(f"round {r + 1}: scikit-learn {wall['sk'][-1] * 1e6:7.1f} us/voxel | VoxelOCSVM "
              f"{wall['ours_sample'][-1] * 1e6:6.1f} us/voxel on the sample, {wall['ours'][-1] * 1e6:6.1f} us/voxel "
              f"on {V} voxels (fit + score {M} cases; wall clock)")
    sk, us, us_sample = (np.median(wall[k]) for k in ("sk", "ours", "ours_sample"))
    sk_cpu, us_cpu = np.median(cpu["sk"]), np.median(cpu["ours"])
    print(f"median per voxel, wall clock: scikit-learn {sk * 1e6:.1f} us, VoxelOCSVM {us * 1e6:.1f} us "
          f"({us_sample * 1e6:.1f} us on the {n_sample} sample voxels)")
    print(f"median per voxel, CPU time (all threads): scikit-learn {sk_cpu * 1e6:.1f} us, VoxelOCSVM {us_cpu * 1e6:.1f} us")
    print(f"speed ratio, wall clock (scikit-learn / VoxelOCSVM, all voxels): {sk / us:.0f}x; on the sample voxels: "
          f"{sk / us_sample:.0f}x  (target >= 50x)")
    print(f"work ratio, CPU time (same comparison, independent of free cores): {sk_cpu / us_cpu:.0f}x")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB
    print(f"peak RSS: {peak:.0f} MiB (after making the data: {rss_data:.0f} MiB; input arrays: "
          f"{(controls.nbytes + cases.nbytes) / 2**20:.0f} MiB)")
    print(f"load average (1, 5, 15 min) at the end: {_load()}")


def _load() -> str:
    return ", ".join(f"{x:.2f}" for x in os.getloadavg())


if __name__ == "__main__":
    main()

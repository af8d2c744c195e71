"""The cohort cache: prepare once (validate, normalise, quality-control), then read from disk.

``prepare(manifest=... | bids=BidsQuery(...), out=CACHE_DIR)`` writes into CACHE_DIR:

- ``data.f32``: normalised intensities, little-endian float32, C order, shape (S, C, X, Y, Z);
- ``masks.u8``: subject masks, uint8 0/1, shape (S, X, Y, Z);
- ``lesions.u8``: lesion masks of the subjects that have one, uint8 0/1, (L, X, Y, Z) (only if L > 0);
- ``mask.nii.gz``: the cohort mask (voxels in at least half of the control masks) as NIfTI, with
  the header of the cohort grid's reference image (sform/qform codes kept);
- ``qc.csv`` and ``qc.png``: quality control (see :mod:`embed.qc`); ``skipped.csv`` (BIDS input):
  what discovery left out and why;
- ``cohort.json``: the description (grid, affine, orientation, voxel size, contrasts, subjects and
  roles, per-subject normalisation statistics, the normalisation parameters, QC flags and
  exclusions, the size, modification time and SHA-256 of every source file, the settings and the
  twinpatch version). It is written last, so its presence marks a complete cache.

Every file is written under a temporary name and renamed; an old ``cohort.json`` is removed before
the arrays are replaced. When the checks find problems, nothing is replaced: ``problems.csv``
lists them all and one :class:`CohortError` summarises them. Re-running on an unchanged cohort with
the same settings does nothing (sizes and modification times compared, SHA-256 confirming any file
whose time changed); any changed file rebuilds the whole cache (landmarks, cohort mask and QC
depend on every control).

Memory: images are decoded one subject per worker and written straight to disk with ``pwrite``
(no memory map while preparing), so peak memory is about ``jobs`` subjects, whatever their number.
``load_cache`` then memory-maps the arrays read-only for training.
"""

from __future__ import annotations

import concurrent.futures
import datetime
import json
import os
import pathlib
from dataclasses import asdict, dataclass

import nibabel as nib
import numpy as np
from tqdm import tqdm

from . import __version__
from . import normalise as _norm
from . import qc as _qc
from .bids import skipped_csv
from .checks import file_record, pread_array, problems_csv, pwrite_array, scan_subject, summary, survey
from .cohort import Cohort, Problem, cohort_mask, read_manifest
from .errors import CohortError, ConfigError, InputError

FORMAT_VERSION = 1
DESCRIPTION, DATA, MASKS, LESIONS, MASK_NII = "cohort.json", "data.f32", "masks.u8", "lesions.u8", "mask.nii.gz"
PROBLEMS, SKIPPED, QC_CSV, QC_PNG = "problems.csv", "skipped.csv", "qc.csv", "qc.png"


@dataclass(frozen=True)
class Prepared:
    """What prepare did. rebuilt: False when the cache was already up to date; reason: why it was
    (not) built, e.g. "built: no complete cache yet", "built: settings changed (normalisation)";
    flagged: subjects QC flagged; excluded: flagged controls left out (``exclude_flagged``);
    skipped: BIDS files/subjects discovery left out, as dicts {"subject", "path", "reason"}."""

    cache: pathlib.Path
    rebuilt: bool
    reason: str
    subjects: tuple[str, ...]
    flagged: tuple[str, ...]
    excluded: tuple[str, ...]
    skipped: tuple[dict, ...]


def _tmp(path: pathlib.Path) -> pathlib.Path:
    return path.with_name(f".{path.name}.partial-{os.getpid()}")


def _write_text(path: pathlib.Path, text: str) -> None:
    tmp = _tmp(path)
    try:
        tmp.write_text(text, encoding="utf-8", newline="\n")
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def read_description(cache_dir) -> dict:
    """The parsed ``cohort.json`` of a complete cache (CohortError otherwise)."""
    cache_dir = pathlib.Path(cache_dir)
    path = cache_dir / DESCRIPTION
    if not path.is_file():
        raise CohortError(f"{cache_dir} is not a complete cohort cache ({DESCRIPTION} is missing); "
                          f"run twinpatch prepare --out {cache_dir} first")
    try:
        desc = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise CohortError(f"{path}: not valid JSON ({e}); run twinpatch prepare again to rebuild the cache") from None
    if not isinstance(desc, dict) or desc.get("format_version") != FORMAT_VERSION:
        found = desc.get("format_version") if isinstance(desc, dict) else None
        raise CohortError(f"{path}: cache format version {found!r}, this twinpatch reads version {FORMAT_VERSION}; "
                          "run twinpatch prepare again to rebuild the cache")
    return desc


def _array(cache_dir: pathlib.Path, spec: dict, dtype) -> np.memmap:
    path = cache_dir / spec["file"]
    shape = tuple(spec["shape"])
    want = int(np.prod(shape)) * np.dtype(dtype).itemsize
    if not path.is_file() or path.stat().st_size != want:
        found = path.stat().st_size if path.is_file() else "no file"
        raise CohortError(f"{path}: expected {want} bytes for shape {shape}, found {found}; "
                          "the cache is damaged: run twinpatch prepare again")
    return np.memmap(path, dtype=dtype, mode="r", shape=shape)


def load_cache(cache_dir) -> Cohort:
    """Open a prepared cache as a :class:`Cohort` whose ``data`` (S, C, X, Y, Z) float32 and ``masks``
    (S, X, Y, Z) bool are read-only ``np.memmap`` arrays (patches are read from disk on demand)."""
    cache_dir = pathlib.Path(cache_dir).expanduser().resolve()
    desc = read_description(cache_dir)
    arrays = desc["arrays"]
    data = _array(cache_dir, arrays["data"], "<f4")
    masks = _array(cache_dir, arrays["masks"], np.bool_)
    lesions = {}
    if arrays.get("lesions"):
        stack = _array(cache_dir, arrays["lesions"], np.bool_)
        lesions = {name: stack[k] for k, name in enumerate(arrays["lesions"]["subjects"])}
    img = nib.load(cache_dir / MASK_NII)
    mask = np.asarray(img.dataobj) != 0
    subjects = desc["subjects"]
    params = desc["normalisation"]
    stats = {s["subject"]: {c: dict(s["stats"][c], **({"landmarks": s["landmarks"][c]} if params["method"] == "histogram" else {}))
                            for c in desc["contrasts"]} for s in subjects}
    grid = desc["grid"]
    return Cohort(
        subjects=tuple(s["subject"] for s in subjects), roles=tuple(s["role"] for s in subjects),
        contrasts=tuple(desc["contrasts"]), data=data, masks=masks, mask=mask, lesions=lesions,
        affine=np.asarray(grid["affine"], dtype=np.float64), header=img.header.copy(),
        voxel_size=tuple(float(v) for v in grid["voxel_size_mm"]), stats=stats, normalisation=params["method"],
        manifest=pathlib.Path(desc["source"]["path"]), normalisation_params=params, cache=cache_dir)


def _check_args(manifest, bids, normalisation, jobs, min_controls) -> None:
    if (manifest is None) == (bids is None):
        raise InputError("prepare: give exactly one input, a manifest (--manifest M.csv) or a BIDS folder (--bids DIR)")
    _norm.check_method(normalisation)
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise InputError(f"--jobs must be a whole number >= 1 (parallel decoding workers), got {jobs!r}")
    if min_controls < 1:
        raise ConfigError(f"cohort.min_controls: got {min_controls}, need at least 1; set it to 3 or more")


def _inputs_of(rows) -> list[dict]:
    files = lambda r: {**{k: str(p) for k, p in r.images.items()}, **{k: str(p) for k, p in (("mask", r.mask), ("lesion", r.lesion)) if p}}
    return [{"subject": r.subject, "role": r.role, "files": files(r)} for r in rows]


def _up_to_date(out: pathlib.Path, settings: dict, rows) -> tuple[bool, str]:
    """(True, why) when ``out`` holds a complete cache of exactly these inputs and settings."""
    try:
        desc = read_description(out)
    except CohortError:
        return False, "no complete cache yet"
    if desc.get("settings") != settings:
        changed = sorted(k for k in settings if desc.get("settings", {}).get(k) != settings[k])
        return False, f"settings changed ({', '.join(changed)})"
    recorded = desc.get("inputs", [])
    if [{"subject": i["subject"], "role": i["role"], "files": {k: f["path"] for k, f in i["files"].items()}}
            for i in recorded] != _inputs_of(rows):
        return False, "the subjects, roles or file paths changed"
    try:
        for name in ("data", "masks", "lesions"):
            if desc["arrays"].get(name):
                _array(out, desc["arrays"][name], np.uint8 if name != "data" else "<f4")
    except CohortError:
        return False, "an array file is missing or has the wrong size"
    touched = 0
    for entry in recorded:
        for key, rec in entry["files"].items():
            path = pathlib.Path(rec["path"])
            if not path.is_file():
                return False, f"{path} is missing"
            st = path.stat()
            if (st.st_size, st.st_mtime_ns) == (rec["size"], rec["mtime_ns"]):
                continue
            now = file_record(path)
            if now["sha256"] != rec["sha256"]:
                return False, f"{path} changed (SHA-256 differs)"
            entry["files"][key] = now
            touched += 1
    if touched:  # same bytes, new times: remember the times so the next check is fast again
        _write_text(out / DESCRIPTION, json.dumps(desc, indent=1) + "\n")
        return True, f"unchanged ({touched} files have new modification times but the same SHA-256)"
    return True, "unchanged (same sizes and modification times)"


def prepare(manifest=None, *, bids=None, out, normalisation: str = "zscore", jobs: int = 1,
            exclude_flagged: bool = False, qc_threshold: float = _qc.QC_THRESHOLD, min_controls: int = 3,
            progress: bool = True) -> Prepared:
    """Validate, normalise and quality-control a cohort into the cache folder ``out``.

    manifest: path of a manifest.csv; or bids: a :class:`embed.bids.BidsQuery`. normalisation:
    "zscore" or "histogram" (landmarks learned on the controls kept). jobs: parallel decoding
    threads. exclude_flagged: leave out the controls QC flags (QC runs once, on all subjects).
    Raises one CohortError listing every problem (table in ``out/problems.csv``).
    """
    _check_args(manifest, bids, normalisation, jobs, min_controls)
    out = pathlib.Path(out).expanduser()
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} is a file; choose a folder for the cohort cache")
    problems: list[Problem] = []
    skipped: list[dict] = []
    if manifest is not None:
        manifest = pathlib.Path(manifest).expanduser().resolve()
        rows, contrasts = read_manifest(manifest, problems)
        source, where = {"kind": "manifest", "path": str(manifest)}, f"manifest {manifest}"
    else:
        from .bids import discover
        found = discover(bids)
        rows, contrasts, skipped = found.rows, found.contrasts, [asdict(s) for s in found.skipped]
        source, where = {"kind": "bids", "path": str(found.root), **found.query_record}, f"BIDS folder {found.root}"
    settings = json.loads(json.dumps({
        "normalisation": normalisation, "percentiles": list(_norm.PERCENTILES), "exclude_flagged": bool(exclude_flagged),
        "qc_threshold": float(qc_threshold), "min_controls": int(min_controls), "source": source,
        "contrasts": list(contrasts), "twinpatch_version": __version__, "format_version": FORMAT_VERSION}))
    out.mkdir(parents=True, exist_ok=True)
    why = "built"
    if not problems:
        current, why = _up_to_date(out, settings, rows)
        if current:
            (out / PROBLEMS).unlink(missing_ok=True)
            desc = read_description(out)
            return Prepared(out, False, why, tuple(s["subject"] for s in desc["subjects"]), tuple(desc["qc"]["flagged"]),
                            tuple(e["subject"] for e in desc["excluded"]), tuple(desc.get("skipped", [])))
    n_controls = sum(r.role == "control" for r in rows)
    if n_controls < min_controls:
        problems.append(Problem("", str(source["path"]), "controls", f"{where}: {n_controls} controls found, at least {min_controls} needed; add healthy controls with role 'control'"))
    found_problems, grid = survey(rows, where)
    problems += found_problems
    if grid is None:
        _fail(out, problems, where, rows)
    temps: list[pathlib.Path] = []
    try:
        return _build(out, rows, contrasts, grid, problems, where, settings, source, skipped, normalisation,
                      jobs, exclude_flagged, qc_threshold, min_controls, progress, temps, why)
    finally:
        for t in temps:
            t.unlink(missing_ok=True)


def _fail(out: pathlib.Path, problems: list[Problem], where: str, rows):
    order = {r.subject: i for i, r in enumerate(rows)}
    # manifest lines first (in line order), then by subject in cohort order; stable within a subject
    problems = sorted(problems, key=lambda p: (p.check != "manifest", 0 if p.check == "manifest" else order.get(p.subject, -1)))
    table = out / PROBLEMS
    _write_text(table, problems_csv(problems))
    raise CohortError(summary(problems, where, table))


def _build(out, rows, contrasts, grid, problems, where, settings, source, skipped, normalisation, jobs,
           exclude_flagged, qc_threshold, min_controls, progress, temps, why) -> Prepared:
    S, C, V = len(rows), len(contrasts), int(np.prod(grid.shape))
    raw_path, masks_path = _tmp(out / DATA), _tmp(out / MASKS)
    lesion_tmp = [out / f".lesion-{s}.partial-{os.getpid()}" for s in range(S)]
    temps += [raw_path, masks_path, *lesion_tmp]
    for path, size in ((raw_path, S * C * V * 4), (masks_path, S * V)):
        with open(path, "wb") as f:
            f.truncate(size)  # sparse until written
    bad = {p.subject for p in problems}
    todo = [s for s, r in enumerate(rows) if r.subject not in bad]
    task = lambda s: scan_subject(rows[s], contrasts, grid, s, raw_path, masks_path, lesion_tmp[s], normalisation)
    scans = {}
    bar = tqdm(total=len(todo), desc="prepare: decode", unit="subject", disable=not progress)
    if jobs == 1:
        for s in todo:
            scans[s] = task(s)
            bar.update()
    else:
        pool = concurrent.futures.ThreadPoolExecutor(max_workers=jobs)
        try:
            futures = {pool.submit(task, s): s for s in todo}
            for fut in concurrent.futures.as_completed(futures):
                scans[futures[fut]] = fut.result()
                bar.update()
        finally:  # on an error or Ctrl-C, do not start the subjects still waiting
            pool.shutdown(wait=True, cancel_futures=True)
    bar.close()
    for s in todo:
        problems += scans[s].problems
    if problems:
        _fail(out, problems, where, rows)
    (out / PROBLEMS).unlink(missing_ok=True)

    roles = [r.role for r in rows]
    subjects = [r.subject for r in rows]
    stats = {r.subject: scans[s].stats for s, r in enumerate(rows)}
    marks = {r.subject: scans[s].landmarks for s, r in enumerate(rows)}
    raw_fd, masks_fd = os.open(raw_path, os.O_RDWR), os.open(masks_path, os.O_RDWR)
    try:
        read_mask = lambda s: pread_array(masks_fd, grid.shape, np.uint8, s * V).view(np.bool_)

        def counts_of(keep):
            counts = np.zeros(grid.shape, dtype=np.int32)
            for s in keep:
                if roles[s] == "control":
                    counts += read_mask(s)
            return counts
        controls = [s for s in range(S) if roles[s] == "control"]
        mask = cohort_mask(counts_of(controls), len(controls), where)
        # QC on z-scores: on disk already (zscore), or computed on the fly from the raw intensities
        report = _qc.qc_files(raw_fd, masks_fd, grid.shape, grid.affine, subjects, roles, contrasts, stats, marks,
                              [scans[s].mask_voxels for s in range(S)], mask, qc_threshold, out / QC_PNG, progress,
                              zscore_on_the_fly=normalisation != "zscore")
        excluded = [s for s in range(S) if exclude_flagged and roles[s] == "control" and subjects[s] in report.flagged]
        keep = [s for s in range(S) if s not in excluded]
        kept_controls = [s for s in keep if roles[s] == "control"]
        report = _qc.QcReport(tuple(_mark_excluded(r, {subjects[s] for s in excluded}) for r in report.rows),
                              report.flagged, report.threshold)
        _qc.write_csv(out / QC_CSV, report.rows)
        if excluded:
            if len(kept_controls) < min_controls:
                raise CohortError(f"{where}: QC flagged {len(excluded)} controls ({', '.join(subjects[s] for s in excluded)}); "
                                  f"excluding them leaves {len(kept_controls)}, at least {min_controls} needed; "
                                  f"inspect {out / QC_PNG} and fix or replace those scans, or prepare without --exclude-flagged")
            mask = cohort_mask(counts_of(kept_controls), len(kept_controls), where)
        params = _norm.zscore_params()
        if normalisation == "histogram":
            params = _norm.histogram_params({c: _norm.learn_standard(np.array([marks[subjects[s]][c] for s in kept_controls]))
                                             for c in contrasts}, len(kept_controls))
        final_stats = {}
        for j, s in enumerate(tqdm(keep, desc="prepare: normalise", unit="subject", disable=not progress)):
            if normalisation == "zscore":  # z-scored while decoding; only close the gaps left by exclusions
                final_stats[subjects[s]] = stats[subjects[s]]
                if j == s:
                    continue
            raw = pread_array(raw_fd, (C,) + grid.shape, "<f4", s * C * V * 4)
            m = read_mask(s)
            if normalisation != "zscore":
                final_stats[subjects[s]] = {}
                for c, contrast in enumerate(contrasts):
                    raw[c], final_stats[subjects[s]][contrast] = _norm.normalise_with(raw[c], m, params, contrast, what=f"{contrast} image of subject {subjects[s]}")
            pwrite_array(raw_fd, raw, j * C * V * 4)  # j <= s: never overwrites a slot not yet read
            pwrite_array(masks_fd, m.astype(np.uint8), j * V)
            del raw
        os.ftruncate(raw_fd, len(keep) * C * V * 4)
        os.ftruncate(masks_fd, len(keep) * V)
    finally:
        os.close(raw_fd)
        os.close(masks_fd)
    lesion_names = [subjects[s] for s in keep if scans[s].has_lesion]
    lesions_path = _tmp(out / LESIONS)
    temps.append(lesions_path)
    if lesion_names:
        with open(lesions_path, "wb") as f:
            for s in keep:
                if scans[s].has_lesion:
                    f.write(lesion_tmp[s].read_bytes())
    mask_img = nib.Nifti1Image(mask.astype(np.uint8), grid.affine, grid.header.copy())
    mask_img.set_data_dtype(np.uint8)
    mask_img.header.set_slope_inter(1.0, 0.0)
    mask_tmp = out / f".mask.partial-{os.getpid()}.nii.gz"
    temps.append(mask_tmp)
    nib.save(mask_img, mask_tmp)
    _write_text(out / SKIPPED, skipped_csv(skipped))
    shape = [len(keep), C, *grid.shape]
    desc = {
        "format": "twinpatch cohort cache", "format_version": FORMAT_VERSION, "twinpatch_version": __version__,
        "created": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "settings": settings, "source": source, "contrasts": list(contrasts),
        "grid": {"shape": list(grid.shape), "affine": grid.affine.tolist(), "orientation": grid.orientation,
                 "voxel_size_mm": list(grid.zooms), "reference_image": grid.source},
        "arrays": {"data": {"file": DATA, "dtype": "<f4", "order": "C", "shape": shape},
                   "masks": {"file": MASKS, "dtype": "|u1", "order": "C", "shape": [len(keep), *grid.shape]},
                   "lesions": {"file": LESIONS, "dtype": "|u1", "order": "C", "shape": [len(lesion_names), *grid.shape],
                               "subjects": lesion_names} if lesion_names else None,
                   "mask": {"file": MASK_NII}},
        "normalisation": params,
        "cohort_mask": {"rule": "voxels inside the masks of at least half of the controls (2 * count >= controls)",
                        "controls": len(kept_controls), "voxels": int(mask.sum())},
        "subjects": [{"subject": subjects[s], "role": roles[s], "mask_voxels": scans[s].mask_voxels,
                      "stats": {c: {k: v for k, v in final_stats[subjects[s]][c].items() if k != "landmarks"} for c in contrasts},
                      "landmarks": marks[subjects[s]], "files": scans[s].files} for s in keep],
        "excluded": [{"subject": subjects[s], "reason": f"flagged by QC: {_reason(report, subjects[s])}"} for s in excluded],
        "qc": {"file": QC_CSV, "montage": QC_PNG, "threshold": report.threshold, "flagged": list(report.flagged),
               "rule": "robust z = (x - median) / (1.4826 MAD) over the controls; flagged if z < -threshold for ncc (any contrast) or dice"},
        "skipped": skipped,
        "inputs": [{"subject": r.subject, "role": r.role, "files": scans[s].files} for s, r in enumerate(rows)],
    }
    (out / DESCRIPTION).unlink(missing_ok=True)  # the old cache is invalid from here on
    for tmp, name in ((raw_path, DATA), (masks_path, MASKS), (mask_tmp, MASK_NII)):
        os.replace(tmp, out / name)
    if lesion_names:
        os.replace(lesions_path, out / LESIONS)
    else:
        (out / LESIONS).unlink(missing_ok=True)
    _write_text(out / DESCRIPTION, json.dumps(desc, indent=1) + "\n")
    return Prepared(out, True, f"built: {why}", tuple(subjects[s] for s in keep), report.flagged,
                    tuple(subjects[s] for s in excluded), tuple(skipped))


def _mark_excluded(row, excluded: set):
    return _qc.QcRow(**{**asdict(row), "excluded": row.subject in excluded})


def _reason(report, subject: str) -> str:
    return next(r.reason for r in report.rows if r.subject == subject)


def qc_cache(cache_dir, threshold: float = _qc.QC_THRESHOLD, write_montage: bool = True, progress: bool = True) -> _qc.QcReport:
    """QC of a prepared cache (``twinpatch qc CACHE_DIR``): recompute the metrics on the cached
    intensities and write ``qc.csv`` (and ``qc.png``) in the cache folder.

    On a z-scored cache the numbers equal those prepare wrote; on a histogram-standardised cache
    they are computed on the standardised intensities. Subjects excluded by prepare are not in
    the cache, so they are not in this table. Reads one plane per subject (or one volume) at a time.
    """
    cache_dir = pathlib.Path(cache_dir)
    desc = read_description(cache_dir)
    subs = desc["subjects"]
    mask = np.asarray(nib.load(cache_dir / MASK_NII).dataobj) != 0
    data_fd, masks_fd = os.open(cache_dir / DATA, os.O_RDONLY), os.open(cache_dir / MASKS, os.O_RDONLY)
    try:
        report = _qc.qc_files(data_fd, masks_fd, tuple(desc["grid"]["shape"]), np.asarray(desc["grid"]["affine"]),
                          [s["subject"] for s in subs], [s["role"] for s in subs], desc["contrasts"],
                          {s["subject"]: s["stats"] for s in subs}, {s["subject"]: s["landmarks"] for s in subs},
                          [s["mask_voxels"] for s in subs], mask, threshold,
                          cache_dir / QC_PNG if write_montage else None, progress)
    finally:
        os.close(data_fd)
        os.close(masks_fd)
    _qc.write_csv(cache_dir / QC_CSV, report.rows)
    return report

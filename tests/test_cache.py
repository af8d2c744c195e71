"""Tests of embed.cache (prepare / load_cache) and embed.checks (every problem at once)."""

import csv
import hashlib
import json
import os
import pathlib
import shutil

import nibabel as nib
import numpy as np
import pytest

from embed.cache import DESCRIPTION, load_cache, prepare, read_description
from embed.cohort import AFFINE_ATOL_MM, load_cohort
from embed.errors import CohortError, ConfigError, InputError
from embed.pairs import gather_patches
from tests.test_cohort import AFF, BRAIN, SHAPE, save, scan, write_manifest


def toy_cohort(tmp_path, rng, n=5, roles=None, header=("subject", "role", "T1w", "FLAIR")) -> pathlib.Path:
    """n toy subjects (T1w + FLAIR, masks derived) on the 12x14x10 4 mm grid; returns the manifest."""
    roles = roles or ["control"] * (n - 1) + ["case"]
    lines = [list(header)]
    for i, role in enumerate(roles):
        cells = [f"s{i:02d}", role]
        for c in header[2:]:
            save(tmp_path / f"s{i:02d}_{c}.nii.gz", scan(rng))
            cells.append(f"s{i:02d}_{c}.nii.gz")
        lines.append(cells)
    return write_manifest(tmp_path / "manifest.csv", lines)


def problems_table(cache) -> list[dict]:
    with open(pathlib.Path(cache) / "problems.csv", newline="") as f:
        return list(csv.DictReader(f))


def sha256(path) -> str:
    return hashlib.sha256(pathlib.Path(path).read_bytes()).hexdigest()  # source: Python hashlib


# --------------------------------------------------------------------------------------------
# a good cohort: the cache equals the in-RAM cohort


def test_cache_equals_load_cohort(tiny_manifest, tmp_path):
    out = tmp_path / "cache"
    result = prepare(tiny_manifest, out=out, progress=False)
    assert result.rebuilt and result.cache == out and result.excluded == () and result.reason == "built: no complete cache yet"
    c, ref = load_cache(out), load_cohort(tiny_manifest, progress=False)
    assert isinstance(c.data, np.memmap) and isinstance(c.masks, np.memmap)
    assert c.data.dtype == np.float32 and c.masks.dtype == bool and c.data.shape == ref.data.shape
    assert not c.data.flags.writeable
    with pytest.raises(ValueError, match="read-only"):
        c.data[0, 0, 0, 0, 0] = 1.0
    np.testing.assert_array_equal(c.data, ref.data)  # bit for bit: same code path per subject
    np.testing.assert_array_equal(c.masks, ref.masks)
    np.testing.assert_array_equal(c.mask, ref.mask)
    assert c.stats == ref.stats
    assert (c.subjects, c.roles, c.contrasts) == (ref.subjects, ref.roles, ref.contrasts)
    assert set(c.lesions) == set(ref.lesions) and all(np.array_equal(c.lesions[k], ref.lesions[k]) for k in ref.lesions)
    np.testing.assert_array_equal(c.affine, ref.affine)
    assert c.voxel_size == ref.voxel_size == (4.0, 4.0, 4.0)
    assert c.indices("control").tolist() == ref.indices("control").tolist()
    assert c.normalisation == "zscore" and c.normalisation_params == {"method": "zscore", "within": "mask"}
    assert c.manifest == tiny_manifest.resolve() and c.cache == out.resolve()
    # NIfTI-1 xform codes of the grid's reference image are kept (synth writes code 4 = MNI152; source: nibabel)
    src = nib.load(tiny_manifest.parent / "images" / "ctl01_T1w.nii.gz").header
    assert int(c.header["sform_code"]) == int(src["sform_code"]) == 4
    assert int(c.header["qform_code"]) == int(src["qform_code"])
    # patches read from the memory map equal patches read from RAM (embed.pairs uses fancy indexing)
    rng = np.random.default_rng(0)
    centres = np.argwhere(ref.mask)[rng.integers(0, int(ref.mask.sum()), 50)]
    subjects = rng.integers(0, len(ref.subjects), 50)
    np.testing.assert_array_equal(gather_patches(c.data, subjects, centres, 5, 2), gather_patches(ref.data, subjects, centres, 5, 2))
    assert type(gather_patches(c.data, subjects, centres, 5, 2)) is np.ndarray
    # nothing half-written is left behind
    assert not [p.name for p in out.iterdir() if "partial" in p.name]
    assert sorted(p.name for p in out.iterdir()) == sorted(
        ["cohort.json", "data.f32", "masks.u8", "lesions.u8", "mask.nii.gz", "qc.csv", "qc.png", "skipped.csv"])


def test_description(tiny_manifest, tmp_path):
    prepare(tiny_manifest, out=tmp_path / "cache", progress=False)
    desc = json.loads((tmp_path / "cache" / DESCRIPTION).read_text())
    img = nib.load(tiny_manifest.parent / "images" / "ctl01_T1w.nii.gz")
    assert desc["grid"]["shape"] == list(img.shape)
    np.testing.assert_allclose(desc["grid"]["affine"], img.affine, rtol=0, atol=AFFINE_ATOL_MM)
    assert desc["grid"]["orientation"] == "".join(nib.aff2axcodes(img.affine)) == "RAS"  # source: nibabel
    assert desc["grid"]["voxel_size_mm"] == [float(z) for z in img.header.get_zooms()]
    assert desc["contrasts"] == ["T1w", "FLAIR"]
    assert desc["arrays"]["data"]["shape"] == [8, 2, *img.shape]
    assert (tmp_path / "cache" / "data.f32").stat().st_size == 8 * 2 * int(np.prod(img.shape)) * 4
    first = desc["subjects"][0]
    assert first["subject"] == "ctl01" and first["role"] == "control"
    for key, rec in first["files"].items():
        assert rec["sha256"] == sha256(rec["path"])
        assert rec["size"] == os.stat(rec["path"]).st_size
    assert set(first["files"]) == {"T1w", "FLAIR", "mask"}
    inside = img.get_fdata()[np.asarray(nib.load(tiny_manifest.parent / "masks" / "ctl01_mask.nii.gz").dataobj) > 0]
    assert first["stats"]["T1w"]["mean"] == pytest.approx(inside.mean(), rel=1e-6)
    np.testing.assert_allclose(first["landmarks"]["T1w"], np.percentile(inside, [1, 10, 20, 30, 40, 50, 60, 70, 80, 90, 99]), rtol=1e-6)
    assert desc["twinpatch_version"] and desc["format_version"] == 1
    assert desc["cohort_mask"]["voxels"] == int((np.asarray(nib.load(tmp_path / "cache" / "mask.nii.gz").dataobj) > 0).sum())
    assert list(desc)[-1] == "inputs" and len(desc["inputs"]) == 8


def test_rerun_is_noop_and_changes_are_detected(tmp_path):
    manifest = toy_cohort(tmp_path, np.random.default_rng(1))
    out = tmp_path / "cache"
    prepare(manifest, out=out, progress=False)
    stamp = (out / "data.f32").stat().st_mtime_ns
    again = prepare(manifest, out=out, progress=False)
    assert not again.rebuilt and again.reason == "unchanged (same sizes and modification times)"
    assert (out / "data.f32").stat().st_mtime_ns == stamp
    # same bytes, new modification time: the checksum confirms nothing changed
    f = tmp_path / "s02_T1w.nii.gz"
    os.utime(f, ns=(f.stat().st_atime_ns, f.stat().st_mtime_ns + 10**9))
    again = prepare(manifest, out=out, progress=False)
    assert not again.rebuilt and "same SHA-256" in again.reason
    assert read_description(out)["inputs"][2]["files"]["T1w"]["mtime_ns"] == f.stat().st_mtime_ns
    assert prepare(manifest, out=out, progress=False).reason == "unchanged (same sizes and modification times)"
    # new content, modification time put back: the size differs, and the checksum confirms the change
    before = load_cache(out).data[2, 0].copy()
    vol = scan(np.random.default_rng(99))
    save(tmp_path / "new.nii.gz", vol)
    st = f.stat()
    shutil.copyfile(tmp_path / "new.nii.gz", f)
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert f.stat().st_size != st.st_size
    rebuilt = prepare(manifest, out=out, progress=False)
    assert rebuilt.rebuilt and rebuilt.reason == f"built: {f} changed (SHA-256 differs)"
    after = load_cache(out).data[2, 0]
    assert not np.array_equal(before, after)
    np.testing.assert_allclose(after[BRAIN], (vol[BRAIN] - vol[BRAIN].mean()) / vol[BRAIN].std(), atol=1e-5)
    # other settings rebuild too
    assert prepare(manifest, out=out, normalisation="histogram", progress=False).reason == "built: settings changed (normalisation)"
    assert load_cache(out).normalisation == "histogram"
    (out / "masks.u8").unlink()
    assert prepare(manifest, out=out, normalisation="histogram", progress=False).rebuilt


def test_jobs_give_the_same_cache(tiny_manifest, tmp_path):
    prepare(tiny_manifest, out=tmp_path / "one", progress=False, jobs=1)
    prepare(tiny_manifest, out=tmp_path / "two", progress=True, jobs=2)
    for name in ("data.f32", "masks.u8", "lesions.u8"):
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "two" / name).read_bytes()


def test_crash_leaves_old_cache_intact(tmp_path, monkeypatch):
    manifest = toy_cohort(tmp_path, np.random.default_rng(2))
    out = tmp_path / "cache"
    prepare(manifest, out=out, progress=False)
    old = (out / "data.f32").read_bytes()
    import embed.cache

    calls = []

    def boom(*args, **kwargs):
        calls.append(1)
        if len(calls) == 5:
            raise KeyboardInterrupt  # e.g. Ctrl-C in the middle of the normalise pass
        return real(*args, **kwargs)
    real = embed.cache._norm.normalise_with
    monkeypatch.setattr(embed.cache._norm, "normalise_with", boom)
    with pytest.raises(KeyboardInterrupt):
        prepare(manifest, out=out, normalisation="histogram", progress=False)
    assert not [p.name for p in out.iterdir() if "partial" in p.name]
    assert (out / "data.f32").read_bytes() == old and load_cache(out).normalisation == "zscore"


# --------------------------------------------------------------------------------------------
# every problem at once


def test_all_problems_reported_at_once(tmp_path):
    rng = np.random.default_rng(3)
    manifest = toy_cohort(tmp_path, rng, n=12, header=("subject", "role", "T1w", "FLAIR", "mask"))
    lines = [line.split(",") for line in manifest.read_text().splitlines()]
    for line in lines[1:]:
        line[4] = ""  # masks derived unless set below
    moved = AFF.copy()
    moved[0, 3] += 2.0
    save(tmp_path / "s01_T1w.nii.gz", scan(rng), moved)                         # affine
    lps = AFF @ np.diag([-1.0, -1.0, 1.0, 1.0])
    save(tmp_path / "s02_FLAIR.nii.gz", scan(rng), lps)                         # orientation
    nan = scan(rng)
    nan[2, 3, 4] = np.inf
    save(tmp_path / "s03_T1w.nii.gz", nan)                                      # finite
    save(tmp_path / "s04_T1w.nii.gz", scan(rng).astype(np.complex64))          # dtype
    save(tmp_path / "s05_empty_mask.nii.gz", np.zeros(SHAPE, np.uint8))
    lines[6][4] = "s05_empty_mask.nii.gz"                                       # empty mask
    noxform = nib.Nifti1Image(scan(rng), AFF)
    noxform.set_sform(None, code=0)
    noxform.set_qform(None, code=0)
    nib.save(noxform, tmp_path / "s06_T1w.nii.gz")                              # no transform
    assert nib.load(tmp_path / "s06_T1w.nii.gz").header["sform_code"] == 0     # source: NIfTI-1 / nibabel
    clash = nib.Nifti1Image(scan(rng), AFF)
    q = AFF.copy()
    q[1, 3] += 5.0
    clash.set_qform(q, code=1)
    nib.save(clash, tmp_path / "s07_FLAIR.nii.gz")                              # qform vs sform
    pix = nib.Nifti1Image(scan(rng), AFF)
    pix.header.set_zooms((4.0, 4.0, 3.0))
    nib.save(pix, tmp_path / "s08_T1w.nii.gz")                                  # pixdim vs affine
    save(tmp_path / "s09_T1w.nii.gz", scan(rng, ellipsoid_small := BRAIN[:, :, :9]))   # shape
    (tmp_path / "s10_FLAIR.nii.gz").unlink()                                    # missing file
    lines.append(["s00", "case", "x.nii.gz", "y.nii.gz", ""])                   # duplicate id
    lines.append(["s99", "patient", "x.nii.gz", "y.nii.gz", ""])                # unknown role
    write_manifest(manifest, lines)
    out = tmp_path / "cache"
    out.mkdir()
    (out / "cohort.json").write_text("{}")  # a pre-existing (broken) description is left alone
    with pytest.raises(CohortError, match=r"^13 problems in manifest .*manifest\.csv \(12 subjects\): s00 manifest \(manifest\.csv\), "
                                          r"s99 manifest \(manifest\.csv\), s01 affine \(s01_T1w\.nii\.gz\), s02 orientation "
                                          r"\(s02_FLAIR\.nii\.gz\), .*, and 5 more; first: manifest .*line 14 \(subject s00\): subject id "
                                          r"'s00' already used on line 2; make subject ids unique; "
                                          r"every problem with its fix is listed in .*problems\.csv$") as err:
        prepare(manifest, out=out, progress=False)
    assert "\n" not in str(err.value)
    found = {(p["subject"], p["check"]) for p in problems_table(out)}
    assert found == {("s01", "affine"), ("s02", "orientation"), ("s03", "finite"), ("s04", "dtype"), ("s05", "mask"),
                     ("s06", "xform"), ("s07", "xform"), ("s08", "voxel_size"), ("s09", "shape"), ("s10", "file"),
                     ("s00", "manifest"), ("s99", "manifest"), ("s06", "orientation")}
    # without qform/sform nibabel falls back to the pixdim-only base affine, x flipped (source: nibabel)
    assert nib.aff2axcodes(nib.load(tmp_path / "s06_T1w.nii.gz").affine) == ("L", "A", "S")
    messages = {p["subject"] + p["check"]: p["message"] for p in problems_table(out)}
    assert "orientation LPS vs RAS" in messages["s02orientation"]  # nib.aff2axcodes of lps (source: nibabel)
    assert nib.aff2axcodes(lps) == ("L", "P", "S")
    assert "qform_code 0 and sform_code 0" in messages["s06xform"]
    assert "qform and an sform that disagree by up to 5 mm" in messages["s07xform"]
    assert "voxel size (pixdim) 4x4x3 mm, expected 4x4x4 mm" in messages["s08voxel_size"]
    assert "shape (12, 14, 9), expected (12, 14, 10)" in messages["s09shape"]
    assert "stores complex voxels" in messages["s04dtype"]
    assert "already used on line 2" in messages["s00manifest"]
    assert (out / "cohort.json").read_text() == "{}" and not (out / "data.f32").exists()
    assert not [p.name for p in out.iterdir() if "partial" in p.name]


def test_too_few_controls_is_one_of_the_problems(tmp_path):
    manifest = toy_cohort(tmp_path, np.random.default_rng(4), roles=["control", "control", "case"])
    with pytest.raises(CohortError, match=r"^1 problem in manifest .*: cohort controls \(manifest\.csv\); first: manifest .*: "
                                          r"2 controls found, at least 3 needed; add healthy controls"):
        prepare(manifest, out=tmp_path / "cache", progress=False)
    assert prepare(manifest, out=tmp_path / "cache", min_controls=2, progress=False).rebuilt
    assert not (tmp_path / "cache" / "problems.csv").exists()  # a stale table goes once the cohort is good


def test_bad_arguments(tmp_path):
    manifest = toy_cohort(tmp_path, np.random.default_rng(5))
    from embed.bids import BidsQuery

    with pytest.raises(InputError, match=r"give exactly one input, a manifest \(--manifest M\.csv\) or a BIDS folder"):
        prepare(out=tmp_path / "c")
    with pytest.raises(InputError, match=r"give exactly one input"):
        prepare(manifest, bids=BidsQuery(tmp_path, "X", ("T1w",)), out=tmp_path / "c")
    with pytest.raises(ConfigError, match=r"cohort\.normalisation: unknown method 'minmax'; use one of zscore, histogram"):
        prepare(manifest, out=tmp_path / "c", normalisation="minmax")
    for jobs in (0, 1.5, True):
        with pytest.raises(InputError, match=r"--jobs must be a whole number >= 1"):
            prepare(manifest, out=tmp_path / "c", jobs=jobs)
    with pytest.raises(ConfigError, match=r"cohort\.min_controls: got 0, need at least 1"):
        prepare(manifest, out=tmp_path / "c", min_controls=0)
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputError, match=r"--out .*file is a file; choose a folder"):
        prepare(manifest, out=tmp_path / "file")
    with pytest.raises(CohortError, match=r"manifest .*nope\.csv not found"):
        prepare(tmp_path / "nope.csv", out=tmp_path / "c")


def test_load_cache_refuses_incomplete_caches(tmp_path):
    manifest = toy_cohort(tmp_path, np.random.default_rng(6))
    out = tmp_path / "cache"
    with pytest.raises(CohortError, match=r"cache is not a complete cohort cache \(cohort\.json is missing\); run twinpatch prepare --out"):
        load_cache(out)
    prepare(manifest, out=out, progress=False)
    good = (out / "cohort.json").read_text()
    (out / "cohort.json").write_text(good[:100])
    with pytest.raises(CohortError, match=r"cohort\.json: not valid JSON .*run twinpatch prepare again"):
        load_cache(out)
    (out / "cohort.json").write_text(good.replace('"format_version": 1', '"format_version": 7'))
    with pytest.raises(CohortError, match=r"cache format version 7, this twinpatch reads version 1"):
        load_cache(out)
    (out / "cohort.json").write_text(good)
    with open(out / "data.f32", "r+b") as f:
        f.truncate(1000)
    with pytest.raises(CohortError, match=r"data\.f32: expected \d+ bytes for shape \(5, 2, 12, 14, 10\), found 1000; the cache is damaged"):
        load_cache(out)
    assert prepare(manifest, out=out, progress=False).reason == "built: an array file is missing or has the wrong size"
    load_cache(out)


def test_mni152_template_cohort(tmp_path):
    """A real anatomical image: the MNI152 T1 template nilearn ships, at 4 mm, with noise per subject."""
    from nilearn import datasets

    tpl = datasets.load_mni152_template(resolution=4)
    brain = np.asarray(datasets.load_mni152_brain_mask(resolution=4).dataobj) > 0
    base = np.asarray(tpl.get_fdata(), dtype=np.float32)
    rng = np.random.default_rng(7)
    lines = [["subject", "role", "T1w"]]
    for i in range(4):
        vol = np.where(brain, base + rng.normal(0, 0.02 * base[brain].mean(), base.shape), 0).astype(np.float32)
        vol = np.where(brain, np.maximum(vol, 1e-3), 0).astype(np.float32)
        img = nib.Nifti1Image(vol, tpl.affine, tpl.header)
        nib.save(img, tmp_path / f"m{i}.nii.gz")
        lines.append([f"m{i}", "control", f"m{i}.nii.gz"])
    manifest = write_manifest(tmp_path / "manifest.csv", lines)
    prepare(manifest, out=tmp_path / "cache", progress=False)
    c = load_cache(tmp_path / "cache")
    desc = read_description(tmp_path / "cache")
    assert desc["grid"]["orientation"] == "".join(nib.aff2axcodes(tpl.affine))  # source: nibabel + nilearn's template
    assert tuple(desc["grid"]["shape"]) == tpl.shape
    np.testing.assert_allclose(c.affine, tpl.affine, rtol=0, atol=AFFINE_ATOL_MM)
    assert c.voxel_size == tuple(float(z) for z in tpl.header.get_zooms()[:3])
    assert int(c.header["sform_code"]) == int(tpl.header["sform_code"])  # NIfTI-1 code kept (source: nibabel header)
    ref = load_cohort(manifest, progress=False)
    np.testing.assert_array_equal(c.data, ref.data)
    # the template's brain is one connected piece: the derived masks keep (nearly) all of it
    assert c.mask.sum() >= 0.99 * brain.sum()


def test_survey_rgb_and_voxel_size_in_the_affine(tmp_path):
    from embed.checks import survey
    from embed.cohort import ManifestRow

    rng = np.random.default_rng(8)
    rgb = np.zeros(SHAPE, dtype=[("R", "u1"), ("G", "u1"), ("B", "u1")])
    nib.save(nib.Nifti1Image(rgb, AFF), tmp_path / "rgb.nii.gz")
    # nibabel maps this structured dtype to the NIfTI-1 RGB24 code 128 (source: nibabel / NIfTI-1 datatype table)
    assert int(nib.load(tmp_path / "rgb.nii.gz").header["datatype"]) == 128
    coarse = AFF @ np.diag([1.0, 1.0, 1.25, 1.0])
    rows = [ManifestRow(f"s{i}", "control", {"T1w": save(tmp_path / f"s{i}.nii.gz", scan(rng))}, None, None) for i in range(3)]
    rows.append(ManifestRow("rgb", "control", {"T1w": tmp_path / "rgb.nii.gz"}, None, None))
    rows.append(ManifestRow("big", "control", {"T1w": save(tmp_path / "big.nii.gz", scan(rng), coarse)}, None, None))
    problems, grid = survey(rows, "manifest m.csv")
    assert grid.shape == SHAPE and grid.orientation == "RAS" and (grid.shared, grid.total) == (4, 5)
    assert [(p.subject, p.check) for p in problems] == [("rgb", "dtype"), ("big", "affine")]
    assert "stores RGB/structured voxels" in problems[0].message
    assert "voxel size 4x4x5 mm vs 4x4x4 mm" in problems[1].message

"""Tests of embed.qc: similarity to the controls' median, robust z-scores, flags, exclusion, montage."""

import csv
import shutil

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage, stats
from scipy.spatial import distance

from embed.cache import load_cache, prepare, read_description
from embed.errors import CohortError, InputError
from embed.cache import qc_cache
from embed.qc import MAD_TO_SD, QC_THRESHOLD, assess, dice, mid_slices, robust_z, similarity

MOVED = "ctl05"


@pytest.fixture(scope="module")
def cohort8(tmp_path_factory):
    """8 synthetic controls + 1 case on the 4 mm MNI152 grid."""
    from embed.synth import make_cohort

    return make_cohort(tmp_path_factory.mktemp("qc") / "cohort", n_controls=8, n_cases=1, seed=11,
                       voxel_size=4.0, progress=False)


def misregister(manifest, dest, move):
    """Copy the cohort to ``dest`` and apply ``move`` (volume, is_mask) -> volume to every file of MOVED."""
    shutil.copytree(manifest.parent, dest)
    for name in (f"images/{MOVED}_T1w.nii.gz", f"images/{MOVED}_FLAIR.nii.gz", f"masks/{MOVED}_mask.nii.gz"):
        img = nib.load(dest / name)
        moved = move(np.asarray(img.dataobj, dtype=np.float32), "mask" in name)
        nib.save(nib.Nifti1Image(moved.astype(img.get_data_dtype()), img.affine, img.header), dest / name)
    return dest / "manifest.csv"


def read_qc(cache) -> list[dict]:
    with open(cache / "qc.csv", newline="") as f:
        return list(csv.DictReader(f))


def test_robust_z_against_scipy():
    rng = np.random.default_rng(0)
    x = rng.normal(0.9, 0.02, 12)
    controls = np.arange(9)
    # source: scipy.stats.median_abs_deviation(scale="normal") = MAD / 0.67449 = 1.4826 MAD
    spread = stats.median_abs_deviation(x[controls], scale="normal")
    assert MAD_TO_SD == pytest.approx(1 / stats.norm.ppf(0.75), abs=1e-4)
    np.testing.assert_allclose(robust_z(x, controls, floor=0.0), (x - np.median(x[controls])) / spread, rtol=1e-4)
    # the floor takes over for near-identical controls
    same = np.array([0.95, 0.95, 0.95, 0.951, 0.90])
    np.testing.assert_allclose(robust_z(same, np.arange(4), floor=0.01), (same - 0.95) / 0.01)


def test_similarity_is_pearson_with_the_median_over_slabs():
    rng = np.random.default_rng(1)
    S, C, shape = 7, 2, (9, 5, 4)
    data = rng.normal(size=(S, C, *shape)).astype(np.float32)
    data[6, 1] = 3.0  # a constant image: correlation defined as 0
    mask = rng.random(shape) < 0.7
    controls = np.array([0, 1, 2, 3, 4])
    read = lambda s, c, x0, x1: data[s, c, x0:x1]
    for slab_bytes in (1, 2 * 5 * 4 * 4 * S, 10**9):  # one plane, two planes, everything at once
        ncc = similarity(read, S, C, controls, mask, slab_bytes=slab_bytes)
        for c in range(C):
            med = np.median(data[controls, c][:, mask], axis=0)
            for s in range(S - 1 if c == 1 else S):
                # source: numpy.corrcoef (Pearson correlation)
                assert ncc[s, c] == pytest.approx(np.corrcoef(data[s, c][mask], med)[0, 1], abs=1e-9)
        assert ncc[6, 1] == 0.0


def test_dice_against_scipy():
    rng = np.random.default_rng(2)
    a, b = rng.random((6, 7, 8)) < 0.5, rng.random((6, 7, 8)) < 0.3
    # source: scipy.spatial.distance.dice is the Dice *dissimilarity*, 1 - Dice
    assert dice(a, b) == pytest.approx(1 - distance.dice(a.ravel(), b.ravel()))
    assert dice(a, a) == 1.0 and dice(np.zeros_like(a), np.zeros_like(a)) == 1.0


def test_assess_rule_and_threshold_errors():
    subjects, roles = ["a", "b", "c", "d", "e", "p"], ["control"] * 5 + ["case"]
    ncc = np.array([[0.95], [0.94], [0.96], [0.95], [0.70], [0.95]])
    dices = np.array([0.99, 0.98, 0.99, 0.99, 0.99, 0.90])
    st = {s: {"T1w": {"mean": 1.0, "std": 0.1}} for s in subjects}
    lm = {s: {"T1w": [0.5, 1.5]} for s in subjects}
    r = assess(subjects, roles, ["T1w"], ncc, dices, st, lm, [100] * 6)
    assert r.flagged == ("e", "p") and r.threshold == QC_THRESHOLD
    row = {x.subject: x for x in r.rows}
    # ncc: median 0.95, MAD 0.01 -> spread 0.014826, z = -0.25 / 0.014826 = -16.9 (by hand);
    # dice: MAD 0 -> the floor 0.01, z = -0.09 / 0.01 = -9.0
    assert row["e"].reason == "ncc_z=-16.9 (T1w)" and row["p"].reason == "dice_z=-9.0"
    assert row["a"].p01 == 0.5 and row["a"].p99 == 1.5 and not row["a"].flagged
    for bad in (0, -1, "3"):
        with pytest.raises(InputError, match=r"qc threshold must be a number > 0 \(robust z-score cut-off\)"):
            assess(subjects, roles, ["T1w"], ncc, dices, st, lm, [100] * 6, threshold=bad)


@pytest.mark.parametrize("kind", ["shift", "rotate"])
def test_misregistered_control_is_flagged_and_excluded(cohort8, tmp_path, kind):
    if kind == "shift":  # 2 voxels (8 mm) along the first axis
        move = lambda v, is_mask: ndimage.shift(v, (2, 0, 0), order=0 if is_mask else 1)
    else:  # 4 degrees in the axial plane
        move = lambda v, is_mask: ndimage.rotate(v, 4.0, axes=(0, 1), reshape=False, order=0 if is_mask else 1)
    manifest = misregister(cohort8, tmp_path / "cohort", move)
    kept = prepare(manifest, out=tmp_path / "all", progress=False)
    controls = [r for r in read_qc(tmp_path / "all") if r["role"] == "control"]
    assert {r["subject"] for r in controls if r["flagged"] == "1"} == {MOVED}
    assert MOVED in kept.flagged and kept.excluded == () and MOVED in kept.subjects
    worst_other = min(float(r["ncc_z"]) for r in controls if r["subject"] != MOVED)
    moved = [r for r in controls if r["subject"] == MOVED]
    assert worst_other > -QC_THRESHOLD and max(float(r["ncc_z"]) for r in moved) < -QC_THRESHOLD
    assert "ncc_z=" in moved[0]["reason"]
    # exclusion drops it from the arrays, the cohort mask and the learned landmarks
    out = prepare(manifest, out=tmp_path / "kept", exclude_flagged=True, normalisation="histogram", progress=False)
    assert out.excluded == (MOVED,)
    c = load_cache(tmp_path / "kept")
    assert MOVED not in c.subjects and len(c.subjects) == 8 and c.data.shape[0] == 8
    assert c.normalisation_params["controls"] == 7
    counts = np.asarray(c.masks)[c.indices("control")].sum(axis=0)
    np.testing.assert_array_equal(c.mask, 2 * counts >= 7)
    desc = read_description(tmp_path / "kept")
    assert desc["excluded"][0]["subject"] == MOVED and desc["excluded"][0]["reason"].startswith("flagged by QC: ")
    assert [r["excluded"] for r in read_qc(tmp_path / "kept") if r["subject"] == MOVED] == ["1", "1"]
    png = (tmp_path / "kept" / "qc.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (source: PNG specification)


def test_exclusion_leaving_too_few_controls(cohort8, tmp_path):
    manifest = misregister(cohort8, tmp_path / "cohort", lambda v, m: ndimage.shift(v, (2, 0, 0), order=0))
    with pytest.raises(CohortError, match=r"QC flagged 1 controls \(ctl05\); excluding them leaves 7, at least 8 needed; "
                                          r"inspect .*qc\.png"):
        prepare(manifest, out=tmp_path / "c", exclude_flagged=True, min_controls=8, progress=False)
    assert (tmp_path / "c" / "qc.csv").is_file() and not (tmp_path / "c" / "cohort.json").exists()


def test_qc_cache_reproduces_prepare(cohort8, tmp_path):
    prepare(cohort8, out=tmp_path / "c", progress=False)
    before = (tmp_path / "c" / "qc.csv").read_text()
    (tmp_path / "c" / "qc.csv").unlink()
    report = qc_cache(tmp_path / "c", progress=False)
    assert (tmp_path / "c" / "qc.csv").read_text() == before  # z-scored cache: the same numbers
    assert len(report.rows) == 9 * 2
    strict = qc_cache(tmp_path / "c", threshold=0.5, write_montage=False, progress=False)
    assert len(strict.flagged) > len(report.flagged)


def test_mid_slices_follow_the_affine():
    rng = np.random.default_rng(3)
    vol = rng.random((6, 7, 8)).astype(np.float32)
    mask = np.ones(vol.shape, bool)
    ras = np.diag([2.0, 2.0, 2.0, 1.0])
    # the same voxels stored with the first two axes flipped (LPS): the displayed slices are equal
    lps = ras @ np.array([[-1, 0, 0, 5], [0, -1, 0, 6], [0, 0, 1, 0], [0, 0, 0, 1.0]])
    assert nib.aff2axcodes(lps) == ("L", "P", "S")  # source: nibabel
    flipped = vol[::-1, ::-1, :]
    for a, b in zip(mid_slices(vol, mask, ras), mid_slices(flipped, mask, lps)):
        np.testing.assert_array_equal(a, b)
    sag, cor, axi = mid_slices(vol, mask, ras)
    np.testing.assert_array_equal(axi, vol[:, :, 3].T)


def test_write_png_decodes_with_pillow(tmp_path):
    from PIL import Image

    from embed.qc import write_png

    rng = np.random.default_rng(4)
    bands = [rng.integers(0, 256, (h, 37, 3), dtype=np.uint8) for h in (5, 1, 12)]
    write_png(tmp_path / "x.png", 37, 18, iter(bands))
    with Image.open(tmp_path / "x.png") as img:  # source: Pillow's PNG decoder
        assert img.mode == "RGB" and img.size == (37, 18)
        np.testing.assert_array_equal(np.asarray(img), np.concatenate(bands))

"""Tests of embed.cohort: manifest reading, NIfTI checks, masks, normalisation, cohort assembly."""

import itertools
import pathlib

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage

from embed.cohort import (
    AFFINE_ATOL_MM, Cohort, ManifestRow, derive_mask, load_cohort, load_image, load_subject,
    normalise, plane_axis, read_manifest,
)
from embed.errors import CohortError, ConfigError, InputError

SHAPE = (12, 14, 10)
# RAS+ grid, 4 mm voxels (small on purpose), origin somewhere plausible.
AFF = np.array([[4.0, 0, 0, -22.0], [0, 4.0, 0, -30.0], [0, 0, 4.0, -18.0], [0, 0, 0, 1]])


def ellipsoid(shape=SHAPE) -> np.ndarray:
    """(X, Y, Z) bool ellipsoid filling most of the grid: a convex toy brain without holes."""
    g = np.indices(shape, dtype=np.float64)
    c = [(s - 1) / 2 for s in shape]
    r = [s / 2 - 1.2 for s in shape]
    return sum(((g[i] - c[i]) / r[i]) ** 2 for i in range(3)) <= 1.0


BRAIN = ellipsoid()


def save(path, data, affine=AFF) -> pathlib.Path:
    path = pathlib.Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(nib.Nifti1Image(np.asarray(data), affine), path)
    return path


def scan(rng, brain=BRAIN) -> np.ndarray:
    """Skull-stripped toy scan: positive inside ``brain``, exactly 0 outside; (X, Y, Z) float32."""
    return np.where(brain, rng.uniform(20.0, 200.0, brain.shape), 0.0).astype(np.float32)


def write_manifest(path, lines) -> pathlib.Path:
    path = pathlib.Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(",".join(cells) for cells in lines) + "\n")
    return path


def simple_cohort(tmp_path, rng, roles=("control", "control", "control"), overrides=None, header=None):
    """Write one T1w+FLAIR subject per role; ``overrides[(i, contrast)] = (data, affine)``."""
    overrides = overrides or {}
    lines = [header or ["subject", "role", "T1w", "FLAIR"]]
    for i, role in enumerate(roles):
        cells = [f"s{i:02d}", role]
        for contrast in ("T1w", "FLAIR"):
            data, affine = overrides.get((i, contrast), (scan(rng), AFF))
            save(tmp_path / f"s{i:02d}_{contrast}.nii.gz", data, affine)
            cells.append(f"s{i:02d}_{contrast}.nii.gz")
        lines.append(cells)
    return write_manifest(tmp_path / "manifest.csv", lines)


# --------------------------------------------------------------------------------------------
# a good cohort


def test_good_manifest_loads(tmp_path, monkeypatch):
    rng = np.random.default_rng(0)
    study = tmp_path / "study"
    subjects = [("ctl01", "control"), ("pat01", "case"), ("ctl02", "control"),
                ("ctl03", "control"), ("pat02", "case"), ("ctl04", "control")]
    box = np.zeros(SHAPE, bool)
    box[3:9, 3:11, 2:8] = True
    lesion = np.zeros(SHAPE, bool)
    lesion[5:7, 6:8, 4:6] = True
    raw, expected_mask = {}, {}
    lines = [["subject", "role", "FLAIR", "T1w", "mask", "lesion"]]  # FLAIR first: column order rules
    for subject, role in subjects:
        cells = [subject, role]
        for contrast in ("FLAIR", "T1w"):
            raw[subject, contrast] = scan(rng)
            p = save(study / "nii" / f"{subject}_{contrast}.nii.gz", raw[subject, contrast])
            cells.append(str(p) if subject == "ctl03" else f"nii/{subject}_{contrast}.nii.gz")
        if subject == "ctl02":  # mask from file (a box inside the brain), else derived
            save(study / "nii" / "ctl02_mask.nii.gz", box.astype(np.uint8))
            cells.append("nii/ctl02_mask.nii.gz")
            expected_mask[subject] = box
        else:
            cells.append("")
            expected_mask[subject] = BRAIN
        if subject == "pat01":
            save(study / "nii" / "pat01_lesion.nii", lesion.astype(np.float32) * 3)
            cells.append("nii/pat01_lesion.nii")
        else:
            cells.append("")
        lines.append(cells)
    manifest = write_manifest(study / "manifest.csv", lines)
    monkeypatch.chdir(tmp_path)  # relative paths must resolve against the manifest, not the cwd

    rows, contrasts = read_manifest("study/manifest.csv")
    assert contrasts == ("FLAIR", "T1w")
    assert rows[0] == ManifestRow("ctl01", "control",
                                  {"FLAIR": study.resolve() / "nii/ctl01_FLAIR.nii.gz",
                                   "T1w": study.resolve() / "nii/ctl01_T1w.nii.gz"}, None, None)
    assert all(p.is_absolute() for r in rows for p in r.images.values())
    assert rows[1].lesion == study.resolve() / "nii/pat01_lesion.nii"
    assert rows[2].mask == study.resolve() / "nii/ctl02_mask.nii.gz"

    c = load_cohort("study/manifest.csv", progress=False)
    assert isinstance(c, Cohort)
    assert c.manifest == manifest.resolve()
    assert c.subjects == tuple(s for s, _ in subjects)
    assert c.roles == tuple(r for _, r in subjects)
    assert c.contrasts == ("FLAIR", "T1w")
    assert c.data.shape == (6, 2) + SHAPE and c.data.dtype == np.float32
    assert c.masks.shape == (6,) + SHAPE and c.masks.dtype == bool
    assert c.indices("control").tolist() == [0, 2, 3, 5] and c.indices("control").dtype == np.int64
    assert c.indices("case").tolist() == [1, 4]
    assert c.voxel_size == (4.0, 4.0, 4.0)
    assert c.normalisation == "zscore"
    np.testing.assert_allclose(c.affine, AFF, rtol=0, atol=AFFINE_ATOL_MM)
    assert set(c.lesions) == {"pat01"}
    np.testing.assert_array_equal(c.lesions["pat01"], lesion)
    for s, subject in enumerate(c.subjects):
        m = expected_mask[subject]
        np.testing.assert_array_equal(c.masks[s], m)
        for ci, contrast in enumerate(c.contrasts):
            inside = raw[subject, contrast][m].astype(np.float64)  # independent numpy z-score
            mean, std = inside.mean(), inside.std()
            out = c.data[s, ci]
            np.testing.assert_allclose(out[m], (inside - mean) / std, rtol=1e-5, atol=1e-5)
            assert np.all(out[~m] == 0)
            assert abs(out[m].astype(np.float64).mean()) < 1e-5
            assert abs(out[m].astype(np.float64).std() - 1) < 1e-5
            assert c.stats[subject][contrast]["mean"] == pytest.approx(mean, rel=1e-12)
            assert c.stats[subject][contrast]["std"] == pytest.approx(std, rel=1e-12)
    # cohort mask: 3 of 4 control masks are BRAIN, one is the box -> BRAIN (3 >= 4/2)
    np.testing.assert_array_equal(c.mask, BRAIN)


def test_load_image_squeezes_trailing_singleton(tmp_path):
    vol = scan(np.random.default_rng(1))
    img = load_image(save(tmp_path / "a.nii.gz", vol[..., None]), "T1w image of subject s")
    assert img.shape == SHAPE
    np.testing.assert_array_equal(img.get_fdata(dtype=np.float32), vol)


# --------------------------------------------------------------------------------------------
# affines and planes


def test_affine_round_trip_within_tolerance(tmp_path):
    # An oblique float64 affine with many digits; nibabel (NIfTI-1 standard) stores srow_x/y/z as
    # float32, so the re-read affine differs by float32 rounding only, well inside AFFINE_ATOL_MM.
    t = np.deg2rad(17.3)
    rot = np.array([[np.cos(t), -np.sin(t), 0], [np.sin(t), np.cos(t), 0], [0, 0, 1]])
    aff = np.eye(4)
    aff[:3, :3] = rot @ np.diag([2.123456789, 1.987654321, 2.5])
    aff[:3, 3] = [-90.123456789, 126.987654321, -72.333333333]
    path = save(tmp_path / "oblique.nii.gz", scan(np.random.default_rng(2)), aff)
    loaded = nib.load(path)
    assert loaded.header["srow_x"].dtype == np.float32  # source: nibabel / NIfTI-1 header layout
    assert np.max(np.abs(loaded.affine - aff)) <= AFFINE_ATOL_MM
    # the tolerance accepts the round trip and rejects a real 0.01 mm shift
    sub = load_subject({"T1w": path}, reference=(aff, SHAPE))
    assert sub.affine.dtype == np.float64 and sub.affine.shape == (4, 4)
    shifted = aff.copy()
    shifted[0, 3] += 0.01
    with pytest.raises(CohortError, match=r"T1w image of subject case: .*affine that differs .*resample every scan onto the template grid first"):
        load_subject({"T1w": path}, reference=(shifted, SHAPE))


def axcodes_affine(codes, zooms=(2.0, 3.0, 4.0)) -> np.ndarray:
    """Affine whose voxel axes point along ``codes`` (e.g. ("A", "S", "R")), built by hand."""
    aff = np.eye(4)
    aff[:3, :3] = 0
    for axis, code in enumerate(codes):
        world = {"L": 0, "R": 0, "P": 1, "A": 1, "I": 2, "S": 2}[code]
        aff[world, axis] = zooms[axis] * (1 if code in "RAS" else -1)
    return aff


def test_plane_axis_ras():
    assert nib.aff2axcodes(AFF) == ("R", "A", "S")  # source: nibabel
    assert plane_axis(AFF, "axial") == 2
    assert plane_axis(AFF, "coronal") == 1
    assert plane_axis(AFF, "sagittal") == 0


def test_plane_axis_permuted_and_flipped():
    aff = axcodes_affine(("A", "S", "R"))
    assert nib.aff2axcodes(aff) == ("A", "S", "R")  # source: nibabel
    assert (plane_axis(aff, "axial"), plane_axis(aff, "coronal"), plane_axis(aff, "sagittal")) == (1, 0, 2)
    aff = axcodes_affine(("P", "I", "L"))
    # nibabel.orientations agrees on how this affine is oriented (source: nibabel)
    np.testing.assert_array_equal(nib.orientations.io_orientation(aff),
                                  nib.orientations.axcodes2ornt(("P", "I", "L")))
    assert (plane_axis(aff, "axial"), plane_axis(aff, "coronal"), plane_axis(aff, "sagittal")) == (1, 0, 2)
    # every permutation and flip, plus a 20 degree oblique tilt: answers follow nib.aff2axcodes
    t = np.deg2rad(20.0)
    tilt = np.eye(4)
    tilt[:3, :3] = [[1, 0, 0], [0, np.cos(t), -np.sin(t)], [0, np.sin(t), np.cos(t)]]
    for perm in itertools.permutations(["RL", "AP", "SI"]):
        for flips in itertools.product([0, 1], repeat=3):
            aff = tilt @ axcodes_affine(tuple(p[f] for p, f in zip(perm, flips)))
            codes = nib.aff2axcodes(aff)  # source: nibabel
            for plane, letters in [("axial", "SI"), ("coronal", "AP"), ("sagittal", "RL")]:
                assert codes[plane_axis(aff, plane)] in letters


def test_plane_axis_errors():
    with pytest.raises(ConfigError, match=r"patch\.plane: unknown plane 'transverse'"):
        plane_axis(AFF, "transverse")
    flat = AFF.copy()
    flat[:, 2] = 0  # degenerate: no voxel axis along I/S (nib.aff2axcodes gives None)
    with pytest.raises(CohortError, match=r"no voxel axis along I/S"):
        plane_axis(flat, "axial")


# --------------------------------------------------------------------------------------------
# masks and normalisation


def test_derive_mask_largest_component_filled():
    data = np.zeros((2,) + SHAPE, np.float32)
    data[:, 2:9, 3:11, 2:8] = 5.0          # the brain: a box
    data[1, 5, 7, 5] = 0.0                  # a hole inside it (zero in one contrast)
    data[:, 9, 11, 8] = 5.0                 # touches the box corner (8, 10, 7) only diagonally
    data[:, 11, 0, 0] = 5.0                 # a stray voxel far away
    data[0, 1, 7, 5] = 5.0                  # positive in one contrast only: not brain
    expected = np.zeros(SHAPE, bool)
    expected[2:9, 3:11, 2:8] = True
    expected[9, 11, 8] = True
    positive = np.all(data > 0, axis=0)
    # source: scipy.ndimage.label - the corner voxel is its own component with the default
    # 6-connectivity but joins the box with 26-connectivity; the stray voxel is separate either way.
    lab6, n6 = ndimage.label(positive)
    lab26, n26 = ndimage.label(positive, structure=ndimage.generate_binary_structure(3, 3))
    assert (n6, n26) == (3, 2)
    assert lab6[9, 11, 8] != lab6[8, 10, 7] and lab26[9, 11, 8] == lab26[8, 10, 7]
    assert not positive[5, 7, 5]
    mask = derive_mask(data)
    assert mask.dtype == bool and mask.shape == SHAPE
    np.testing.assert_array_equal(mask, expected)
    assert mask[5, 7, 5] and not mask[11, 0, 0] and not mask[1, 7, 5]
    # source: scipy.ndimage.binary_fill_holes fills exactly the enclosed voxel
    np.testing.assert_array_equal(ndimage.binary_fill_holes(expected & positive), expected)


def test_derive_mask_empty():
    with pytest.raises(CohortError, match=r"subject x: no voxel is > 0 in every contrast.*'mask' column"):
        derive_mask(np.zeros((2,) + SHAPE, np.float32), what="subject x")


def test_normalise_errors():
    vol = scan(np.random.default_rng(3))
    with pytest.raises(ConfigError, match=r"cohort\.normalisation: unknown method 'minmax'"):
        normalise(vol, BRAIN, "minmax")
    with pytest.raises(CohortError, match=r"volume shape \(12, 14, 10\) differs from mask shape \(12, 14\)"):
        normalise(vol, BRAIN[..., 0])
    with pytest.raises(CohortError, match=r"the mask is empty"):
        normalise(vol, np.zeros(SHAPE, bool))


@pytest.mark.parametrize("n_controls", [3, 4])
def test_cohort_mask_majority_rule(tmp_path, n_controls):
    rng = np.random.default_rng(4)
    core = np.zeros(SHAPE, bool)
    core[3:9, 3:11, 2:8] = True
    in_two, in_one, in_case = (1, 1, 1), (10, 12, 8), (1, 12, 1)
    lines = [["subject", "role", "T1w", "mask"]]
    masks = []
    for i in range(n_controls + 1):
        m = core.copy()
        role = "control" if i < n_controls else "case"
        if role == "control" and i < 2:
            m[in_two] = True
        if role == "control" and i == 2:
            m[in_one] = True
        if role == "case":
            m[in_case] = True
        masks.append(m)
        save(tmp_path / f"s{i}_T1w.nii.gz", scan(rng))
        save(tmp_path / f"s{i}_mask.nii.gz", m.astype(np.int16))
        lines.append([f"s{i}", role, f"s{i}_T1w.nii.gz", f"s{i}_mask.nii.gz"])
    c = load_cohort(write_manifest(tmp_path / "manifest.csv", lines), progress=False)
    counts = np.sum(masks[:n_controls], axis=0)
    np.testing.assert_array_equal(c.mask, 2 * counts >= n_controls)
    assert c.mask[in_two] and not c.mask[in_one] and not c.mask[in_case]
    extra = c.mask & ~core
    assert extra.sum() == 1 and extra[in_two]


def test_cohort_mask_empty(tmp_path):
    rng = np.random.default_rng(5)
    lines = [["subject", "role", "T1w", "mask"]]
    for i in range(3):
        m = np.zeros(SHAPE, bool)
        m[4 * i:4 * i + 3, 4:8, 4:8] = True
        save(tmp_path / f"s{i}.nii.gz", scan(rng))
        save(tmp_path / f"m{i}.nii.gz", m.astype(np.uint8))
        lines.append([f"s{i}", "control", f"s{i}.nii.gz", f"m{i}.nii.gz"])
    with pytest.raises(CohortError, match=r"masks of the 3 controls share no voxel"):
        load_cohort(write_manifest(tmp_path / "manifest.csv", lines), progress=False)


# --------------------------------------------------------------------------------------------
# bad images and grids


def test_different_affines_between_subjects(tmp_path):
    rng = np.random.default_rng(6)
    moved = AFF.copy()
    moved[1, 3] += 2.0
    overrides = {(1, "T1w"): (scan(rng), moved), (1, "FLAIR"): (scan(rng), moved)}
    with pytest.raises(CohortError, match=r"T1w image of subject s01: .*s01_T1w\.nii\.gz has an affine that differs from "
                                          r"the grid of subject s00 \(first in the manifest\) by up to 2 .*expected .*found .*"
                                          r"resample every scan onto the template grid first"):
        load_cohort(simple_cohort(tmp_path, rng, overrides=overrides), progress=False)


def test_different_orientation_is_named(tmp_path):
    rng = np.random.default_rng(7)
    lps = AFF @ np.diag([-1.0, -1.0, 1.0, 1.0])
    lps[:3, 3] = AFF[:3, 3]
    assert nib.aff2axcodes(lps) == ("L", "P", "S")  # source: nibabel
    overrides = {(2, "T1w"): (scan(rng), lps)}
    with pytest.raises(CohortError, match=r"subject s02: .*orientation LPS vs RAS"):
        load_cohort(simple_cohort(tmp_path, rng, overrides=overrides), progress=False)


def test_different_affines_between_contrasts(tmp_path):
    rng = np.random.default_rng(8)
    moved = AFF.copy()
    moved[2, 3] += 0.5
    overrides = {(0, "FLAIR"): (scan(rng), moved)}
    with pytest.raises(CohortError, match=r"FLAIR image of subject s00: .*differs from the T1w image of subject s00"):
        load_cohort(simple_cohort(tmp_path, rng, overrides=overrides), progress=False)


def test_different_shapes(tmp_path):
    rng = np.random.default_rng(9)
    small = ellipsoid((12, 14, 9))
    overrides = {(1, "FLAIR"): (scan(rng, small), AFF)}
    with pytest.raises(CohortError, match=r"FLAIR image of subject s01: .* has shape \(12, 14, 9\), expected \(12, 14, 10\) "
                                          r"as in the grid of subject s00.*resample every scan onto the template grid first"):
        load_cohort(simple_cohort(tmp_path, rng, overrides=overrides), progress=False)


def test_nan_voxel(tmp_path):
    rng = np.random.default_rng(10)
    vol = scan(rng)
    vol[3, 4, 5] = np.nan
    vol[7, 8, 6] = np.inf
    overrides = {(1, "T1w"): (vol, AFF)}
    with pytest.raises(CohortError, match=r"T1w image of subject s01: .* has 2 non-finite voxels \(NaN or inf\), the first at voxel \(3, 4, 5\)"):
        load_cohort(simple_cohort(tmp_path, rng, overrides=overrides), progress=False)


@pytest.mark.parametrize("shape", [SHAPE + (3,), (12, 14)])
def test_not_3d(tmp_path, shape):
    path = save(tmp_path / "x.nii.gz", np.ones(shape, np.float32))
    with pytest.raises(CohortError, match=rf"T1w image of subject s: .* has shape {re_shape(shape)}, expected a 3D image"):
        load_image(path, "T1w image of subject s")


def re_shape(shape) -> str:
    return str(tuple(shape)).replace("(", r"\(").replace(")", r"\)")


def test_missing_image(tmp_path):
    rng = np.random.default_rng(11)
    manifest = simple_cohort(tmp_path, rng)
    (tmp_path / "s02_FLAIR.nii.gz").unlink()
    with pytest.raises(CohortError, match=r"FLAIR image of subject s02: file .*s02_FLAIR\.nii\.gz not found; fix the path"):
        load_cohort(manifest, progress=False)


def test_corrupt_files(tmp_path):
    garbage = tmp_path / "garbage.nii.gz"
    garbage.write_bytes(np.random.default_rng(12).bytes(2000))
    with pytest.raises(CohortError, match=r"^T1w image of subject s: cannot read .*garbage\.nii\.gz \(ImageFileError: .*\); the file is corrupt"):
        load_image(garbage, "T1w image of subject s")
    good = save(tmp_path / "good.nii.gz", scan(np.random.default_rng(13)))
    truncated = tmp_path / "truncated.nii.gz"
    truncated.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    with pytest.raises(CohortError, match=r"cannot read .*truncated\.nii\.gz \(EOFError: .*\); the file is corrupt"):
        load_image(truncated, "T1w image of subject s")


def test_not_nifti(tmp_path):
    path = tmp_path / "x.mgz"
    nib.save(nib.MGHImage(scan(np.random.default_rng(14)), AFF), path)
    with pytest.raises(CohortError, match=r"x\.mgz is a MGHImage, not a NIfTI image; convert it"):
        load_image(path, "T1w image of subject s")


def test_constant_image(tmp_path):
    rng = np.random.default_rng(15)
    overrides = {(2, "FLAIR"): (np.where(BRAIN, 7.0, 0.0).astype(np.float32), AFF)}
    with pytest.raises(CohortError, match=r"FLAIR image of subject s02 \(.*s02_FLAIR\.nii\.gz\): intensity is constant \(7\) inside the mask \(std 0\)"):
        load_cohort(simple_cohort(tmp_path, rng, overrides=overrides), progress=False)


def test_mask_and_lesion_errors(tmp_path):
    rng = np.random.default_rng(16)
    t1 = save(tmp_path / "t1.nii.gz", scan(rng))
    empty = save(tmp_path / "empty_mask.nii.gz", np.zeros(SHAPE, np.uint8))
    with pytest.raises(CohortError, match=r"mask of subject p1: .*empty_mask\.nii\.gz has no nonzero voxel"):
        load_subject({"T1w": t1}, subject="p1", mask=empty)
    other_shape = save(tmp_path / "mask_shape.nii.gz", np.ones((12, 14, 11), np.uint8))
    with pytest.raises(CohortError, match=r"mask of subject p1: .* has shape \(12, 14, 11\), expected \(12, 14, 10\) as in the T1w image of subject p1"):
        load_subject({"T1w": t1}, subject="p1", mask=other_shape)
    other_aff = save(tmp_path / "mask_aff.nii.gz", BRAIN.astype(np.uint8), AFF @ np.diag([2.0, 2.0, 2.0, 1.0]))
    with pytest.raises(CohortError, match=r"mask of subject p1: .*mask_aff\.nii\.gz has an affine that differs .*resample every scan"):
        load_subject({"T1w": t1}, subject="p1", mask=other_aff)
    with pytest.raises(CohortError, match=r"lesion mask of subject p1: .*mask_shape\.nii\.gz has shape \(12, 14, 11\)"):
        load_subject({"T1w": t1}, subject="p1", lesion=other_shape)
    with pytest.raises(CohortError, match=r"subject p1: no images given"):
        load_subject({}, subject="p1")
    with pytest.raises(ConfigError, match=r"cohort\.normalisation: unknown method 'robust'"):
        load_subject({"T1w": t1}, normalisation="robust")


# --------------------------------------------------------------------------------------------
# bad manifests


def test_too_few_controls(tmp_path):
    manifest = simple_cohort(tmp_path, np.random.default_rng(17), roles=("control", "case", "case"))
    with pytest.raises(CohortError, match=r"manifest .*manifest\.csv: 1 controls found, at least 3 needed; add healthy controls"):
        load_cohort(manifest, progress=False)
    manifest = simple_cohort(tmp_path, np.random.default_rng(17), roles=("case", "case"))
    with pytest.raises(CohortError, match=r"0 controls found, at least 2 needed"):
        load_cohort(manifest, min_controls=2, progress=False)
    with pytest.raises(ConfigError, match=r"cohort\.min_controls: got 0, need at least 1"):
        load_cohort(manifest, min_controls=0, progress=False)


def test_indices_unknown_role_and_progress_bar(tmp_path, capsys):
    c = load_cohort(simple_cohort(tmp_path, np.random.default_rng(18)), progress=True)
    assert "load cohort" in capsys.readouterr().err  # tqdm writes its bar to stderr
    assert c.indices("case").tolist() == []
    with pytest.raises(InputError, match=r"unknown role 'patient'"):
        c.indices("patient")


GOOD_HEADER = "subject,role,T1w,mask"


@pytest.mark.parametrize("text, pattern", [
    ("", r"manifest .* is empty; write a header line"),
    ("\n  \n", r"manifest .* is empty"),
    (GOOD_HEADER + "\n", r"has a header line but no subjects"),
    ("role,T1w\nc1,control,a.nii\n", r"has no 'subject' column \(found columns: role, T1w\)"),
    ("subject,T1w\nc1,a.nii\n", r"has no 'role' column \(found columns: subject, T1w\); add it"),
    ("subject,role,mask\nc1,control,m.nii\n", r"has no contrast column .*add one column per contrast"),
    ("subject,role,T1w,T1w\nc1,control,a.nii,b.nii\n", r"column 'T1w' appears more than once"),
    ("subject,role,T1w,\nc1,control,a.nii,\n", r"column 4 of the header has no name"),
    (GOOD_HEADER + "\nc1,control,a.nii,\nc2,patient,b.nii,\n", r"line 3 \(subject c2\): unknown role 'patient' in column 'role'"),
    (GOOD_HEADER + "\nc1,control,a.nii,\nc1,case,b.nii,\n", r"line 3 \(subject c1\): subject id 'c1' already used on line 2"),
    (GOOD_HEADER + "\nc1,control,,m.nii\n", r"line 2 \(subject c1\): empty cell in contrast column 'T1w'"),
    (GOOD_HEADER + "\n,control,a.nii,\n", r"line 2: empty 'subject' cell"),
    (GOOD_HEADER + "\nc1,control,a.nii\n", r"line 2: 3 cells but the header has 4 columns"),
])
def test_bad_manifest(tmp_path, text, pattern):
    path = tmp_path / "manifest.csv"
    path.write_text(text)
    with pytest.raises(CohortError, match=pattern):
        read_manifest(path)


def test_missing_manifest(tmp_path):
    with pytest.raises(CohortError, match=r"manifest .*nope\.csv not found"):
        load_cohort(tmp_path / "nope.csv", progress=False)


def test_manifest_bom_and_whitespace(tmp_path):
    # Spreadsheet exports often start with a UTF-8 byte-order mark (common practice, no source).
    path = tmp_path / "manifest.csv"
    path.write_bytes("\ufeffsubject, role ,T1w\n c1 ,control, a.nii \n".encode("utf-8"))
    rows, contrasts = read_manifest(path)
    assert contrasts == ("T1w",)
    assert rows == [ManifestRow("c1", "control", {"T1w": tmp_path.resolve() / "a.nii"}, None, None)]


# --------------------------------------------------------------------------------------------
# every bad line at once; normalisation choices


def test_read_manifest_collects_every_bad_line(tmp_path):
    path = tmp_path / "manifest.csv"
    path.write_text(GOOD_HEADER + "\nc1,control,a.nii,\nc2,patient,b.nii,\nc1,case,c.nii,\nc3,control,,\n"
                    ",control,d.nii,\nc4,control\nc5,case,e.nii,m.nii\n")
    with pytest.raises(CohortError, match=r"line 3 \(subject c2\): unknown role"):
        read_manifest(path)  # without a list: the first problem raises, as before
    problems = []
    rows, contrasts = read_manifest(path, problems)
    assert [r.subject for r in rows] == ["c1", "c5"] and contrasts == ("T1w",)
    assert [(p.subject, p.check) for p in problems] == [("c2", "manifest"), ("c1", "manifest"), ("c3", "manifest"),
                                                        ("", "manifest"), ("c4", "manifest")]
    assert [p.message.split(": ", 1)[1][:25] for p in problems] == [
        "unknown role 'patient' in", "subject id 'c1' already u", "empty cell in contrast co",
        "empty 'subject' cell; giv", "2 cells but the header ha"]
    assert all(p.file == str(path) for p in problems)
    only_bad = tmp_path / "bad.csv"
    only_bad.write_text(GOOD_HEADER + "\nc1,patient,a.nii,\n")
    problems = []
    assert read_manifest(only_bad, problems)[0] == [] and len(problems) == 1


def test_normalisation_choices(tmp_path):
    manifest = simple_cohort(tmp_path, np.random.default_rng(19), roles=("control",) * 4)
    with pytest.raises(ConfigError, match=r"cohort\.normalisation: unknown method 'minmax'; use one of zscore, histogram"):
        load_cohort(manifest, normalisation="minmax", progress=False)
    with pytest.raises(ConfigError, match=r"method 'histogram' needs landmarks learned on the controls; use load_cohort / prepare"):
        normalise(scan(np.random.default_rng(20)), BRAIN, "histogram")
    c = load_cohort(manifest, normalisation="histogram", progress=False)
    assert c.normalisation == "histogram" and c.normalisation_params["controls"] == 4
    assert set(c.stats["s00"]["T1w"]) == {"mean", "std", "landmarks"}
    z = load_cohort(manifest, progress=False)
    assert z.normalisation_params == {"method": "zscore", "within": "mask"} and z.cache is None
    # through stored parameters, a subject gets the same values as in the cohort
    rows, _ = read_manifest(manifest)
    sub = load_subject(rows[1].images, subject="s01", normalisation=c.normalisation_params)
    np.testing.assert_array_equal(sub.data, c.data[1])
    with pytest.raises(ConfigError, match=r"subject s01: normalisation: no valid histogram landmarks for contrast 'FLAIR' "
                                          r"\(found contrasts \['T1w'\]\); need 11 increasing numbers"):
        marks = c.normalisation_params["landmarks"]
        load_subject(rows[1].images, subject="s01", normalisation=dict(c.normalisation_params, landmarks={"T1w": marks["T1w"]}))


def test_select_contrasts(tiny_manifest):
    from embed.cohort import select_contrasts

    cohort = load_cohort(tiny_manifest, progress=False)
    assert select_contrasts(cohort, ()) is cohort
    flair = select_contrasts(cohort, ["FLAIR"])
    assert flair.contrasts == ("FLAIR",) and flair.data.shape[1] == 1
    assert np.shares_memory(flair.data, cohort.data)  # one contrast: a view, nothing copied
    np.testing.assert_array_equal(flair.data[:, 0], cohort.data[:, cohort.contrasts.index("FLAIR")])
    assert all(set(st) == {"FLAIR"} for st in flair.stats.values())
    swapped = select_contrasts(cohort, ["FLAIR", "T1w"])
    np.testing.assert_array_equal(swapped.data[:, 1], cohort.data[:, 0])
    with pytest.raises(ConfigError, match=r"cohort.contrasts: 'PD' is not a contrast of the cohort \(T1w, FLAIR\)"):
        select_contrasts(cohort, ["PD"])

"""Tests for embed.synth: synthetic cohorts on the MNI152 2009 grid and lesion injection.

One small cohort (4 mm voxels, 3 controls, 4 cases: one of each lesion kind) is generated once per module.
"""

import csv
import json
import pathlib

import nibabel as nib
import numpy as np
import pytest
from nilearn import datasets
from scipy import ndimage

import embed
from embed import synth
from embed.errors import InputError

VS = 4  # mm; the coarse grid keeps the module fast
SEED = 7
REPO = pathlib.Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    out = tmp_path_factory.mktemp("cohort")
    manifest = synth.make_cohort(out, n_controls=3, n_cases=4, seed=SEED, voxel_size=VS, progress=False)
    with open(manifest, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    return out, manifest, rows


@pytest.fixture(scope="module")
def reference():
    """Outside reference (source: nilearn's bundled MNI152 2009 templates, resampled by nilearn)."""
    t1 = datasets.load_mni152_template(resolution=VS)
    gm = datasets.load_mni152_gm_template(resolution=VS).get_fdata()
    wm = datasets.load_mni152_wm_template(resolution=VS).get_fdata()
    brain = datasets.load_mni152_brain_mask(resolution=VS).get_fdata() > 0
    return {"shape": t1.shape, "affine": t1.affine, "gm": gm, "wm": wm, "brain": brain}


def _load(out, rel):
    return nib.load(out / rel)


def _template_tissue(voxel_size=VS):
    tpl = synth.load_template(voxel_size)
    mask = tpl.mask > 0.5
    gm, wm = tpl.gm.astype(np.float64) * mask, tpl.wm.astype(np.float64) * mask
    return {"gm": gm, "wm": wm, "csf": np.clip(1 - gm - wm, 0, 1) * mask}, mask, tpl


def _boundary_voxel(tissue, mask, margin=6):
    gm, wm = tissue["gm"], tissue["wm"]
    cand = mask & (gm > 0.35) & (gm < 0.65) & (wm > 0.35) & (wm < 0.65)
    inner = np.zeros_like(cand)
    inner[tuple(slice(margin, s - margin) for s in cand.shape)] = True
    idx = np.argwhere(cand & inner)
    return tuple(int(v) for v in idx[len(idx) // 2])


# ---------------------------------------------------------------- files, manifest, grid


def test_manifest_columns_roles_and_relative_paths(cohort):
    out, manifest, rows = cohort
    assert manifest == out / "manifest.csv" and synth.demo_cohort_ready(out)
    with open(manifest, newline="", encoding="utf-8") as f:
        assert next(csv.reader(f)) == ["subject", "role", "T1w", "FLAIR", "mask", "lesion"]
    assert [r["subject"] for r in rows] == ["ctl01", "ctl02", "ctl03", "pat01", "pat02", "pat03", "pat04"]
    assert [r["role"] for r in rows] == ["control"] * 3 + ["case"] * 4
    for r in rows:
        assert (r["lesion"] == "") == (r["role"] == "control")
        for key in ("T1w", "FLAIR", "mask", "lesion"):
            if r[key]:
                assert not pathlib.PurePath(r[key]).is_absolute() and "\\" not in r[key] and ".." not in r[key]
                assert (manifest.parent / r[key]).is_file()
    leftovers = [p.name for p in out.rglob("*") if p.name.startswith(".tmp-")]
    assert leftovers == []
    assert not synth.demo_cohort_ready(out / "images")


def test_every_image_is_on_the_template_grid(cohort, reference):
    out, _, rows = cohort
    for r in rows:
        for key in ("T1w", "FLAIR", "mask", "lesion"):
            if not r[key]:
                continue
            img = _load(out, r[key])
            assert img.shape == reference["shape"]  # source: nilearn MNI152 2009 template at 4 mm
            np.testing.assert_allclose(img.affine, reference["affine"], atol=1e-6)
            # NIfTI-1 standard: NIFTI_XFORM_MNI_152 = 4 for both sform_code and qform_code
            assert int(img.header["sform_code"]) == 4 and int(img.header["qform_code"]) == 4
            assert nib.aff2axcodes(img.affine) == ("R", "A", "S")  # nibabel orientation codes
            want = np.float32 if key in synth.CONTRASTS else np.uint8
            assert img.get_data_dtype() == want


def test_images_zero_outside_positive_inside_finite(cohort):
    out, _, rows = cohort
    for r in rows:
        mask = np.asarray(_load(out, r["mask"]).dataobj)
        assert set(np.unique(mask)) == {0, 1}
        for c in synth.CONTRASTS:
            img = np.asarray(_load(out, r[c]).dataobj)
            assert np.isfinite(img).all()
            assert (img[mask == 0] == 0).all()
            assert (img[mask == 1] > 0).all()


def test_tissue_contrast_follows_t1_and_flair_physics(cohort, reference):
    out, _, rows = cohort
    gm, wm = reference["gm"], reference["wm"]
    # tissue-dominant voxels chosen on the nilearn template maps (source: nilearn MNI152 2009 GM/WM)
    pick = {"wm": wm > 0.9, "gm": gm > 0.9, "csf": reference["brain"] & (1 - gm - wm > 0.9)}
    for r in rows:
        mask = np.asarray(_load(out, r["mask"]).dataobj) == 1
        for c in synth.CONTRASTS:
            img = np.asarray(_load(out, r[c]).dataobj)
            mean = {k: img[v & mask].mean() for k, v in pick.items()}
            if c == "T1w":  # T1-weighted: WM brighter than GM, CSF dark (common practice, no source)
                assert mean["wm"] > mean["gm"] > mean["csf"], (r["subject"], mean)
            else:  # FLAIR: GM brighter than WM, CSF suppressed (common practice, no source)
                assert mean["gm"] > mean["wm"] > mean["csf"], (r["subject"], mean)


def test_cohort_json_and_readme(cohort):
    out, _, _ = cohort
    meta = json.loads((out / "cohort.json").read_text(encoding="utf-8"))
    assert meta["seed"] == SEED and meta["voxel_size_mm"] == VS
    assert (meta["n_controls"], meta["n_cases"]) == (3, 4)
    assert meta["nominal_intensity"] == synth.NOMINAL_INTENSITY
    assert meta["twinpatch_version"] == embed.__version__
    assert sorted(meta["subjects"]) == ["ctl01", "ctl02", "ctl03", "pat01", "pat02", "pat03", "pat04"]
    text = (out / "README.md").read_text(encoding="utf-8")
    assert text == synth.README_TEXT and "Larchmont Valley Imaging Centre" in text
    assert "twinpatch synth demo_data --controls 20 --cases 4 --seed 0" in text
    assert (REPO / "demo_data" / "README.md").read_text(encoding="utf-8") == text  # the committed copy


# ---------------------------------------------------------------- lesions on disk


def test_lesion_masks_and_parameters_are_consistent(cohort):
    out, _, rows = cohort
    records = json.loads((out / "lesions.json").read_text(encoding="utf-8"))
    cases = [r for r in rows if r["role"] == "case"]
    assert sorted(records) == [r["subject"] for r in cases]
    affine = _load(out, cases[0]["mask"]).affine
    for k, r in enumerate(cases):
        lesion = np.asarray(_load(out, r["lesion"]).dataobj) == 1
        brain = np.asarray(_load(out, r["mask"]).dataobj) == 1
        (rec,) = records[r["subject"]]
        assert rec["kind"] == synth.LESION_KINDS[k]  # cases cycle through the kinds in order
        assert lesion.any() and not (lesion & ~brain).any()
        _, n_components = ndimage.label(lesion)  # source: scipy.ndimage.label (6-connectivity)
        assert n_components == 1
        assert rec["n_voxels"] == int(lesion.sum())
        assert lesion[tuple(rec["centre_vox"])]
        np.testing.assert_allclose(rec["centre_mm"], (affine @ [*rec["centre_vox"], 1])[:3])
        assert 3.0 <= rec["radius_mm_drawn"] <= 10.0
        assert rec["radius_mm"] == pytest.approx(max(rec["radius_mm_drawn"], synth.MIN_RADIUS_VOX * VS))
        assert (0.05 <= rec["flair_gain"] <= 0.25) == (rec["kind"] in ("flair", "mixed"))
        assert (1.0 <= rec["blur_sigma_vox"] <= 2.0) == (rec["kind"] in ("blurring", "mixed"))
        assert (1.0 <= rec["thickening_vox"] <= 2.0) == (rec["kind"] == "thickening")
        assert rec["rng_seed"] == [SEED, 1, k, 1]


def test_same_seed_same_arrays_other_seed_differs(cohort, tmp_path):
    out, _, rows = cohort
    again = tmp_path / "again"
    again.mkdir()
    (again / "README.md").write_text("a committed copy\n", encoding="utf-8")  # allowed in out_dir
    synth.make_cohort(again, n_controls=3, n_cases=1, seed=SEED, voxel_size=VS, progress=False)
    assert (again / "README.md").read_text(encoding="utf-8") == synth.README_TEXT
    other = synth.make_cohort(tmp_path / "other", n_controls=3, n_cases=1, seed=SEED + 1, voxel_size=VS,
                              progress=False)
    for r in rows[:4]:  # a subject does not depend on how many others are generated
        for key in ("T1w", "FLAIR", "mask", "lesion"):
            if r[key]:
                a = np.asarray(_load(out, r[key]).dataobj)
                assert np.array_equal(a, np.asarray(_load(again, r[key]).dataobj)), (r["subject"], key)
        for c in synth.CONTRASTS:
            a = np.asarray(_load(out, r[c]).dataobj)
            assert not np.array_equal(a, np.asarray(_load(other.parent, r[c]).dataobj))


def test_existing_manifest_is_not_overwritten(cohort):
    out, manifest, _ = cohort
    before = manifest.read_bytes()
    with pytest.raises(InputError, match=r"already holds a cohort \(manifest.csv\); choose another folder"):
        synth.make_cohort(out, n_controls=3, n_cases=0, voxel_size=VS, progress=False)
    assert manifest.read_bytes() == before


@pytest.mark.parametrize("kwargs, match", [
    ({"n_controls": 2}, r"n_controls must be a whole number >= 3; got 2"),
    ({"n_controls": 3.0}, r"n_controls must be a whole number >= 3; got 3.0"),
    ({"n_cases": -1}, r"n_cases must be a whole number >= 0; got -1"),
    ({"seed": -5}, r"seed must be a whole number >= 0; got -5"),
    ({"lesions_per_case": 0}, r"lesions_per_case must be a whole number >= 1"),
    ({"voxel_size": 2.5}, r"voxel_size must be a whole number of mm from 1 to 4.*got 2.5"),
    ({"voxel_size": 8}, r"voxel_size must be a whole number of mm from 1 to 4.*got 8"),
    ({"lesion_kinds": ("flair", "bogus")}, r"lesion_kinds must be one or more of thickening.*'bogus'"),
    ({"lesion_kinds": ()}, r"lesion_kinds must be one or more of"),
])
def test_bad_arguments_raise_input_error(tmp_path, kwargs, match):
    args = {"n_controls": 3, "n_cases": 1, "voxel_size": VS, "progress": False, **kwargs}
    with pytest.raises(InputError, match=match):
        synth.make_cohort(tmp_path / "c", **args)
    assert not (tmp_path / "c").exists()  # nothing written before the arguments are checked


def test_out_dir_that_is_a_file_is_refused(tmp_path):
    target = tmp_path / "cohort"
    target.write_text("x", encoding="utf-8")
    with pytest.raises(InputError, match=r"is a file, not a folder"):
        synth.make_cohort(target, n_controls=3, n_cases=0, voxel_size=VS, progress=False)


# ---------------------------------------------------------------- lesion injection on arrays


def test_flair_lesion_raises_flair_only_inside():
    tissue, mask, _ = _template_tissue()
    centre = _boundary_voxel(tissue, mask)
    keep = {k: v.copy() for k, v in tissue.items()}
    gain0 = np.ones(mask.shape)
    lesion = synth.Lesion("flair", centre, radius_vox=2.5, flair_gain=0.2)
    new, gain, lesion_mask = synth.inject_lesion(tissue, gain0, mask, lesion)
    assert all(np.array_equal(tissue[k], keep[k]) for k in keep) and (gain0 == 1).all()  # pure
    assert all(np.array_equal(new[k], tissue[k]) for k in synth.TISSUES)  # anatomy untouched
    assert lesion_mask.any() and not (lesion_mask & ~mask).any()
    assert (gain[lesion_mask] >= 1 + 0.2 * 0.5 - 1e-12).all()  # w >= 0.5 inside the mask
    w = synth.lesion_weight(mask.shape, centre, 2.5)
    assert (gain[w == 0] == 1).all()
    flair = synth.NOMINAL_INTENSITY["FLAIR"]
    before, after = synth.render(tissue, flair), synth.render(new, flair) * gain
    assert (after[lesion_mask] > before[lesion_mask]).all()


def test_flair_lesion_in_a_generated_subject(tmp_path):
    tpl = synth.load_template(VS)
    base = synth.make_subject(tpl, np.random.default_rng([3, 1, 0]))
    case = synth.make_subject(tpl, np.random.default_rng([3, 1, 0]), ("flair",), np.random.default_rng([3, 1, 0, 1]))
    assert np.array_equal(base.images["T1w"], case.images["T1w"]) and np.array_equal(base.mask, case.mask)
    diff = case.images["FLAIR"].astype(np.float64) - base.images["FLAIR"]
    assert (diff[case.lesion_mask] > 0).all()
    (rec,) = case.lesions
    w = synth.lesion_weight(tpl.gm.shape, rec["centre_vox"], rec["radius_mm"] / VS)
    assert (diff[w == 0] == 0).all()


def test_blurring_lesion_smooths_texture_but_keeps_the_mean():
    tissue, mask, _ = _template_tissue()
    centre = _boundary_voxel(tissue, mask)
    lesion = synth.Lesion("blurring", centre, radius_vox=3.0, blur_sigma_vox=1.5)
    new, gain, lesion_mask = synth.inject_lesion(tissue, np.ones(mask.shape), mask, lesion)
    assert (gain == 1).all()
    t1 = synth.NOMINAL_INTENSITY["T1w"]
    before, after = synth.render(tissue, t1), synth.render(new, t1)
    grad = [np.sqrt(sum(g ** 2 for g in np.gradient(img)))[lesion_mask].mean() for img in (before, after)]
    assert grad[1] < 0.85 * grad[0], grad
    mean_before, mean_after = before[lesion_mask].mean(), after[lesion_mask].mean()
    assert abs(mean_after - mean_before) < 0.05 * mean_before


def test_thickening_turns_white_into_grey_matter():
    tissue, mask, _ = _template_tissue()
    centre = _boundary_voxel(tissue, mask)
    lesion = synth.Lesion("thickening", centre, radius_vox=3.0, thickening_vox=1.5)
    new, _, lesion_mask = synth.inject_lesion(tissue, np.ones(mask.shape), mask, lesion)
    gained = new["gm"] - tissue["gm"]
    assert gained[lesion_mask].sum() > 1.0  # more than one voxel's worth of GM inside the lesion
    assert (gained >= -1e-12).all()
    np.testing.assert_allclose(new["gm"] + new["wm"], tissue["gm"] + tissue["wm"], atol=1e-12)
    assert np.array_equal(new["csf"], tissue["csf"])
    assert new["wm"].min() >= 0 and new["gm"].max() <= 1 + 1e-12
    t1 = synth.NOMINAL_INTENSITY["T1w"]
    assert synth.render(new, t1)[lesion_mask].mean() < synth.render(tissue, t1)[lesion_mask].mean()


def test_two_lesions_per_case_do_not_overlap():
    tpl = synth.load_template(VS)
    subj = synth.make_subject(tpl, np.random.default_rng(1), ("flair", "blurring"), np.random.default_rng(2))
    masks = [synth.lesion_weight(tpl.gm.shape, r["centre_vox"], r["radius_mm"] / VS) > 0 for r in subj.lesions]
    assert not (masks[0] & masks[1]).any()
    assert sum(r["n_voxels"] for r in subj.lesions) == int(subj.lesion_mask.sum())


def test_draw_lesion_sits_on_a_grey_white_boundary():
    tissue, mask, _ = _template_tissue()
    lesion, drawn = synth.draw_lesion(tissue, mask, "mixed", VS, np.random.default_rng(0))
    again, _ = synth.draw_lesion(tissue, mask, "mixed", VS, np.random.default_rng(0))
    assert lesion == again
    c = lesion.centre_vox
    assert 0.2 <= tissue["gm"][c] <= 0.8 and 0.2 <= tissue["wm"][c] <= 0.8 and mask[c]
    assert lesion.radius_vox == pytest.approx(max(drawn / VS, synth.MIN_RADIUS_VOX))
    assert lesion.thickening_vox == 0 and lesion.flair_gain > 0 and lesion.blur_sigma_vox > 0


def test_injection_errors():
    tissue, mask, _ = _template_tissue()
    centre = _boundary_voxel(tissue, mask)
    gain = np.ones(mask.shape)
    with pytest.raises(InputError, match=r"lesion kind 'cyst' is unknown; use one of thickening"):
        synth.inject_lesion(tissue, gain, mask, synth.Lesion("cyst", centre, 2.0))
    with pytest.raises(InputError, match=r"lesion centre \(0, 0, 0\) is outside the grid .* or the brain mask"):
        synth.inject_lesion(tissue, gain, mask, synth.Lesion("flair", (0, 0, 0), 2.0, flair_gain=0.1))
    with pytest.raises(InputError, match=r"do not match the mask shape"):
        synth.inject_lesion(tissue, gain[:-1], mask, synth.Lesion("flair", centre, 2.0, flair_gain=0.1))
    csf_only = {"gm": 0 * tissue["gm"], "wm": 0 * tissue["wm"], "csf": mask.astype(float)}
    with pytest.raises(InputError, match=r"no room for a 'flair' lesion: no grey-white boundary voxel"):
        synth.draw_lesion(csf_only, mask, "flair", VS, np.random.default_rng(0))
    with pytest.raises(InputError, match=r"given without lesion_rng"):
        synth.make_subject(synth.load_template(VS), np.random.default_rng(0), ("flair",))

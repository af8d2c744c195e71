"""Score jobs end to end on the tiny cohort: store -> leave-one-out fit -> apply to a case."""

from __future__ import annotations

import csv
import json

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage

from embed.cli import main
from embed.errors import InputError
from embed.jobs import embed_store
from embed.report import CAUTION
from embed.scoring import score_apply, score_fit


@pytest.fixture(scope="module")
def fitted(tiny_run, tiny_manifest, tmp_path_factory):
    root = tmp_path_factory.mktemp("scoring")
    embed_store(tiny_run["bundle"], tiny_manifest, root / "store", progress=False)
    score_fit(root / "store", root / "scorer", scorer="gaussian", progress=False)
    return root


def _case_images(tiny_manifest, tmp_path, bump: float = 0.0):
    """ctl01's images, with FLAIR raised by ``bump`` (relative) inside a ball; returns (images, ball)."""
    root = tiny_manifest.parent
    images = {}
    flair = nib.load(root / "images" / "ctl01_FLAIR.nii.gz")
    data = flair.get_fdata(dtype=np.float32)
    ball = np.zeros(data.shape, bool)
    centre = np.array(data.shape) // 2 + np.array([6, 0, 2])
    idx = np.indices(data.shape)
    ball[((idx - centre[:, None, None, None]) ** 2).sum(0) <= 4] = True
    ball &= data > 0
    data[ball] *= 1 + bump
    images["FLAIR"] = tmp_path / "case_FLAIR.nii.gz"
    nib.save(nib.Nifti1Image(data, flair.affine, flair.header), images["FLAIR"])
    images["T1w"] = root / "images" / "ctl01_T1w.nii.gz"
    return images, ball


def test_apply_writes_maps_table_figures_and_finds_a_planted_change(fitted, tiny_manifest, tmp_path):
    images, ball = _case_images(tiny_manifest, tmp_path, bump=0.8)
    out = tmp_path / "out"
    summary = score_apply(fitted / "scorer", images, out, value=3.0, name="probe", progress=False)
    assert summary["caution"] == CAUTION
    score = nib.load(out / "score.nii.gz")
    labels = nib.load(out / "clusters.nii.gz").get_fdata().astype(int)
    # Outputs sit on the input grid (nibabel reads back the input affine).
    np.testing.assert_allclose(score.affine, nib.load(images["FLAIR"]).affine, atol=1e-4)
    with open(out / "clusters.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == summary["n_clusters"] >= 1
    # The table agrees with the label map: sizes recounted with numpy.
    for row in rows:
        assert int(row["size_voxels"]) == int((labels == int(row["rank"])).sum())
    # The planted FLAIR rise is in a cluster; scipy.ndimage.label finds that cluster connected.
    assert labels[ball].max() >= 1
    hit = labels == labels[ball].max()
    assert ndimage.label(hit, structure=np.ones((3, 3, 3)))[1] == 1
    assert len(summary["figures"]) == min(5, len(rows))
    assert all(p.endswith(".png") for p in summary["figures"])
    assert not list(out.glob(".*partial*"))


def test_unchanged_control_scores_lower_than_the_planted_change(fitted, tiny_manifest, tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    plain, ball = _case_images(tiny_manifest, tmp_path / "a", bump=0.0)
    bumped, _ = _case_images(tiny_manifest, tmp_path / "b", bump=0.8)
    score_apply(fitted / "scorer", plain, tmp_path / "plain", value=3.0, progress=False)
    score_apply(fitted / "scorer", bumped, tmp_path / "bumped", value=3.0, progress=False)
    z_plain = nib.load(tmp_path / "plain" / "score.nii.gz").get_fdata()
    z_bumped = nib.load(tmp_path / "bumped" / "score.nii.gz").get_fdata()
    assert z_bumped[ball].mean() > z_plain[ball].mean() + 3


def test_score_cli_and_errors(fitted, tiny_manifest, tiny_run, tmp_path, capsys):
    images, _ = _case_images(tiny_manifest, tmp_path)
    argv = ["score", "apply", str(fitted / "scorer"), "--image", f"T1w={images['T1w']}",
            "--image", f"FLAIR={images['FLAIR']}", "--out", str(tmp_path / "cli"), "--quiet"]
    assert main(argv) == 0
    assert "research use only" in capsys.readouterr().out
    meta = json.loads((tmp_path / "cli" / "summary.json").read_text())
    assert meta["threshold"]["top_fraction"] == 0.01
    with pytest.raises(InputError, match="is not a scorer folder"):
        score_apply(tmp_path, images, tmp_path / "x", progress=False)
    with pytest.raises(InputError, match="add --image FLAIR=PATH"):
        score_apply(fitted / "scorer", {"T1w": images["T1w"]}, tmp_path / "x", progress=False)
    with pytest.raises(InputError, match="leave-one-out scoring needs at least 3"):
        embed_store(tiny_run["bundle"], _two_controls(tiny_manifest, tmp_path), tmp_path / "s2", progress=False)
        score_fit(tmp_path / "s2", tmp_path / "sc2", progress=False)
    code = main(["score", "fit", str(tiny_run["bundle"]), "--out", str(tmp_path / "y")])
    assert code == 2 and "pass --controls MANIFEST" in capsys.readouterr().err
    assert main(["score", "fit", str(fitted / "store"), "--out", str(tmp_path / "oc"), "--jobs", "1", "--quiet"]) == 0
    assert json.loads((tmp_path / "oc" / "scorer.json").read_text())["params"]["n_jobs"] == 1
    code = main(["score", "fit", str(fitted / "store"), "--out", str(tmp_path / "oc2"), "--jobs", "0", "--quiet"])
    assert code == 2 and "--jobs 0" in capsys.readouterr().err


def _two_controls(manifest, tmp_path):
    with open(manifest, newline="") as f:
        rows = list(csv.DictReader(f))
    keep = [r for r in rows if r["role"] == "case"] + [r for r in rows if r["role"] == "control"][:2]
    for r in keep:
        for k in ("T1w", "FLAIR", "mask", "lesion"):
            if r[k]:
                r[k] = str(manifest.parent / r[k])
    out = tmp_path / "two.csv"
    with open(out, "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(keep)
    return out

"""Tests of embed.bids: discovery in a BIDS derivatives folder, and BIDS vs manifest caches."""

import csv
import json
import shutil

import numpy as np
import pytest

from embed.bids import BidsQuery, discover, parse_name
from embed.cache import load_cache, prepare, read_description
from embed.cohort import read_manifest
from embed.errors import CohortError, InputError
from tests.test_cohort import save, scan, write_manifest

SPACE = "MNI152NLin2009cAsym"


def test_parse_name():
    # entity-value pairs and a suffix, as in the BIDS specification's file naming (source: BIDS)
    assert parse_name("sub-01_ses-a_space-MNI_desc-brain_mask.nii.gz") == (
        {"sub": "01", "ses": "a", "space": "MNI", "desc": "brain"}, "mask")
    assert parse_name("sub-01_space-MNI_T1w.nii") == ({"sub": "01", "space": "MNI"}, "T1w")
    for bad in ("sub-01_T1w.mgz", "T1w.nii.gz", "space-MNI_sub-01_T1w.nii.gz", "sub-01_space_T1w.nii.gz",
                "sub-01_sub-02_T1w.nii.gz", "sub-0_1_T1w.nii.gz", "sub-01.nii.gz", "sub-01_space-MNI_T1-w.nii.gz"):
        assert parse_name(bad) is None, bad


def bids_from_manifest(manifest, root, participants=True):
    """A BIDS derivatives tree holding the same files as a manifest (copies), subject ids sub-<id>."""
    rows, contrasts = read_manifest(manifest)
    table = [["participant_id", "age", "group"]]
    for r in rows:
        anat = root / f"sub-{r.subject}" / "anat"
        anat.mkdir(parents=True)
        stem = f"sub-{r.subject}_space-{SPACE}"
        for c, path in r.images.items():
            shutil.copy(path, anat / f"{stem}_desc-preproc_{c}.nii.gz")
        if r.mask:
            shutil.copy(r.mask, anat / f"{stem}_desc-brain_mask.nii.gz")
        if r.lesion:
            shutil.copy(r.lesion, anat / f"{stem}_desc-lesion_mask.nii.gz")
        shutil.copy(r.images[contrasts[0]], anat / f"sub-{r.subject}_space-other_desc-preproc_{contrasts[0]}.nii.gz")
        table.append([f"sub-{r.subject}", "40", "control" if r.role == "control" else "patient"])
    if participants:
        (root / "participants.tsv").write_text("\n".join("\t".join(t) for t in table) + "\n")
    renamed = [["subject", "role", *contrasts, "mask", "lesion"]]
    for r in rows:
        renamed.append([f"sub-{r.subject}", r.role, *[str(p) for p in r.images.values()], str(r.mask or ""), str(r.lesion or "")])
    return write_manifest(root.parent / "renamed.csv", renamed), contrasts


@pytest.mark.parametrize("method", ["zscore", "histogram"])
def test_bids_and_manifest_give_the_same_cache(tiny_manifest, tmp_path, method):
    manifest, contrasts = bids_from_manifest(tiny_manifest, tmp_path / "derivatives")
    a = prepare(manifest, out=tmp_path / "from_manifest", normalisation=method, progress=False)
    b = prepare(bids=BidsQuery(tmp_path / "derivatives", SPACE, contrasts), out=tmp_path / "from_bids",
                normalisation=method, progress=False)
    assert a.subjects == b.subjects and b.subjects[0] == "sub-ctl01" and b.skipped == ()
    for name in ("data.f32", "masks.u8", "lesions.u8"):
        assert (tmp_path / "from_manifest" / name).read_bytes() == (tmp_path / "from_bids" / name).read_bytes()
    ca, cb = load_cache(tmp_path / "from_manifest"), load_cache(tmp_path / "from_bids")
    assert ca.stats == cb.stats and ca.normalisation_params == cb.normalisation_params
    np.testing.assert_array_equal(ca.mask, cb.mask)
    assert ca.roles == cb.roles and set(ca.lesions) == set(cb.lesions) == {"sub-pat01", "sub-pat02"}
    da, db = read_description(tmp_path / "from_manifest"), read_description(tmp_path / "from_bids")
    sha = lambda d: [{k: f["sha256"] for k, f in s["files"].items()} for s in d["subjects"]]
    assert sha(da) == sha(db)  # the same bytes were read
    assert db["source"]["kind"] == "bids" and db["source"]["space"] == SPACE
    assert (tmp_path / "from_bids" / "skipped.csv").read_text() == "subject,path,reason\n"
    assert not prepare(bids=BidsQuery(tmp_path / "derivatives", SPACE, contrasts), out=tmp_path / "from_bids",
                       normalisation=method, progress=False).rebuilt


def toy_tree(root, rng):
    """A small BIDS tree with one good subject per kind of skip."""
    def img(sub, name, ses=""):
        folder = root / sub / ses / "anat"
        save(folder / name, scan(rng))
        return folder / name
    for sub in ("sub-c1", "sub-c2", "sub-c3", "sub-p1"):
        for c in ("T1w", "FLAIR"):
            img(sub, f"{sub}_space-{SPACE}_{c}.nii.gz")
    img("sub-noflair", f"sub-noflair_space-{SPACE}_T1w.nii.gz")                     # a contrast is missing
    for c in ("T1w", "FLAIR"):
        img("sub-unlisted", f"sub-unlisted_space-{SPACE}_{c}.nii.gz")               # not in participants.tsv
        img("sub-odd", f"sub-odd_space-{SPACE}_{c}.nii.gz")                         # group value unknown
        img("sub-two", f"sub-two_space-{SPACE}_desc-a_{c}.nii.gz")                  # two candidates per contrast
        img("sub-two", f"sub-two_space-{SPACE}_desc-b_{c}.nii.gz")
        img("sub-long", f"sub-long_ses-1_space-{SPACE}_{c}.nii.gz", "ses-1")        # two sessions
        img("sub-long", f"sub-long_ses-2_space-{SPACE}_{c}.nii.gz", "ses-2")
    img("sub-c1", "sub-c1_space-other_T1w.nii.gz")                                    # another space: ignored
    img("sub-c1", "c1_T1w_badname.nii.gz")                                            # not a BIDS name
    img("sub-c2", f"sub-c9_space-{SPACE}_T1w.nii.gz")                                 # wrong folder
    (root / "participants.tsv").write_text(
        "participant_id\tgroup\n" + "".join(f"{s}\t{g}\n" for s, g in [
            ("sub-c1", "control"), ("sub-c2", "control"), ("sub-c3", "control"), ("sub-p1", "patient"),
            ("sub-noflair", "control"), ("sub-odd", "n/a"), ("sub-two", "control"), ("sub-long", "control"),
            ("sub-ghost", "control")]))


def test_discovery_reports_every_skip(tmp_path):
    toy_tree(tmp_path, np.random.default_rng(0))
    found = discover(BidsQuery(tmp_path, SPACE, ("T1w", "FLAIR")))
    assert [(r.subject, r.role) for r in found.rows] == [("sub-c1", "control"), ("sub-c2", "control"),
                                                        ("sub-c3", "control"), ("sub-p1", "case")]
    assert found.rows[0].images["T1w"].name == f"sub-c1_space-{SPACE}_T1w.nii.gz" and found.rows[0].mask is None
    why = {(s.subject, s.reason) for s in found.skipped}
    reasons = {s.subject: s.reason for s in found.skipped}
    assert reasons["sub-noflair"] == f"0 FLAIR images with space-{SPACE} in sub-noflair/anat"
    assert reasons["sub-unlisted"] == "not listed in participants.tsv; add it with its group"
    assert reasons["sub-odd"] == "group 'n/a' is neither a control value ['control'] nor a case value ['case', 'patient']"
    assert reasons["sub-two"].startswith(f"2 T1w images with space-{SPACE} in sub-two/anat (sub-two_space-{SPACE}_desc-a_T1w.nii.gz, ")
    assert reasons["sub-long"] == "complete data in sessions ses-1, ses-2; pick one with --session LABEL"
    assert reasons["sub-ghost"] == f"listed in participants.tsv but no image with space-{SPACE} under sub-ghost/"
    assert ("sub-c1", "file name is not BIDS (sub-<label>[_key-value...]_<suffix>.nii[.gz])") in why
    assert any(s.subject == "sub-c2" and "do not match the folder" in s.reason for s in found.skipped)
    assert len(found.skipped) == 8
    # the skips are written into the cache
    result = prepare(bids=BidsQuery(tmp_path, SPACE, ("T1w", "FLAIR")), out=tmp_path / "cache", progress=False)
    assert result.subjects == ("sub-c1", "sub-c2", "sub-c3", "sub-p1") and len(result.skipped) == 8
    with open(tmp_path / "cache" / "skipped.csv", newline="") as f:
        assert {r["subject"] for r in csv.DictReader(f)} == {s.subject for s in found.skipped}
    assert len(json.loads((tmp_path / "cache" / "cohort.json").read_text())["skipped"]) == 8
    # options pick among candidates
    two = discover(BidsQuery(tmp_path, SPACE, ("T1w", "FLAIR"), desc="b"))
    assert [r.subject for r in two.rows] == ["sub-two"] and two.rows[0].images["FLAIR"].name.endswith("desc-b_FLAIR.nii.gz")
    ses = discover(BidsQuery(tmp_path, SPACE, ("T1w", "FLAIR"), session="2"))
    assert [r.subject for r in ses.rows] == ["sub-long"] and "ses-2" in ses.rows[0].images["T1w"].name
    odd = discover(BidsQuery(tmp_path, SPACE, ("T1w",), control_values=("control", "n/a")))
    assert "sub-odd" in [r.subject for r in odd.rows] and "sub-noflair" in [r.subject for r in odd.rows]


def test_masks_sessions_and_no_participants(tmp_path):
    rng = np.random.default_rng(1)
    brain = scan(rng) > 0
    for i in range(3):
        anat = tmp_path / f"sub-{i}" / "ses-base" / "anat"
        save(anat / f"sub-{i}_ses-base_space-{SPACE}_T1w.nii.gz", scan(rng))
        save(anat / f"sub-{i}_ses-base_space-{SPACE}_desc-brain_mask.nii.gz", brain.astype(np.uint8))
    found = discover(BidsQuery(tmp_path, SPACE, ("T1w",)))
    assert [r.role for r in found.rows] == ["control"] * 3 and found.rows[0].mask.name.endswith("desc-brain_mask.nii.gz")
    assert found.notes == (f"no participants.tsv in {tmp_path.resolve()}: every subject is taken as a control",)
    assert found.rows[0].lesion is None
    save(tmp_path / "sub-0" / "ses-base" / "anat" / f"sub-0_ses-base_space-{SPACE}_label-x_desc-brain_mask.nii.gz",
         brain.astype(np.uint8))
    again = discover(BidsQuery(tmp_path, SPACE, ("T1w",)))
    assert [r.subject for r in again.rows] == ["sub-1", "sub-2"]
    assert again.skipped[0].reason.startswith("2 desc-brain masks in sub-0/ses-base/anat")
    c = load_cache(prepare(bids=BidsQuery(tmp_path, SPACE, ("T1w",)), out=tmp_path / "c", min_controls=2, progress=False).cache)
    np.testing.assert_array_equal(c.masks[0], brain)


def test_bids_errors(tmp_path):
    with pytest.raises(CohortError, match=r"BIDS folder .*nope not found; give the derivatives folder"):
        discover(BidsQuery(tmp_path / "nope", SPACE, ("T1w",)))
    with pytest.raises(InputError, match=r"--space: 'MNI 152' is not a BIDS label"):
        discover(BidsQuery(tmp_path, "MNI 152", ("T1w",)))
    with pytest.raises(InputError, match=r"--contrasts: \['T1w', 'T1w'\] must be distinct BIDS suffixes"):
        discover(BidsQuery(tmp_path, SPACE, ("T1w", "T1w")))
    with pytest.raises(InputError, match=r"--contrasts: \[\] must be distinct"):
        discover(BidsQuery(tmp_path, SPACE, ()))
    with pytest.raises(CohortError, match=rf"no subject has T1w images with space-{SPACE} \(0 skipped\); check --space and --contrasts"):
        discover(BidsQuery(tmp_path, SPACE, ("T1w",)))
    save(tmp_path / "sub-1" / "anat" / f"sub-1_space-{SPACE}_T1w.nii.gz", scan(np.random.default_rng(2)))
    (tmp_path / "participants.tsv").write_text("participant_id\tdiagnosis\nsub-1\tcontrol\n")
    with pytest.raises(CohortError, match=r"participants\.tsv: no column 'group' \(found columns: participant_id, diagnosis\); pass --group-column NAME"):
        discover(BidsQuery(tmp_path, SPACE, ("T1w",)))
    assert discover(BidsQuery(tmp_path, SPACE, ("T1w",), group_column="diagnosis")).rows[0].role == "control"
    (tmp_path / "participants.tsv").write_text("id\tgroup\nsub-1\tcontrol\n")
    with pytest.raises(CohortError, match=r"no column 'participant_id' .*BIDS names it participant_id"):
        discover(BidsQuery(tmp_path, SPACE, ("T1w",)))
    with pytest.raises(CohortError, match=r"participants table .*other\.tsv not found"):
        discover(BidsQuery(tmp_path, SPACE, ("T1w",), participants=tmp_path / "other.tsv"))

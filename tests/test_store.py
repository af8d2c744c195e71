"""The cohort embedding store: layout, merge, resume, shards, float16; and embed_store end to end."""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

import embed.store as st
from embed import load_encoder
from embed.cohort import load_cohort
from embed.errors import InputError
from embed.jobs import embed_store


def _fake(tmp_path, dtype="float32", n_sub=3, n_vox=50, dim=4):
    rng = np.random.default_rng(0)
    subjects = [f"s{i}" for i in range(n_sub)]
    voxels = np.argwhere(np.ones((5, 5, 2), bool))[:n_vox]
    path = st.create(tmp_path / "store", subjects=subjects, roles=["control"] * (n_sub - 1) + ["case"],
                     voxels=voxels, dim=dim, dtype=dtype)
    embs = {s: rng.normal(size=(n_vox, dim)).astype(np.float32) for s in subjects}
    return path, subjects, voxels, embs


def test_merge_is_voxel_major_and_blocks_read_back(tmp_path, monkeypatch):
    path, subjects, voxels, embs = _fake(tmp_path)
    for s in subjects:
        st.write_subject(path, s, embs[s], {"subject": s})
    monkeypatch.setattr(st, "MERGE_BLOCK_BYTES", 7 * 3 * 4 * 4)  # 7 voxels a block: several blocks
    st.merge(path, progress=False)
    data = np.load(path / "embeddings.npy")
    assert data.shape == (50, 3, 4)
    for i, s in enumerate(subjects):
        np.testing.assert_array_equal(data[:, i], embs[s])
    # One voxel's vectors for all subjects are adjacent on disk (C order: V, then S, then D).
    assert data.strides == (3 * 4 * 4, 4 * 4, 4)
    store = st.Store.open(path)
    np.testing.assert_array_equal(store.block(10, 20), np.stack([embs[s][10:20] for s in subjects]))
    np.testing.assert_array_equal(store.block(0, 5, subjects=store.indices("case")), embs["s2"][None, :5])
    np.testing.assert_array_equal(store.voxels, voxels)
    assert not list(path.rglob(".*partial*"))


def test_float16_error_is_recorded_and_bounded(tmp_path):
    path, subjects, _, embs = _fake(tmp_path, dtype="float16")
    side = st.write_subject(path, "s0", embs["s0"], {})
    # IEEE 754 half precision keeps 11 significant bits: rounding error <= 2**-11 of the value.
    assert 0 < side["max_abs_rounding_error"] <= 2.0 ** -11 * side["max_abs_value"]
    assert np.load(st.subject_path(path, "s0")).dtype == np.float16


def test_layout_is_checked_and_errors_are_clear(tmp_path):
    path, subjects, voxels, embs = _fake(tmp_path)
    st.create(path, subjects=subjects, roles=["control", "control", "case"], voxels=voxels, dim=4)  # same: no-op
    with pytest.raises(InputError, match="already holds a store with other dim"):
        st.create(path, subjects=subjects, roles=["control", "control", "case"], voxels=voxels, dim=8)
    with pytest.raises(InputError, match="over other voxels"):
        st.create(path, subjects=subjects, roles=["control", "control", "case"], voxels=voxels[::-1], dim=4)
    with pytest.raises(InputError, match="shape \\(3, 4\\), expected \\(50, 4\\)"):
        st.write_subject(path, "s0", embs["s0"][:3], {})
    with pytest.raises(InputError, match="'zz' is not in this store"):
        st.write_subject(path, "zz", embs["s0"], {})
    with pytest.raises(InputError, match="not merged yet \\(3 subjects missing\\)"):
        st.Store.open(path)
    with pytest.raises(InputError, match="3 subjects not embedded yet"):
        st.merge(path, progress=False)
    with pytest.raises(InputError, match="is not an embedding store"):
        st.Store.open(tmp_path)
    with pytest.raises(InputError, match="dtype must be one of"):
        st.create(tmp_path / "x", subjects=["a"], roles=["control"], voxels=voxels, dim=4, dtype="int8")
    (path / "store.json").write_text("{oops")
    with pytest.raises(InputError, match="store.json is damaged"):
        st.Store.open(path)


def test_embed_store_shards_resume_and_match_the_encoder(tiny_run, tiny_manifest, tmp_path):
    bundle = tiny_run["bundle"]
    whole = embed_store(bundle, tiny_manifest, tmp_path / "whole", progress=False)
    assert whole["merged"] and whole["embedded"] == 8
    first = embed_store(bundle, tiny_manifest, tmp_path / "sharded", shard=(1, 2), progress=False)
    assert not first["merged"] and len(first["remaining"]) == 4
    second = embed_store(bundle, tiny_manifest, tmp_path / "sharded", shard=(2, 2), progress=False)
    assert second["merged"] and second["embedded"] == 4
    a = np.load(tmp_path / "whole" / "embeddings.npy")
    np.testing.assert_array_equal(a, np.load(tmp_path / "sharded" / "embeddings.npy"))
    # The stored vectors are the encoder's dense embedding of each subject at the store's voxels.
    cohort = load_cohort(tiny_manifest, progress=False)
    enc = load_encoder(bundle)
    store = st.Store.open(tmp_path / "whole")
    assert store.subjects == cohort.subjects
    # Store voxels: inside at least half of the controls' masks, as the cohort mask.
    np.testing.assert_array_equal(store.voxels, np.argwhere(cohort.mask))
    vmask = cohort.mask
    i = 5
    dense = enc.embed_volume(cohort.data[i], vmask)
    np.testing.assert_allclose(a[:, i], dense[:, vmask].T, atol=1e-5)
    # Resume: a lost subject file is re-embedded, the others are skipped.
    (tmp_path / "whole" / "subjects" / f"{cohort.subjects[2]}.npy").unlink()
    again = embed_store(bundle, tiny_manifest, tmp_path / "whole", progress=False)
    assert again["embedded"] == 1 and again["skipped"] == 7 and again["merged"]
    np.testing.assert_array_equal(np.load(tmp_path / "whole" / "embeddings.npy"), a)


def test_embed_store_float16_and_bad_shard(tiny_run, tiny_manifest, tmp_path):
    res = embed_store(tiny_run["bundle"], tiny_manifest, tmp_path / "h", dtype="float16", progress=False)
    side = json.loads((tmp_path / "h" / "subjects" / "ctl01.json").read_text())
    assert res["merged"] and side["max_abs_rounding_error"] <= 2.0 ** -11 * side["max_abs_value"]
    with pytest.raises(InputError, match="--shard 3/2"):
        embed_store(tiny_run["bundle"], tiny_manifest, tmp_path / "x", shard=(3, 2), progress=False)


def test_grid_guard_refuses_then_records_an_override(tiny_run, tiny_manifest, tmp_path):
    from embed.jobs import embed_subject

    root = tiny_manifest.parent
    images = {}
    for c in ("T1w", "FLAIR"):
        img = nib.load(root / "images" / f"ctl01_{c}.nii.gz")
        flipped = img.affine.copy()
        flipped[0] *= -1  # x axis reversed: orientation LAS instead of RAS
        images[c] = tmp_path / f"{c}.nii.gz"
        nib.save(nib.Nifti1Image(img.get_fdata(dtype=np.float32), flipped), images[c])
    with pytest.raises(InputError, match="not on the encoder's grid: orientation LAS vs the encoder's RAS"):
        embed_subject(tiny_run["bundle"], images, tmp_path / "e.nii.gz", progress=False)
    assert not (tmp_path / "e.nii.gz").exists()
    out = embed_subject(tiny_run["bundle"], images, tmp_path / "e.nii.gz", progress=False, allow_grid_mismatch=True)
    side = json.loads(out.with_name("e.json").read_text())
    assert side["allowed_grid_mismatch"] == ["orientation LAS vs the encoder's RAS"]
    # The output keeps the input's affine (nibabel reads it back), even when it differs from the encoder's.
    np.testing.assert_allclose(nib.load(out).affine, nib.load(images["T1w"]).affine, atol=1e-4)

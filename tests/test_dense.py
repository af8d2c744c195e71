"""Tests of embed.dense: dense embedding equals per-patch embedding; embedding maps on disk."""

import json

import nibabel as nib
import numpy as np
import pytest
import torch

import embed.dense

from embed.dense import Encoder, write_embedding_map
from embed.errors import InputError
from embed.model import build

SHAPE = (13, 15, 11)
CONTRASTS = ["T1w", "FLAIR"]


def make_encoder(axis: int, p: int = 5, channels=(4, 6), dim: int = 3, seed: int = 0) -> Encoder:
    module = build(len(CONTRASTS), p, channels, dim, seed).encoder
    card = {"contrasts": list(CONTRASTS), "patch": {"axis": axis, "plane": "axial", "size": p}}
    return Encoder(module, card)


def naive_patches(vol: np.ndarray, voxels: np.ndarray, p: int, axis: int) -> np.ndarray:
    """Every listed voxel's p x p patch, zero outside the grid (np.pad + slicing, one voxel at a time).

    ``vol: (C, X, Y, Z)``, ``voxels: (N, 3)`` -> ``(N, C, p, p)``; rows follow the lower in-plane axis.
    """
    h = p // 2
    padded = np.pad(vol, [(0, 0)] + [(0, 0) if i == axis else (h, h) for i in range(3)])
    out = []
    for v in voxels:
        index = [slice(None)] + [v[i] if i == axis else slice(v[i], v[i] + p) for i in range(3)]
        out.append(padded[tuple(index)])
    return np.stack(out).astype(np.float32)


def masks(rng):
    random = rng.random(SHAPE) < 0.35
    corner = np.zeros(SHAPE, bool)
    corner[:4, 10:, 7:] = True  # touches three faces of the grid, not the others
    single = np.zeros(SHAPE, bool)
    single[12, 0, 5] = True
    return {"none": None, "random": random, "corner": corner, "single": single}


@pytest.mark.parametrize("axis", [0, 1, 2])
@pytest.mark.parametrize("p, channels", [(5, (4, 6)), (3, (4,)), (7, (3,))])
@pytest.mark.parametrize("which", ["none", "random", "corner", "single"])
@pytest.mark.parametrize("tile", [32, 4])
def test_embed_volume_equals_embed_patches(axis, p, channels, which, tile, monkeypatch):
    # tile=4 cuts the small grid into many tiles, so tile edges and partial tiles are exercised.
    monkeypatch.setattr(embed.dense, "TILE", tile)
    monkeypatch.setattr(embed.dense, "TILE_BATCH", 3)
    rng = np.random.default_rng(axis * 100 + p)
    vol = rng.normal(size=(2,) + SHAPE).astype(np.float32)
    mask = masks(rng)[which]
    enc = make_encoder(axis, p, channels)
    emb = enc.embed_volume(vol, mask)
    assert emb.shape == (enc.dim,) + SHAPE and emb.dtype == np.float32
    full = np.ones(SHAPE, bool) if mask is None else mask
    voxels = np.argwhere(full)
    want = enc.embed_patches(naive_patches(vol, voxels, p, axis))  # (N, D)
    got = emb[:, voxels[:, 0], voxels[:, 1], voxels[:, 2]].T
    assert np.abs(got - want).max() <= 1e-5  # fp32
    assert (emb[:, ~full] == 0).all()  # zero outside the mask
    if mask is not None:  # the masked-only path gives the same vectors, in np.argwhere order
        assert np.abs(enc.embed_masked(vol, mask) - got).max() <= 1e-5


def test_embed_volume_tiling_does_not_change_the_result(monkeypatch):
    rng = np.random.default_rng(1)
    vol = rng.normal(size=(2,) + SHAPE).astype(np.float32)
    enc = make_encoder(1)
    whole = enc.embed_volume(vol)
    monkeypatch.setattr(embed.dense, "TILE", 3)
    monkeypatch.setattr(embed.dense, "TILE_BATCH", 1)
    # Same values up to float32 rounding (convolution kernels may sum in another order per shape).
    np.testing.assert_allclose(enc.embed_volume(vol), whole, rtol=0, atol=1e-6)


def test_bf16_is_close_to_fp32():
    rng = np.random.default_rng(4)
    vol = rng.normal(size=(2,) + SHAPE).astype(np.float32)
    enc = make_encoder(2)
    fp32, bf16 = enc.embed_volume(vol), enc.embed_volume(vol, precision="bf16")
    # bfloat16 keeps 8 significant bits (about 2-3 decimal digits): errors of ~1 % of the scale.
    assert np.abs(bf16 - fp32).max() <= 0.03 * np.abs(fp32).max()
    assert not np.array_equal(bf16, fp32)
    with pytest.raises(InputError, match="precision must be one of"):
        enc.embed_volume(vol, precision="fp8")


def test_embed_volume_is_not_all_zero_and_depends_on_the_axis():
    rng = np.random.default_rng(2)
    vol = rng.normal(size=(2,) + SHAPE).astype(np.float32)
    a0, a2 = make_encoder(0).embed_volume(vol), make_encoder(2).embed_volume(vol)
    assert np.count_nonzero(a0) > 0.99 * a0.size  # no mask: every voxel gets an embedding
    assert not np.allclose(a0, a2)


def test_empty_mask_gives_zeros():
    vol = np.random.default_rng(3).normal(size=(2,) + SHAPE).astype(np.float32)
    emb = make_encoder(2).embed_volume(vol, np.zeros(SHAPE, bool))
    assert emb.shape == (3,) + SHAPE and emb.dtype == np.float32
    assert not emb.any()


def test_encoder_attributes_and_frozen_module():
    enc = make_encoder(1, p=5, dim=3)
    assert (enc.patch_size, enc.in_channels, enc.dim, enc.axis) == (5, 2, 3, 1)
    assert enc.channel_names == ("T1w", "FLAIR")
    assert not enc.module.training
    assert not any(p.requires_grad for p in enc.module.parameters())
    assert "T1w" in repr(enc) and "dim=3" in repr(enc)


def test_embed_patches_accepts_numpy_and_torch_and_empty():
    enc = make_encoder(2)
    x = np.random.default_rng(4).normal(size=(10, 2, 5, 5))  # float64 in, float32 out
    a = enc.embed_patches(x)
    b = enc.embed_patches(torch.from_numpy(x.astype(np.float32)))
    c = enc.embed_patches(x, batch_size=3)
    assert a.shape == (10, 3) and a.dtype == np.float32
    np.testing.assert_array_equal(a, b)
    np.testing.assert_allclose(a, c, rtol=0, atol=1e-6)
    empty = enc.embed_patches(np.zeros((0, 2, 5, 5)))
    assert empty.shape == (0, 3) and empty.dtype == np.float32


@pytest.mark.parametrize("vol_shape, match", [
    (SHAPE, r"embed_volume: expected a volume of shape \(2, X, Y, Z\) for contrasts \['T1w', 'FLAIR'\], "
            r"got \(13, 15, 11\)"),
    ((3,) + SHAPE, r"embed_volume: expected a volume of shape \(2, X, Y, Z\) .*got \(3, 13, 15, 11\)"),
    ((2, 1) + SHAPE, r"got \(2, 1, 13, 15, 11\)"),
])
def test_embed_volume_bad_volume_shape(vol_shape, match):
    with pytest.raises(InputError, match=match) as exc:
        make_encoder(2).embed_volume(np.zeros(vol_shape, np.float32))
    assert "\n" not in str(exc.value)


def test_embed_volume_bad_mask_shape():
    vol = np.zeros((2,) + SHAPE, np.float32)
    with pytest.raises(InputError, match=r"embed_volume: mask shape \(13, 15\) differs from the volume's grid \(13, 15, 11\)"):
        make_encoder(2).embed_volume(vol, np.ones(SHAPE[:2], bool))
    with pytest.raises(InputError, match=r"mask shape \(11, 15, 13\) differs"):
        make_encoder(2).embed_volume(vol, np.ones(SHAPE[::-1], bool))


@pytest.mark.parametrize("shape, got", [((4, 2, 3, 3), r"\(4, 2, 3, 3\)"), ((4, 1, 5, 5), r"\(4, 1, 5, 5\)"),
                                        ((2, 5, 5), r"\(2, 5, 5\)")])
def test_embed_patches_bad_shape(shape, got):
    with pytest.raises(InputError, match=rf"embed_patches: expected patches of shape \(N, 2, 5, 5\), got {got}"):
        make_encoder(2).embed_patches(np.zeros(shape, np.float32))


# --------------------------------------------------------------------------------------------
# write_embedding_map

# A plausible 4 mm grid with a small rotation (so the affine is not diagonal).
_t = np.deg2rad(7.0)
AFFINE = np.array([
    [4.0 * np.cos(_t), -4.0 * np.sin(_t), 0.0, -26.5],
    [4.0 * np.sin(_t), 4.0 * np.cos(_t), 0.0, -31.25],
    [0.0, 0.0, 4.0, -17.0],
    [0.0, 0.0, 0.0, 1.0],
])


def input_header(sform_code: int, qform_code: int):
    img = nib.Nifti1Image(np.zeros(SHAPE, np.float32), AFFINE)
    img.set_sform(AFFINE, code=sform_code)
    img.set_qform(AFFINE, code=qform_code)
    return img.header


@pytest.mark.parametrize("name", ["emb.nii.gz", "emb.nii"])
@pytest.mark.parametrize("sform_code, qform_code", [(4, 1), (1, 1), (2, 0), (3, 4)])
def test_write_embedding_map_roundtrip(tmp_path, name, sform_code, qform_code):
    rng = np.random.default_rng(5)
    emb = rng.normal(size=(3,) + SHAPE).astype(np.float32)
    sidecar = {"encoder": {"weights_sha256": "ab" * 32}, "contrasts": CONTRASTS, "note": "voxel-wise embedding"}
    out = write_embedding_map(tmp_path / "maps" / name, emb, AFFINE, input_header(sform_code, qform_code), sidecar)
    assert out == tmp_path / "maps" / name
    img = nib.load(out)  # nibabel is the reference reader
    assert img.shape == SHAPE + (3,)
    assert img.get_data_dtype() == np.float32
    np.testing.assert_array_equal(np.asanyarray(img.dataobj), np.moveaxis(emb, 0, -1))
    # The affine is stored as float32 in the NIfTI-1 header: equal within float32 rounding.
    np.testing.assert_allclose(img.affine, AFFINE, rtol=0, atol=np.abs(AFFINE).max() * 1e-6)
    np.testing.assert_allclose(img.get_sform(), AFFINE, rtol=0, atol=np.abs(AFFINE).max() * 1e-6)
    # NIfTI-1 xform codes (1 scanner, 2 aligned, 3 Talairach, 4 MNI; nibabel's nifti1.xform_codes)
    # kept from the input header.
    assert int(img.header["sform_code"]) == sform_code
    assert int(img.header["qform_code"]) == qform_code
    # NIfTI-1 intent code 1007 = NIFTI_INTENT_VECTOR (nibabel's nifti1.intent_codes table).
    assert int(img.header["intent_code"]) == nib.nifti1.intent_codes.code["vector"] == 1007
    side = tmp_path / "maps" / "emb.json"
    assert json.loads(side.read_text(encoding="utf-8")) == sidecar
    assert sorted(p.name for p in (tmp_path / "maps").iterdir()) == sorted([name, "emb.json"])  # no .partial left


def test_write_embedding_map_without_header_keeps_the_affine(tmp_path):
    emb = np.ones((2,) + SHAPE, np.float32)
    out = write_embedding_map(tmp_path / "e.nii.gz", emb, AFFINE, None, {})
    img = nib.load(out)
    # No input header: the affine goes to the sform with code 2 ("aligned", NIfTI-1), qform unused (0).
    assert int(img.header["sform_code"]) == 2 and int(img.header["qform_code"]) == 0
    np.testing.assert_allclose(img.affine, AFFINE, rtol=0, atol=np.abs(AFFINE).max() * 1e-6)


def test_write_embedding_map_header_with_no_transform_still_keeps_the_affine(tmp_path):
    # Both codes 0 would make readers ignore the affine (NIfTI-1); the sform then gets code 2.
    out = write_embedding_map(tmp_path / "e.nii", np.ones((2,) + SHAPE, np.float32), AFFINE, input_header(0, 0), {})
    img = nib.load(out)
    assert int(img.header["sform_code"]) == 2
    np.testing.assert_allclose(img.affine, AFFINE, rtol=0, atol=np.abs(AFFINE).max() * 1e-6)


def test_write_embedding_map_leaves_nothing_half_written(tmp_path, monkeypatch):
    def broken(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(json, "dumps", broken)  # the sidecar write fails after the image was written
    with pytest.raises(OSError, match="simulated"):
        write_embedding_map(tmp_path / "e.nii.gz", np.ones((2,) + SHAPE, np.float32), AFFINE, None, {"a": 1})
    assert list(tmp_path.iterdir()) == []

"""3D patches (``patch.dims = 3``): gather, network shapes, exact dense embedding, training, bundle."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch

from embed import load_encoder
from embed.bundle import describe, export_onnx, verify
from embed.cohort import load_cohort
from embed.config import load_config
from embed.dense import Encoder
from embed.errors import ConfigError
from embed.features import encoder_reach
from embed.fit import forward_pair, train
from embed.model import build, forward_matmul
from embed.monitor import recon_grid
from embed.pairs import check_patch_fits, gather_patches

from .conftest import TINY_OVERRIDES


def _cfg(manifest, *extra):
    return load_config(None, TINY_OVERRIDES + ["patch.dims=3", "patch.size=5", "model.channels=[4]", "model.dim=6",
                                               f'cohort.manifest="{manifest.as_posix()}"', *extra])


def test_cubes_are_slices_of_the_zero_padded_volume():
    rng = np.random.default_rng(0)
    data = rng.normal(size=(3, 2, 9, 10, 11)).astype(np.float32)
    p, h = 5, 2
    padded = np.pad(data, ((0, 0), (0, 0), (h, h), (h, h), (h, h)))
    centres = np.array([[4, 5, 5], [0, 0, 0], [8, 9, 10], [2, 7, 1], [4, 2, 10]])  # interior, corners, faces
    subjects = np.array([0, 1, 2, 1, 0])
    got = gather_patches(data, subjects, centres, p, None)
    assert got.shape == (5, 2, p, p, p) and got.dtype == np.float32
    for k, (s, (x, y, z)) in enumerate(zip(subjects, centres)):
        np.testing.assert_array_equal(got[k], padded[s, :, x:x + p, y:y + p, z:z + p])


def test_cube_must_fit_every_axis():
    check_patch_fits((9, 9, 9), 9, None)
    with pytest.raises(ConfigError, match=r"patch\.size=9 is larger than the grid's extent \[12, 12, 5\]"):
        check_patch_fits((12, 12, 5), 9, None)
    check_patch_fits((12, 12, 5), 9, 2)  # a 2D axial patch ignores the short axis


def test_network_shapes_follow_the_conv3d_shape_formula():
    # PyTorch docs (torch.nn.Conv3d): D_out = floor((D_in + 2 padding - dilation (k - 1) - 1) / stride + 1);
    # here padding 0, dilation 1, stride 1, so every 3x3x3 layer takes 2 voxels off each side.
    model = build(2, 7, (4, 8), 6, 0, dims=3)
    assert [m.kernel_size for m in model.encoder.layers if isinstance(m, torch.nn.Conv3d)] == [(3,) * 3, (3,) * 3, (3,) * 3]
    x = torch.randn(5, 2, 7, 7, 7)
    z, r = model(x)
    assert z.shape == (5, 6) and r.shape == x.shape
    big = torch.randn(1, 2, 11, 12, 13)
    assert model.encoder(big).shape == (1, 6, 11 - 6, 12 - 6, 13 - 6)


def test_dense_3d_embedding_equals_per_cube_embedding():
    rng = np.random.default_rng(1)
    module = build(2, 5, (4,), 6, 0, dims=3).encoder
    enc = Encoder(module, {"contrasts": ["T1w", "FLAIR"], "patch": {"size": 5, "dims": 3, "axis": None}})
    vol = rng.normal(size=(2, 19, 18, 21)).astype(np.float32)  # not a multiple of the 16-voxel tile
    mask = np.zeros(vol.shape[1:], bool)
    mask[1:18, 0:17, 3:21] = rng.random((17, 17, 18)) > 0.3  # touches the grid border
    dense = enc.embed_volume(vol, mask)
    vox = np.argwhere(mask)
    want = enc.embed_patches(gather_patches(vol[None], np.zeros(len(vox), np.int64), vox, 5, None))
    np.testing.assert_allclose(dense[:, mask].T, want, atol=1e-5)
    assert not dense[:, ~mask].any()
    np.testing.assert_allclose(enc.embed_masked(vol, mask), want, atol=1e-5)
    assert encoder_reach(enc) == (2, 2, 2)


def test_matmul_path_computes_the_3d_modules():
    # Same function and same gradients as the Conv3d / ConvTranspose3d modules (float32 matrix products).
    model = build(2, 7, (4, 6), 5, 0, dims=3)
    x = torch.randn(6, 2, 7, 7, 7)
    z0, r0 = model(x)
    z1, r1 = forward_matmul(model, x, torch.float32)
    torch.testing.assert_close(z1, z0, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(r1, r0, rtol=1e-5, atol=1e-5)
    params = list(model.parameters())
    g0 = torch.autograd.grad(z0.square().sum() + r0.square().sum(), params)
    g1 = torch.autograd.grad(z1.square().sum() + r1.square().sum(), params)
    for a, b in zip(g0, g1):
        torch.testing.assert_close(b, a, rtol=1e-4, atol=1e-5)


def test_bf16_pair_forward_is_close_to_fp32():
    model = build(1, 5, (4,), 6, 0, dims=3)
    a, b = torch.randn(8, 1, 5, 5, 5), torch.randn(8, 1, 5, 5, 5)
    full, half = forward_pair(model, a, b, "fp32"), forward_pair(model, a, b, "bf16")
    for f, h in zip(full, half):
        assert h.dtype == torch.float32 and h.shape == f.shape
        torch.testing.assert_close(h, f, rtol=0.05, atol=0.05)  # bfloat16 keeps 8 significant bits


def test_recon_grid_shows_the_middle_slice_of_cubes():
    x = np.random.default_rng(2).random((3, 1, 5, 5, 5)).astype(np.float32)
    np.testing.assert_array_equal(recon_grid(x, x), recon_grid(x[..., 2], x[..., 2]))


def test_train_export_and_embed_with_3d_patches(tiny_manifest, tmp_path):
    from embed.jobs import export_run

    cohort = load_cohort(tiny_manifest, progress=False)
    cfg = _cfg(tiny_manifest, "train.steps=12", "train.val_every=6", "train.projector_points=16")
    train(cfg, cohort, tmp_path / "run", progress=False)
    card = json.loads((tmp_path / "run" / "run.json").read_text())
    assert card["patch"] == {"size": 5, "dims": 3, "plane": None, "axis": None, "padding": "zeros"}
    assert card["architecture"]["dims"] == 3
    bundle = export_run(tmp_path / "run")
    enc = load_encoder(bundle)
    assert enc.dims == 3 and enc.axis is None
    card, ok = verify(bundle)
    assert ok and "5 x 5 x 5 voxels (3D)" in describe(card, ok)
    case = int(cohort.indices("case")[0])
    dense = enc.embed_volume(cohort.data[case], cohort.masks[case])
    vox = np.argwhere(cohort.masks[case])[::97]
    want = enc.embed_patches(gather_patches(cohort.data, np.full(len(vox), case), vox, 5, None))
    np.testing.assert_allclose(dense[:, vox[:, 0], vox[:, 1], vox[:, 2]].T, want, atol=1e-5)


def test_onnx_export_of_a_3d_encoder_matches_torch(tmp_path):
    ort = pytest.importorskip("onnxruntime")
    pytest.importorskip("onnx")
    module = build(1, 5, (4,), 6, 0, dims=3).encoder
    enc = Encoder(module, {"contrasts": ["T1w"], "patch": {"size": 5, "dims": 3, "axis": None}})
    path = export_onnx(enc, tmp_path / "enc.onnx")
    x = np.random.default_rng(3).normal(size=(2, 1, 9, 8, 10)).astype(np.float32)  # other sides than the export's
    got = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"]).run(None, {"x": x})[0]
    with torch.inference_mode():
        want = module(torch.from_numpy(x)).numpy()
    assert got.shape == (2, 6, 5, 4, 6)
    np.testing.assert_allclose(got, want, atol=1e-5)


def test_patch_dims_must_be_2_or_3():
    with pytest.raises(ConfigError, match=r"patch\.dims.*2 \(square patches in patch\.plane\) or 3 \(cubes\)"):
        load_config(None, ["patch.dims=4"])

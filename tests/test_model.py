"""Tests of embed.model: shapes, the too-small-patch error, seeded and side-effect-free build."""

import math

import numpy as np
import pytest
import torch
from torch import nn

from embed.errors import ConfigError
from embed.model import PatchDecoder, PatchEncoder, TwinAutoencoder, build, final_kernel


def conv2d_out(size: int, kernel: int, stride: int = 1, padding: int = 0, dilation: int = 1) -> int:
    """Output size of one Conv2d dimension.

    Source: the torch.nn.Conv2d documentation,
    H_out = floor((H_in + 2*padding - dilation*(kernel - 1) - 1) / stride + 1).
    """
    return math.floor((size + 2 * padding - dilation * (kernel - 1) - 1) / stride + 1)


def layer_by_layer(size: int, encoder: PatchEncoder) -> int:
    """Apply the Conv2d formula with each conv layer's own kernel, stride, padding and dilation."""
    for layer in encoder.modules():
        if isinstance(layer, nn.Conv2d):
            assert layer.kernel_size[0] == layer.kernel_size[1]
            size = conv2d_out(size, layer.kernel_size[0], layer.stride[0], layer.padding[0], layer.dilation[0])
    return size


def randn(seed: int, *shape: int) -> torch.Tensor:
    """Standard normal float32 tensor from an explicit numpy generator (test inputs stay reproducible)."""
    return torch.from_numpy(np.random.default_rng(seed).normal(size=shape).astype(np.float32))


CASES = [  # (in_channels, patch, channels, dim)
    (1, 3, (4,), 5),
    (2, 5, (4,), 8),
    (2, 5, (4, 6), 8),
    (3, 7, (8, 16), 16),
    (2, 9, (3, 5, 7), 4),
    (1, 11, (2,), 3),
]


@pytest.mark.parametrize("c, p, channels, dim", CASES)
@pytest.mark.parametrize("h, w", [(17, 12), (11, 11), (23, 14)])
def test_encoder_whole_image_shape_matches_conv2d_formula(c, p, channels, dim, h, w):
    model = build(c, p, channels, dim, seed=0)
    enc = model.encoder
    x = randn(h * w, 2, c, h, w)
    with torch.no_grad():
        y = enc(x)
    # torch.nn.Conv2d documentation formula, applied layer by layer.
    want = (2, dim, layer_by_layer(h, enc), layer_by_layer(w, enc))
    assert tuple(y.shape) == want
    # ... which, for stride-1 valid convolutions adding up to a p x p field of view, is H - p + 1.
    assert want[2:] == (h - p + 1, w - p + 1)
    convs = [m for m in enc.modules() if isinstance(m, nn.Conv2d)]
    assert len(convs) == len(channels) + 1
    assert convs[-1].kernel_size == (final_kernel(p, channels),) * 2


@pytest.mark.parametrize("c, p, channels, dim", CASES)
def test_encoder_on_patches_and_decoder_shapes(c, p, channels, dim):
    model = build(c, p, channels, dim, seed=1)
    assert isinstance(model, TwinAutoencoder)
    assert isinstance(model.encoder, PatchEncoder) and isinstance(model.decoder, PatchDecoder)
    x = randn(p, 6, c, p, p)
    with torch.no_grad():
        z = model.encoder.embed(x)
        r = model.decoder(z)
        z2, r2 = model(x)
    assert tuple(z.shape) == (6, dim)
    assert tuple(r.shape) == (6, c, p, p)
    assert z.dtype == r.dtype == torch.float32
    assert torch.equal(z, z2) and torch.equal(r, r2)
    with torch.no_grad():
        assert tuple(model.encoder(x).shape) == (6, dim, 1, 1)


def test_whole_image_output_is_the_patch_embedding_at_each_position():
    # The property dense embedding relies on: valid stride-1 convolutions only.
    model = build(2, 7, (4, 6), 5, seed=2)
    x = randn(3, 1, 2, 12, 10)
    with torch.no_grad():
        y = model.encoder(x)[0]  # (D, 6, 4)
        for i in range(y.shape[1]):
            for j in range(y.shape[2]):
                z = model.encoder.embed(x[:, :, i:i + 7, j:j + 7])[0]
                torch.testing.assert_close(y[:, i, j], z, rtol=0, atol=1e-5)


def test_embedding_of_a_patch_does_not_depend_on_the_batch():
    # No layer pools over the batch (no batch norm): a patch's embedding is the same alone or in a batch.
    model = build(2, 5, (4,), 3, seed=0)
    x = randn(4, 9, 2, 5, 5)
    with torch.no_grad():
        whole = model.encoder.embed(x)
        alone = torch.cat([model.encoder.embed(x[i:i + 1]) for i in range(9)])
    torch.testing.assert_close(whole, alone, rtol=0, atol=1e-6)


@pytest.mark.parametrize("p, channels, k", [(5, (8, 8), 1), (7, (8, 8), 3), (3, (4,), 1), (9, (1, 1, 1), 3)])
def test_final_kernel(p, channels, k):
    assert final_kernel(p, channels) == k


@pytest.mark.parametrize("p", [2, 4, 8])
def test_final_kernel_refuses_even_patch(p):
    # A p x p patch centred on a voxel exists only for odd p.
    with pytest.raises(ConfigError, match=rf"patch\.size={p} must be odd so the patch has a centre voxel"):
        final_kernel(p, (4,))
    with pytest.raises(ConfigError, match="must be odd"):
        build(1, p, (4,), 4, seed=0)


@pytest.mark.parametrize("p, channels, need", [(3, (8, 8), 5), (5, (8, 8, 8), 7), (1, (4,), 3)])
def test_final_kernel_patch_too_small(p, channels, need):
    match = (rf"patch\.size={p} is too small for model\.channels=\[{', '.join(map(str, channels))}\]: "
             rf"{len(channels)} valid 3x3 convolutions need a patch of at least {need}; "
             r"raise patch\.size or use fewer channels")
    with pytest.raises(ConfigError, match=match) as exc:
        final_kernel(p, channels)
    assert "\n" not in str(exc.value)
    with pytest.raises(ConfigError, match=r"too small"):
        build(1, p, channels, 4, seed=0)


def test_build_is_deterministic_for_a_seed():
    a = build(2, 7, (4, 8), 6, seed=11).state_dict()
    b = build(2, 7, (4, 8), 6, seed=11).state_dict()
    c = build(2, 7, (4, 8), 6, seed=12).state_dict()
    assert a.keys() == b.keys() == c.keys()
    assert all(torch.equal(a[k], b[k]) for k in a)
    assert not all(torch.equal(a[k], c[k]) for k in a)


def test_build_does_not_depend_on_or_touch_the_global_rng():
    torch.manual_seed(123)
    before = torch.get_rng_state()
    m1 = build(1, 5, (3,), 4, seed=7)
    after = torch.get_rng_state()
    assert torch.equal(before, after)
    # The next draw is what it would have been without build().
    drawn = torch.rand(5)
    torch.manual_seed(123)
    assert torch.equal(drawn, torch.rand(5))
    # And the weights do not depend on the caller's global state.
    torch.manual_seed(999)
    m2 = build(1, 5, (3,), 4, seed=7)
    for (k1, v1), (k2, v2) in zip(m1.state_dict().items(), m2.state_dict().items()):
        assert k1 == k2 and torch.equal(v1, v2)


# --------------------------------------------------------------------------------------------
# forward_matmul: the same network as matrix products (the fast training path)

from embed.model import forward_matmul, overlap_add, windows  # noqa: E402


@pytest.mark.parametrize("c, p, channels, dim", CASES)
def test_matmul_path_equals_modules_in_fp32(c, p, channels, dim):
    model = build(c, p, channels, dim, seed=3)
    x = randn(5, 7, c, p, p)
    z_ref, r_ref = model(x)
    z, r = forward_matmul(model, x, torch.float32)
    assert z.dtype == r.dtype == torch.float32 and tuple(r.shape) == (7, c, p, p)
    torch.testing.assert_close(z, z_ref, rtol=0, atol=1e-5)
    torch.testing.assert_close(r, r_ref, rtol=0, atol=1e-5)
    # Gradients reach the same parameters with the same values.
    target = randn(6, 7, c, p, p)
    g_ref = torch.autograd.grad(((r_ref - target) ** 2).mean() + z_ref.pow(2).mean(), list(model.parameters()))
    g = torch.autograd.grad(((r - target) ** 2).mean() + z.pow(2).mean(), list(model.parameters()))
    for a, b in zip(g, g_ref):
        torch.testing.assert_close(a, b, rtol=1e-4, atol=1e-6)


def test_matmul_path_in_bf16_is_close_to_fp32():
    model = build(2, 7, (32, 64), 32, seed=0)
    x = randn(7, 64, 2, 7, 7)
    z_ref, r_ref = model(x)
    z, r = forward_matmul(model, x, torch.bfloat16)
    assert z.dtype == r.dtype == torch.float32
    # bfloat16 keeps 8 significant bits (relative rounding 2**-8 per operation).
    assert ((z - z_ref).norm() / z_ref.norm()).item() < 0.02
    assert ((r - r_ref).norm() / r_ref.norm()).item() < 0.02


@pytest.mark.parametrize("s, k", [(5, 3), (7, 3), (3, 3), (4, 1)])
def test_windows_match_unfold_and_overlap_add_is_its_adjoint(s, k):
    h = randn(8, 3, s, s, 4)  # (N, s, s, c)
    cols = windows(h, k)
    o = s - k + 1
    assert tuple(cols.shape) == (3, o, o, k, k, 4)
    # Reference: torch.nn.functional.unfold (im2col) on the channels-first tensor; its column
    # layout is (c, ky, kx) x (y, x).
    ref = torch.nn.functional.unfold(h.permute(0, 3, 1, 2), k).view(3, 4, k, k, o, o)
    torch.testing.assert_close(cols, ref.permute(0, 4, 5, 2, 3, 1), rtol=0, atol=0)
    # Adjoint: <windows(h), g> == <h, overlap_add(g)> for any g (definition of the adjoint).
    g = randn(9, 3, o, o, k, k, 4)
    torch.testing.assert_close((cols * g).sum(), (h * overlap_add(g, k)).sum(), rtol=1e-5, atol=1e-4)
    # ... and overlap_add is torch.nn.functional.fold (col2im) in channels-last layout.
    folded = torch.nn.functional.fold(g.permute(0, 5, 3, 4, 1, 2).reshape(3, 4 * k * k, o * o), (s, s), k)
    torch.testing.assert_close(overlap_add(g, k), folded.permute(0, 2, 3, 1), rtol=1e-6, atol=1e-5)

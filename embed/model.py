"""The twin autoencoder: one shared-weight encoder/decoder applied to both patches of a pair.

Encoder: ``len(channels)`` 3x3 convolutions (stride 1, no padding, "valid") with a leaky ReLU,
then one ``k x k`` convolution with ``k = patch - 2 * len(channels)`` that maps the remaining
extent to the D-dimensional embedding, with no activation. Every layer is a stride-1 valid
convolution, so the same module run on a whole zero-padded slice gives, at every voxel, exactly
the embedding of that voxel's patch (see :mod:`embed.dense`). There is no normalisation layer
that pools over space or batch, which would break that equality. ``dims=3`` builds the same
network for cubic patches with 3D convolutions (``patch.dims = 3``).

Decoder: a linear layer from the embedding back to the ``k x k`` feature map (a linear layer
here is cheap; a transposed convolution expanding a 1x1 code is slow on CPU), then transposed
3x3 convolutions mirroring the encoder back to the patch.

:func:`forward_matmul` computes the same function with the same parameters as matrix products
on channels-last activations (im2col for the 3x3 convolutions, overlap-add for the transposed
ones), optionally in bfloat16. PyTorch's bfloat16 convolutions are slow on CPU for these tiny
maps, while bfloat16 matrix products are several times faster than float32 ones, so this is
the bfloat16 training path (``train.precision = "bf16"``): 1.6x the float32 modules for 2D
patches on a CPU without AMX, no faster for cubes, whose float32 3D convolutions already run near
the float32 peak (benchmarks/train_speed.py). The modules stay the reference: export, dense
embedding and validation use them.
"""

from __future__ import annotations

from functools import lru_cache

import torch
import torch.nn.functional as F
from torch import nn

from .errors import ConfigError

NEGATIVE_SLOPE = 0.1


def final_kernel(patch_size: int, channels: tuple[int, ...]) -> int:
    """Side of the last encoder convolution; raises ConfigError when the patch is even or too small."""
    if patch_size % 2 == 0:
        raise ConfigError(f"patch.size={patch_size} must be odd so the patch has a centre voxel; use 3, 5, 7, ...")
    k = patch_size - 2 * len(channels)
    if k < 1:
        raise ConfigError(
            f"patch.size={patch_size} is too small for model.channels={list(channels)}: "
            f"{len(channels)} valid 3x3 convolutions need a patch of at least {2 * len(channels) + 1}; "
            "raise patch.size or use fewer channels"
        )
    return k


def _layers(dims: int) -> tuple[type, type]:
    """``(Conv, ConvTranspose)`` module classes for 2D or 3D patches."""
    if dims not in (2, 3):
        raise ConfigError(f"patch.dims={dims}: use 2 (square patches) or 3 (cubes)")
    return (nn.Conv2d, nn.ConvTranspose2d) if dims == 2 else (nn.Conv3d, nn.ConvTranspose3d)


class PatchEncoder(nn.Module):
    """Valid-convolution encoder.

    ``forward(x: (N, C, H, W)) -> (N, D, H - p + 1, W - p + 1)``; on patches ``(N, C, p, p)``
    the output is ``(N, D, 1, 1)``. With ``dims=3`` every convolution is 3D and every shape has
    one more spatial side (cubes ``(N, C, p, p, p)``).
    """

    def __init__(self, in_channels: int, patch_size: int, channels: tuple[int, ...], dim: int, dims: int = 2):
        super().__init__()
        k = final_kernel(patch_size, channels)
        conv, _ = _layers(dims)
        layers: list[nn.Module] = []
        prev = in_channels
        for width in channels:
            layers += [conv(prev, width, 3), nn.LeakyReLU(NEGATIVE_SLOPE)]
            prev = width
        layers.append(conv(prev, dim, k))
        self.layers = nn.Sequential(*layers)
        self.in_channels, self.patch_size, self.channels, self.dim = in_channels, patch_size, tuple(channels), dim
        self.dims = dims

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layers(x)

    def embed(self, patches: torch.Tensor) -> torch.Tensor:
        """``patches: (N, C, p, p)`` (3D: ``(N, C, p, p, p)``) ``-> (N, D)``."""
        return self.layers(patches).flatten(1)


class PatchDecoder(nn.Module):
    """``forward(z: (N, D)) -> (N, C, p, p)`` (3D: ``(N, C, p, p, p)``)."""

    def __init__(self, out_channels: int, patch_size: int, channels: tuple[int, ...], dim: int, dims: int = 2):
        super().__init__()
        self.k = final_kernel(patch_size, channels)
        self.width = channels[-1]
        self.dims = dims
        _, tconv = _layers(dims)
        self.expand = nn.Linear(dim, self.width * self.k ** dims)
        layers: list[nn.Module] = [nn.LeakyReLU(NEGATIVE_SLOPE)]
        widths = list(channels[::-1]) + [out_channels]
        for i, (a, b) in enumerate(zip(widths[:-1], widths[1:])):
            layers.append(tconv(a, b, 3))
            if i < len(widths) - 2:
                layers.append(nn.LeakyReLU(NEGATIVE_SLOPE))
        self.layers = nn.Sequential(*layers)

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        h = self.expand(z).view(z.shape[0], self.width, *(self.k,) * self.dims)
        return self.layers(h)


class TwinAutoencoder(nn.Module):
    """Shared-weight autoencoder for both patches of a co-located pair.

    ``forward(x: (N, C, p, p)) -> (z: (N, D), recon: (N, C, p, p))`` (3D: cubes).
    """

    def __init__(self, in_channels: int, patch_size: int, channels: tuple[int, ...], dim: int, dims: int = 2):
        super().__init__()
        self.encoder = PatchEncoder(in_channels, patch_size, channels, dim, dims)
        self.decoder = PatchDecoder(in_channels, patch_size, channels, dim, dims)
        self.dims = dims

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        z = self.encoder.embed(x)
        return z, self.decoder(z)


def build(in_channels: int, patch_size: int, channels: tuple[int, ...], dim: int, seed: int,
          dims: int = 2) -> TwinAutoencoder:
    """A freshly initialised model; the initial weights depend only on ``seed``.

    PyTorch's layer initialisers draw from the global generator, so it is forked and seeded
    here and the caller's global random state is left untouched.
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        return TwinAutoencoder(in_channels, patch_size, tuple(channels), dim, dims)


# ---------------------------------------------------------------------------------------------
# The same network as matrix products on channels-last activations (the bfloat16 training path).


@lru_cache(maxsize=None)
def _window_index(out_side: int, k: int, dims: int = 2) -> torch.Tensor:
    """Flat positions of every ``k ** dims`` window in a ``side ** dims`` grid, ``side = out_side + k - 1``:
    ``(out_side**dims * k**dims,)`` int64, window position major, offset minor.

    2D: entry ``((y * out_side + x) * k + ky) * k + kx`` is ``(y + ky) * side + (x + kx)``.
    """
    side = out_side + k - 1
    grids = torch.meshgrid(*(torch.arange(n) for n in (out_side,) * dims + (k,) * dims), indexing="ij")
    flat = torch.zeros_like(grids[0])
    for a in range(dims):  # position along axis a = window corner + offset
        flat = flat * side + grids[a] + grids[dims + a]
    return flat.reshape(-1)


def windows(h: torch.Tensor, k: int) -> torch.Tensor:
    """im2col, channels last: ``h: (N, s, s, c)`` -> ``(N, o, o, k, k, c)``, ``o = s - k + 1`` (a copy).

    3D: ``(N, s, s, s, c)`` -> ``(N, o, o, o, k, k, k, c)``.
    """
    n, s, c, dims = h.shape[0], h.shape[1], h.shape[-1], h.dim() - 2
    o = s - k + 1
    flat = h.reshape(n, s ** dims, c).index_select(1, _window_index(o, k, dims))
    return flat.view((n,) + (o,) * dims + (k,) * dims + (c,))


def overlap_add(cols: torch.Tensor, k: int, out: torch.Tensor | None = None) -> torch.Tensor:
    """Adjoint of :func:`windows`: ``cols: (N, o, o, k, k, c)`` -> ``(N, o+k-1, o+k-1, c)`` (3D alike).

    Adds into ``out: (N, (o+k-1)**dims, c)`` when given (e.g. pre-filled with a bias).
    """
    n, o, c, dims = cols.shape[0], cols.shape[1], cols.shape[-1], (cols.dim() - 2) // 2
    side = o + k - 1
    if out is None:
        out = cols.new_zeros((n, side ** dims, c))
    out.index_add_(1, _window_index(o, k, dims), cols.reshape(n, (o * k) ** dims, c))
    return out.view((n,) + (side,) * dims + (c,))


class _Windows(torch.autograd.Function):
    """:func:`windows` of ``h`` cast to ``dtype`` (the gather runs in ``h``'s own dtype)."""

    @staticmethod
    def forward(ctx, h, k, dtype):
        ctx.k, ctx.in_dtype = k, h.dtype
        return windows(h, k).to(dtype)

    @staticmethod
    def backward(ctx, grad):
        return overlap_add(grad.contiguous(), ctx.k).to(ctx.in_dtype), None, None


class _OverlapAddBias(torch.autograd.Function):
    """``overlap_add(cols) + bias`` computed in ``out_dtype`` (float32 for the last layer)."""

    @staticmethod
    def forward(ctx, cols, bias, k, out_dtype):
        ctx.k, ctx.cols_dtype, ctx.bias_dtype = k, cols.dtype, bias.dtype
        n, o, c, dims = cols.shape[0], cols.shape[1], cols.shape[-1], (cols.dim() - 2) // 2
        out = bias.to(out_dtype).expand(n, (o + k - 1) ** dims, c).contiguous()
        return overlap_add(cols.to(out_dtype), k, out)

    @staticmethod
    def backward(ctx, grad):
        grad = grad.contiguous()
        spatial = tuple(range(grad.dim() - 1))
        return windows(grad.to(ctx.cols_dtype), ctx.k), grad.sum(spatial).to(ctx.bias_dtype), None, None


def forward_matmul(model: TwinAutoencoder, x: torch.Tensor, dtype: torch.dtype = torch.bfloat16):
    """``model(x)`` as matrix products in ``dtype``: ``x: (N, C, p, p) float32`` ->
    ``z: (N, D) float32`` and ``recon: (N, C, p, p) float32`` (a channels-last view); 3D patches
    ``(N, C, p, p, p)`` alike.

    Same parameters, same function as ``model.forward`` (equal up to rounding in float32);
    gradients flow to the float32 parameters.
    """
    n, dims = x.shape[0], model.dims
    sp = tuple(range(2, 2 + dims))  # spatial axes of a module weight
    conv_type, tconv_type = _layers(dims)
    convs = [m for m in model.encoder.layers if isinstance(m, conv_type)]
    # The input is windowed in float32 and then cast: PyTorch's bfloat16 gather is several times
    # slower than its float32 one for 1 or 2 channels (measured: benchmarks/train_speed.py notes).
    h = x.permute(0, *sp, 1)  # (N, p, p[, p], C) float32
    for conv in convs[:-1]:
        cols = _Windows.apply(h, conv.kernel_size[0], dtype)  # (N, o.., 3.., c)
        o = cols.shape[1:1 + dims]
        w = conv.weight.permute(*sp, 1, 0).reshape(-1, conv.out_channels).to(dtype)  # rows (offsets, c)
        h = torch.addmm(conv.bias.to(dtype), cols.reshape(n * o.numel(), -1), w)
        h = F.leaky_relu(h, NEGATIVE_SLOPE).view(n, *o, conv.out_channels)
    last = convs[-1]
    w = last.weight.permute(*sp, 1, 0).reshape(-1, last.out_channels).to(dtype)  # rows (positions, c)
    z = torch.addmm(last.bias.to(dtype), h.reshape(n, -1), w)
    dec = model.decoder
    k, width = dec.k, dec.width
    # The module reads the linear output as (c, positions); reorder its rows to (positions, c).
    we = dec.expand.weight.view(width, *(k,) * dims, -1).permute(*range(1, dims + 1), 0, dims + 1)
    we = we.reshape(width * k ** dims, -1)
    be = dec.expand.bias.view(width, *(k,) * dims).permute(*range(1, dims + 1), 0).reshape(-1)
    h = F.leaky_relu(torch.addmm(be.to(dtype), z, we.t().to(dtype)), NEGATIVE_SLOPE).view(n, *(k,) * dims, width)
    tconvs = [m for m in dec.layers if isinstance(m, tconv_type)]
    for i, tconv in enumerate(tconvs):
        s, kt, cout = h.shape[1:1 + dims], tconv.kernel_size[0], tconv.out_channels
        w = tconv.weight.permute(0, *sp, 1).reshape(tconv.in_channels, -1).to(dtype)  # cols (offsets, c)
        cols = torch.mm(h.reshape(n * s.numel(), -1), w).view(n, *s, *(kt,) * dims, cout)
        final = i == len(tconvs) - 1
        h = _OverlapAddBias.apply(cols, tconv.bias, kt, torch.float32 if final else dtype)
        if not final:
            h = F.leaky_relu(h, NEGATIVE_SLOPE)
    return z.float(), h.permute(0, dims + 1, *range(1, dims + 1))

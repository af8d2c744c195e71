"""The twin autoencoder: one shared-weight encoder/decoder applied to both patches of a pair.

Encoder: ``len(channels)`` 3x3 convolutions (stride 1, no padding, "valid") with a leaky ReLU,
then one ``k x k`` convolution with ``k = patch - 2 * len(channels)`` that maps the remaining
extent to the D-dimensional embedding, with no activation. Every layer is a stride-1 valid
convolution, so the same module run on a whole zero-padded slice gives, at every voxel, exactly
the embedding of that voxel's patch (see :mod:`embed.dense`). There is no normalisation layer
that pools over space or batch, which would break that equality.

Decoder: a linear layer from the embedding back to the ``k x k`` feature map (a linear layer
here is cheap; a transposed convolution expanding a 1x1 code is slow on CPU), then transposed
3x3 convolutions mirroring the encoder back to the patch.
"""

from __future__ import annotations

import torch
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


class PatchEncoder(nn.Module):
    """Valid-convolution encoder.

    ``forward(x: (N, C, H, W)) -> (N, D, H - p + 1, W - p + 1)``; on patches ``(N, C, p, p)``
    the output is ``(N, D, 1, 1)``.
    """

    def __init__(self, in_channels: int, patch_size: int, channels: tuple[int, ...], dim: int):
        super().__init__()
        k = final_kernel(patch_size, channels)
        layers: list[nn.Module] = []
        prev = in_channels
        for width in channels:
            layers += [nn.Conv2d(prev, width, 3), nn.LeakyReLU(NEGATIVE_SLOPE)]
            prev = width
        layers.append(nn.Conv2d(prev, dim, k))
        self.layers = nn.Sequential(*layers)
        self.in_channels, self.patch_size, self.channels, self.dim = in_channels, patch_size, tuple(channels), dim

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layers(x)

    def embed(self, patches: torch.Tensor) -> torch.Tensor:
        """``patches: (N, C, p, p) -> (N, D)``."""
        return self.layers(patches).flatten(1)


class PatchDecoder(nn.Module):
    """``forward(z: (N, D)) -> (N, C, p, p)``."""

    def __init__(self, out_channels: int, patch_size: int, channels: tuple[int, ...], dim: int):
        super().__init__()
        self.k = final_kernel(patch_size, channels)
        self.width = channels[-1]
        self.expand = nn.Linear(dim, self.width * self.k * self.k)
        layers: list[nn.Module] = [nn.LeakyReLU(NEGATIVE_SLOPE)]
        widths = list(channels[::-1]) + [out_channels]
        for i, (a, b) in enumerate(zip(widths[:-1], widths[1:])):
            layers.append(nn.ConvTranspose2d(a, b, 3))
            if i < len(widths) - 2:
                layers.append(nn.LeakyReLU(NEGATIVE_SLOPE))
        self.layers = nn.Sequential(*layers)

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        h = self.expand(z).view(z.shape[0], self.width, self.k, self.k)
        return self.layers(h)


class TwinAutoencoder(nn.Module):
    """Shared-weight autoencoder for both patches of a co-located pair.

    ``forward(x: (N, C, p, p)) -> (z: (N, D), recon: (N, C, p, p))``.
    """

    def __init__(self, in_channels: int, patch_size: int, channels: tuple[int, ...], dim: int):
        super().__init__()
        self.encoder = PatchEncoder(in_channels, patch_size, channels, dim)
        self.decoder = PatchDecoder(in_channels, patch_size, channels, dim)

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        z = self.encoder.embed(x)
        return z, self.decoder(z)


def build(in_channels: int, patch_size: int, channels: tuple[int, ...], dim: int, seed: int) -> TwinAutoencoder:
    """A freshly initialised model; the initial weights depend only on ``seed``.

    PyTorch's layer initialisers draw from the global generator, so it is forked and seeded
    here and the caller's global random state is left untouched.
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        return TwinAutoencoder(in_channels, patch_size, tuple(channels), dim)

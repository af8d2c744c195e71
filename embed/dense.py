"""Volume -> embedding map, exact.

The encoder is a stack of stride-1 valid convolutions (:mod:`embed.model`), so running it on a
whole slice padded with ``p // 2`` zeros on each in-plane side gives, at every voxel, the
embedding of that voxel's ``p x p`` patch, the patch being zero outside the grid, exactly what
:func:`embed.pairs.gather_patches` builds (3D patches: the same with cubes of the zero-padded
volume). Only the tiles that hold mask voxels are computed; outside the mask the map is zero.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import torch
from tqdm.auto import tqdm

from .errors import InputError
from .files import atomic
from .model import PatchEncoder

PRECISIONS = ("fp32", "bf16")
TILE = 32  # output tile side for dense evaluation (measured: 32 beat 48, 64, 96 and whole slices)
TILE_3D = 16  # output cube side for 3D patches (not tuned; 7-voxel cubes: 3.1 s per 1 mm volume)
TILE_BATCH = 8  # tiles per encoder call


class Encoder:
    """A frozen patch encoder with its card.

    Attributes: ``patch_size`` (int), ``in_channels`` (int), ``dim`` (int), ``dims`` (2 or 3),
    ``channel_names`` (tuple of contrast names, in input order), ``axis`` (voxel axis held
    fixed by the patch plane; None for 3D patches), ``card`` (dict, the bundle's card).
    """

    def __init__(self, module: PatchEncoder, card: dict):
        self.module = module.eval()
        for p in self.module.parameters():
            p.requires_grad_(False)
        self.card = card
        self.patch_size = module.patch_size
        self.in_channels = module.in_channels
        self.dim = module.dim
        self.dims = module.dims
        self.channel_names = tuple(card.get("contrasts", [f"c{i}" for i in range(module.in_channels)]))
        self.axis = int(card.get("patch", {}).get("axis", 2)) if self.dims == 2 else None

    def __repr__(self) -> str:
        plane = self.card.get("patch", {}).get("plane", "?") if self.dims == 2 else "3D"
        return f"Encoder(contrasts={list(self.channel_names)}, patch={self.patch_size}, plane={plane}, dim={self.dim})"

    def embed_patches(self, x, batch_size: int = 4096) -> np.ndarray:
        """``x: (N, C, p, p)`` (3D: ``(N, C, p, p, p)``) float (numpy or torch) -> ``(N, D) float32`` numpy."""
        x = torch.as_tensor(np.asarray(x, dtype=np.float32))
        want = (self.in_channels,) + (self.patch_size,) * self.dims
        if x.ndim != 2 + self.dims or tuple(x.shape[1:]) != want:
            raise InputError(f"embed_patches: expected patches of shape (N, {', '.join(map(str, want))}), got {tuple(x.shape)}")
        out = []
        with torch.inference_mode():
            for i in range(0, len(x), batch_size):
                out.append(self.module.embed(x[i:i + batch_size]))
        if not out:
            return np.zeros((0, self.dim), np.float32)
        return torch.cat(out).numpy().astype(np.float32, copy=False)

    def _check(self, vol: np.ndarray, mask: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
        vol = np.asarray(vol, dtype=np.float32)
        if vol.ndim != 4 or vol.shape[0] != self.in_channels:
            raise InputError(
                f"embed_volume: expected a volume of shape ({self.in_channels}, X, Y, Z) "
                f"for contrasts {list(self.channel_names)}, got {vol.shape}"
            )
        if mask is None:
            mask = np.ones(vol.shape[1:], dtype=bool)
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != vol.shape[1:]:
            raise InputError(f"embed_volume: mask shape {mask.shape} differs from the volume's grid {vol.shape[1:]}")
        return vol, mask

    def _tiles(self, vol: np.ndarray, mask: np.ndarray, precision: str, progress: bool):
        """Run the encoder over the tiles that hold mask voxels, a batch at a time.

        Yields ``(regions, y)``: ``regions`` a list of tiles, each a tuple of three slices of the
        grid, and ``y: (n, D, tx, ty, tz)`` float32, the embeddings of each tile's voxels from its
        corner on (entries past the grid edge are junk: cut ``y[k]`` to ``mask[region].shape``).
        """
        if precision not in PRECISIONS:
            raise InputError(f"precision must be one of {PRECISIONS}, got {precision!r}")
        autocast = torch.autocast("cpu", dtype=torch.bfloat16, enabled=precision == "bf16")
        n_batches, tiles = self._tiles2d(vol, mask) if self.dims == 2 else self._tiles3d(vol, mask)
        with torch.inference_mode(), autocast:
            for regions, x in tqdm(tiles, total=n_batches, desc="embed", unit="batch", disable=not progress,
                                   leave=False):
                fmt = torch.channels_last if self.dims == 2 else torch.channels_last_3d
                y = self.module(torch.from_numpy(x).contiguous(memory_format=fmt)).float().contiguous().numpy()
                if self.dims == 2:  # (n, D, A, B) -> (n, D, tx, ty, tz) with 1 along the fixed axis
                    y = np.expand_dims(y, self.axis + 2)
                yield regions, y

    def _tiles2d(self, vol: np.ndarray, mask: np.ndarray):
        """Encoder inputs for 2D patches: the number of batches and an iterator of
        ``(regions, x: (n, C, TILE + p - 1, TILE + p - 1))``.

        Each slice (along the fixed axis) is cut into ``TILE x TILE`` output tiles; a tile's input
        is the tile plus ``p // 2`` voxels on each side of the zero-padded slice, so the valid
        convolutions return exactly the tile. Small tiles keep the activations in cache (measured:
        several times faster than whole slices on this CPU) and skip the empty corners of the box.
        """
        v = np.moveaxis(vol, self.axis + 1, 0)  # (L, C, A, B) view
        t = TILE
        n_slices, _, size_a, size_b = v.shape
        n_a, n_b = -(-size_a // t), -(-size_b // t)
        busy = np.zeros((n_slices, n_a * t, n_b * t), bool)
        busy[:, :size_a, :size_b] = np.moveaxis(mask, self.axis, 0)
        busy = busy.reshape(n_slices, n_a, t, n_b, t).any(axis=(2, 4))
        tiles = [(int(li), int(ti) * t, int(tj) * t) for li, ti, tj in np.argwhere(busy)]
        return -(-len(tiles) // TILE_BATCH), self._inputs2d(v, tiles, n_a * t, n_b * t)

    def _inputs2d(self, v: np.ndarray, tiles: list[tuple[int, int, int]], side_a: int, side_b: int):
        """Batches of tile inputs cut from zero-padded slices ``(C, side_a + p - 1, side_b + p - 1)``."""
        h, t = self.patch_size // 2, TILE
        size_a, size_b = v.shape[2:]
        pad = {}  # zero-padded slices, made as the tiles reach them and dropped after
        for k in range(0, len(tiles), TILE_BATCH):
            batch = tiles[k:k + TILE_BATCH]
            for li in {b[0] for b in batch} - pad.keys():
                padded = np.zeros((v.shape[1], side_a + 2 * h, side_b + 2 * h), np.float32)
                padded[:, h:h + size_a, h:h + size_b] = v[li]
                pad[li] = padded
            x = np.stack([pad[li][:, r:r + t + 2 * h, c:c + t + 2 * h] for li, r, c in batch])
            for li in [li for li in pad if li < batch[-1][0]]:
                del pad[li]
            regions = []
            for li, r, c in batch:
                inplane = iter((slice(r, r + t), slice(c, c + t)))
                regions.append(tuple(slice(li, li + 1) if a == self.axis else next(inplane) for a in range(3)))
            yield regions, x

    def _tiles3d(self, vol: np.ndarray, mask: np.ndarray):
        """Encoder inputs for 3D patches: the number of batches and an iterator of
        ``(regions, x: (n, C, s, s, s))``, ``s = TILE_3D + p - 1``.

        The volume is zero-padded by ``p // 2`` on every side once; each ``TILE_3D`` cube of output
        voxels that holds mask voxels reads its cube plus that margin.
        """
        t = TILE_3D
        shape = mask.shape
        n_t = [-(-n // t) for n in shape]
        busy = np.zeros([n * t for n in n_t], bool)
        busy[:shape[0], :shape[1], :shape[2]] = mask
        busy = busy.reshape(n_t[0], t, n_t[1], t, n_t[2], t).any(axis=(1, 3, 5))
        corners = [tuple(int(i) * t for i in c) for c in np.argwhere(busy)]
        return -(-len(corners) // TILE_BATCH), self._inputs3d(vol, corners, n_t)

    def _inputs3d(self, vol: np.ndarray, corners: list[tuple[int, int, int]], n_t: list[int]):
        """Batches of tile inputs cut from the volume zero-padded to ``n_t`` tiles plus ``p // 2``."""
        h, t, shape = self.patch_size // 2, TILE_3D, vol.shape[1:]
        padded = np.zeros((vol.shape[0],) + tuple(n * t + 2 * h for n in n_t), np.float32)
        padded[:, h:h + shape[0], h:h + shape[1], h:h + shape[2]] = vol
        s = t + 2 * h
        for k in range(0, len(corners), TILE_BATCH):
            batch = corners[k:k + TILE_BATCH]
            x = np.stack([padded[:, a:a + s, b:b + s, c:c + s] for a, b, c in batch])
            yield [tuple(slice(i, i + t) for i in c) for c in batch], x

    def embed_volume(self, vol: np.ndarray, mask: np.ndarray | None = None, precision: str = "fp32", progress: bool = False) -> np.ndarray:
        """``vol: (C, X, Y, Z)`` -> ``(D, X, Y, Z) float32``; zero outside ``mask: (X, Y, Z) bool``.

        Equal, at every voxel (mask edges and grid border included), to :meth:`embed_patches`
        on that voxel's patch with zero padding outside the grid (fp32; ``precision="bf16"``
        computes in bfloat16, faster on CPUs with AMX or AVX-512 bf16, at a small error).
        """
        vol, mask = self._check(vol, mask)
        out = np.zeros((self.dim,) + vol.shape[1:], dtype=np.float32)
        for regions, y in self._tiles(vol, mask, precision, progress):
            for k, region in enumerate(regions):
                keep = mask[region]
                out[(slice(None),) + region] = y[k][(slice(None),) + tuple(slice(0, n) for n in keep.shape)] * keep
        return out

    def embed_masked(self, vol: np.ndarray, mask: np.ndarray, precision: str = "fp32",
                     progress: bool = False) -> np.ndarray:
        """Embeddings of the mask voxels only: ``(V, D) float32`` in the order of ``np.argwhere(mask)``.

        Equal to ``embed_volume(vol, mask)[:, mask].T`` without holding the full-grid map.
        """
        vol, mask = self._check(vol, mask)
        order = np.full(mask.shape, -1, dtype=np.int64)
        order[mask] = np.arange(int(mask.sum()))  # C order, as np.argwhere
        out = np.zeros((int(mask.sum()), self.dim), dtype=np.float32)
        for regions, y in self._tiles(vol, mask, precision, progress):
            for k, region in enumerate(regions):
                where = order[region]
                keep = where >= 0
                out[where[keep]] = y[k][(slice(None),) + tuple(slice(0, n) for n in keep.shape)][:, keep].T
        return out


def image_on_grid(data: np.ndarray, affine: np.ndarray, header):
    """A NIfTI image of ``data`` with the input's ``affine`` and sform/qform codes (``header``).

    When both codes are 0 (or there is no header) the sform code is set to 2 (NIfTI-1: with both
    codes 0 readers ignore the affine; 2 = aligned to another scan).
    """
    import nibabel as nib

    img = nib.Nifti1Image(data, affine)
    sform_code = int(header["sform_code"]) if header is not None else 0
    qform_code = int(header["qform_code"]) if header is not None else 0
    img.set_sform(affine, code=sform_code if (sform_code or qform_code) else 2)
    img.set_qform(affine, code=qform_code)
    return img


def write_embedding_map(path: str | Path, emb: np.ndarray, affine: np.ndarray, header, sidecar: dict) -> Path:
    """Write ``emb: (D, X, Y, Z)`` as a 4D NIfTI ``(X, Y, Z, D)`` float32 plus a JSON sidecar.

    The affine and the sform/qform codes of ``header`` (the input's) are kept
    (:func:`image_on_grid`). Both files are written under a temporary name and renamed. The sidecar sits beside the image, with
    ``.json`` in place of ``.nii``/``.nii.gz``.
    """
    import json

    import nibabel as nib

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    img = image_on_grid(np.ascontiguousarray(np.moveaxis(emb, 0, -1), dtype=np.float32), affine, header)
    img.header.set_intent("vector", (), name="embedding")
    suffix = ".nii.gz" if path.name.endswith(".nii.gz") else path.suffix
    stem = path.name[: -len(suffix)] if suffix else path.name
    with atomic(path) as tmp, atomic(path.with_name(f"{stem}.json")) as side_tmp:  # both or neither
        nib.save(img, tmp)
        side_tmp.write_text(json.dumps(sidecar, indent=2, default=str), encoding="utf-8")
    return path

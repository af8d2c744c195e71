"""Volume -> embedding map, exact.

The encoder is a stack of stride-1 valid convolutions (:mod:`embed.model`), so running it on a
whole slice padded with ``p // 2`` zeros on each in-plane side gives, at every voxel, the
embedding of that voxel's ``p x p`` patch, the patch being zero outside the grid, exactly what
:func:`embed.pairs.gather_patches` builds. Only the slices and the in-plane bounding box that
hold mask voxels are computed; outside the mask the map is zero.
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
TILE_BATCH = 8  # tiles per encoder call


class Encoder:
    """A frozen patch encoder with its card.

    Attributes: ``patch_size`` (int), ``in_channels`` (int), ``dim`` (int),
    ``channel_names`` (tuple of contrast names, in input order), ``axis`` (voxel axis held
    fixed by the patch plane), ``card`` (dict, the bundle's card).
    """

    def __init__(self, module: PatchEncoder, card: dict):
        self.module = module.eval()
        for p in self.module.parameters():
            p.requires_grad_(False)
        self.card = card
        self.patch_size = module.patch_size
        self.in_channels = module.in_channels
        self.dim = module.dim
        self.channel_names = tuple(card.get("contrasts", [f"c{i}" for i in range(module.in_channels)]))
        self.axis = int(card.get("patch", {}).get("axis", 2))

    def __repr__(self) -> str:
        return (f"Encoder(contrasts={list(self.channel_names)}, patch={self.patch_size}, "
                f"plane={self.card.get('patch', {}).get('plane', '?')}, dim={self.dim})")

    def embed_patches(self, x, batch_size: int = 4096) -> np.ndarray:
        """``x: (N, C, p, p)`` float (numpy or torch) -> ``(N, D) float32`` numpy."""
        x = torch.as_tensor(np.asarray(x, dtype=np.float32))
        want = (self.in_channels, self.patch_size, self.patch_size)
        if x.ndim != 4 or tuple(x.shape[1:]) != want:
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
        """Run the encoder over in-plane tiles that hold mask voxels, a batch at a time.

        Each slice (along the fixed axis) is cut into ``TILE x TILE`` output tiles; a tile's input
        is the tile plus ``p // 2`` voxels on each side of the zero-padded slice, so the valid
        convolutions return exactly the tile. Small tiles keep the activations in cache (measured:
        several times faster than whole slices on this CPU) and skip the empty corners of the box.
        Yields ``(tiles, y)``: ``tiles`` a list of ``(slice, row0, col0)``, ``y: (n, D, TILE, TILE)``
        float32 (rows and columns past the grid edge are junk and must be cut by the caller).
        """
        if precision not in PRECISIONS:
            raise InputError(f"precision must be one of {PRECISIONS}, got {precision!r}")
        v = np.moveaxis(vol, self.axis + 1, 0)  # (L, C, A, B) view
        m = np.moveaxis(mask, self.axis, 0)  # (L, A, B) view
        h, t = self.patch_size // 2, TILE
        n_slices, _, size_a, size_b = v.shape
        n_a, n_b = -(-size_a // t), -(-size_b // t)
        busy = np.zeros((n_slices, n_a * t, n_b * t), bool)
        busy[:, :size_a, :size_b] = m
        busy = busy.reshape(n_slices, n_a, t, n_b, t).any(axis=(2, 4))
        tiles = [(int(li), int(ti) * t, int(tj) * t) for li, ti, tj in np.argwhere(busy)]
        pad = {}  # zero-padded slices, made as the tiles reach them and dropped after
        autocast = torch.autocast("cpu", dtype=torch.bfloat16, enabled=precision == "bf16")
        with torch.inference_mode(), autocast:
            for k in tqdm(range(0, len(tiles), TILE_BATCH), desc="embed", unit="batch",
                          disable=not progress, leave=False):
                batch = tiles[k:k + TILE_BATCH]
                for li in {b[0] for b in batch} - pad.keys():
                    padded = np.zeros((v.shape[1], n_a * t + 2 * h, n_b * t + 2 * h), np.float32)
                    padded[:, h:h + size_a, h:h + size_b] = v[li]
                    pad[li] = padded
                x = np.stack([pad[li][:, r:r + t + 2 * h, c:c + t + 2 * h] for li, r, c in batch])
                xt = torch.from_numpy(x).contiguous(memory_format=torch.channels_last)
                y = self.module(xt).float().contiguous().numpy()
                for li in [li for li in pad if li < batch[-1][0]]:
                    del pad[li]
                yield batch, y

    def embed_volume(self, vol: np.ndarray, mask: np.ndarray | None = None, precision: str = "fp32", progress: bool = False) -> np.ndarray:
        """``vol: (C, X, Y, Z)`` -> ``(D, X, Y, Z) float32``; zero outside ``mask: (X, Y, Z) bool``.

        Equal, at every voxel (mask edges and grid border included), to :meth:`embed_patches`
        on that voxel's patch with zero padding outside the grid (fp32; ``precision="bf16"``
        computes in bfloat16, faster on CPUs with AMX or AVX-512 bf16, at a small error).
        """
        vol, mask = self._check(vol, mask)
        out = np.zeros((self.dim,) + vol.shape[1:], dtype=np.float32)
        o = np.moveaxis(out, self.axis + 1, 0)  # (L, D, A, B) view: writing o writes out
        m = np.moveaxis(mask, self.axis, 0)
        for batch, y in self._tiles(vol, mask, precision, progress):
            for k, (li, r, c) in enumerate(batch):
                keep = m[li, r:r + TILE, c:c + TILE]
                o[li, :, r:r + TILE, c:c + TILE] = y[k][:, :keep.shape[0], :keep.shape[1]] * keep
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
        o = np.moveaxis(order, self.axis, 0)
        for batch, y in self._tiles(vol, mask, precision, progress):
            for k, (li, r, c) in enumerate(batch):
                where = o[li, r:r + TILE, c:c + TILE]
                keep = where >= 0
                out[where[keep]] = y[k][:, :keep.shape[0], :keep.shape[1]][:, keep].T
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

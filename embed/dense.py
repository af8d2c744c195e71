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
from .model import PatchEncoder


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

    def embed_volume(self, vol: np.ndarray, mask: np.ndarray | None = None, batch_slices: int = 8,
                     progress: bool = False) -> np.ndarray:
        """``vol: (C, X, Y, Z)`` -> ``(D, X, Y, Z) float32``; zero outside ``mask: (X, Y, Z) bool``.

        Equal, at every voxel (mask edges and grid border included), to :meth:`embed_patches`
        on that voxel's patch with zero padding outside the grid.
        """
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
        out = np.zeros((self.dim,) + vol.shape[1:], dtype=np.float32)
        if not mask.any():
            return out
        a = self.axis
        # Move the fixed axis first: slices (L, C, A, B) and mask (L, A, B).
        v = np.moveaxis(vol, a + 1, 0)
        m = np.moveaxis(mask, a, 0)
        o = np.moveaxis(out, a + 1, 0)  # a view: writing o writes out
        h = self.patch_size // 2
        nz = np.argwhere(m)
        (l0, a0, b0), (l1, a1, b1) = nz.min(0), nz.max(0) + 1
        # In-plane crop [a0 - h, a1 + h) of the zero-padded slice; the encoder returns [a0, a1).
        pad = np.pad(v[l0:l1], ((0, 0), (0, 0), (h, h), (h, h)))
        crop = pad[:, :, a0:a1 + 2 * h, b0:b1 + 2 * h]
        slices = [i for i in range(l1 - l0) if m[l0 + i].any()]
        with torch.inference_mode():
            for i in tqdm(range(0, len(slices), batch_slices), desc="embed", unit="batch",
                          disable=not progress, leave=False):
                idx = slices[i:i + batch_slices]
                x = torch.from_numpy(np.ascontiguousarray(crop[idx]))
                y = self.module(x).numpy()  # (n, D, a1 - a0, b1 - b0)
                for k, li in enumerate(idx):
                    keep = m[l0 + li, a0:a1, b0:b1]
                    o[l0 + li, :, a0:a1, b0:b1] = y[k] * keep
        return out


def write_embedding_map(path: str | Path, emb: np.ndarray, affine: np.ndarray, header, sidecar: dict) -> Path:
    """Write ``emb: (D, X, Y, Z)`` as a 4D NIfTI ``(X, Y, Z, D)`` float32 plus a JSON sidecar.

    The affine and the sform/qform codes of ``header`` (the input's) are kept; when both codes
    are 0 (or there is no header) the sform code is set to 2 so that readers use the affine. Both files are
    written under a temporary name and renamed. The sidecar sits beside the image, with
    ``.json`` in place of ``.nii``/``.nii.gz``.
    """
    import json
    import os

    import nibabel as nib

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    img = nib.Nifti1Image(np.ascontiguousarray(np.moveaxis(emb, 0, -1), dtype=np.float32), affine)
    sform_code = int(header["sform_code"]) if header is not None else 0
    qform_code = int(header["qform_code"]) if header is not None else 0
    if not (sform_code or qform_code):
        sform_code = 2  # NIfTI-1: with both codes 0 readers ignore the affine; 2 = aligned to another scan
    img.set_sform(affine, code=sform_code)
    img.set_qform(affine, code=qform_code)
    img.header.set_intent("vector", (), name="embedding")
    suffix = ".nii.gz" if path.name.endswith(".nii.gz") else path.suffix
    stem = path.name[: -len(suffix)] if suffix else path.name
    tmp = path.with_name(f".{stem}.partial-{os.getpid()}{suffix}")
    side = path.with_name(f"{stem}.json")
    side_tmp = side.with_name(f".{side.name}.partial-{os.getpid()}")
    try:
        nib.save(img, tmp)
        side_tmp.write_text(json.dumps(sidecar, indent=2, default=str), encoding="utf-8")
        os.replace(tmp, path)
        os.replace(side_tmp, side)
    finally:
        tmp.unlink(missing_ok=True)
        side_tmp.unlink(missing_ok=True)
    return path

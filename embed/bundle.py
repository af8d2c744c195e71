"""Frozen encoder bundles: one ``.safetensors`` file whose metadata holds a JSON card.

Layout: the encoder's tensors under their ``state_dict`` names, and one metadata entry
``twinpatch.card`` with the card as JSON. The card holds the format name and version, the patch
(size, 2 or 3 dimensions, plane and voxel axis of a 2D patch, zero padding), the contrasts and
their normalisation, the grid, the embedding size, the architecture, the resolved training
configuration, a training summary, the package version and ``weights_sha256``: the SHA-256 of every tensor's name, dtype, shape and
bytes in name order. Loading recomputes it and refuses a bundle that does not match.

safetensors holds only raw tensors and strings, so reading a bundle runs no code from the file.
"""

from __future__ import annotations

import hashlib
import json
import warnings
from pathlib import Path

import torch
from safetensors import safe_open
from safetensors.torch import save_file

from .dense import Encoder
from .errors import BundleError
from .files import atomic
from .model import PatchEncoder

FORMAT = "twinpatch-encoder"
FORMAT_VERSION = 1
CARD_KEY = "twinpatch.card"


def weights_sha256(tensors: dict[str, torch.Tensor]) -> str:
    """SHA-256 over ``name, dtype, shape, bytes`` of every tensor, in name order."""
    h = hashlib.sha256()
    for name in sorted(tensors):
        t = tensors[name].detach().contiguous().cpu()
        h.update(f"{name}|{t.dtype}|{tuple(t.shape)}|".encode())
        h.update(t.reshape(-1).view(torch.uint8).numpy().tobytes() if t.numel() else b"")
    return h.hexdigest()


def write_bundle(path: str | Path, tensors: dict[str, torch.Tensor], card: dict) -> Path:
    """Write tensors + card atomically (temporary name, then rename). Returns the path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tensors = {k: v.detach().contiguous().cpu() for k, v in tensors.items()}
    card = dict(card, format=FORMAT, format_version=FORMAT_VERSION, weights_sha256=weights_sha256(tensors))
    with atomic(path) as tmp:
        save_file(tensors, str(tmp), metadata={CARD_KEY: json.dumps(card, sort_keys=True)})
    return path


def read_bundle(path: str | Path, verify: bool = True) -> tuple[dict[str, torch.Tensor], dict]:
    """Read and check a bundle. Returns ``(tensors, card)``; raises BundleError when anything is off."""
    path = Path(path)
    if not path.is_file():
        raise BundleError(f"encoder bundle {path} not found; pass the .safetensors file written by `twinpatch export` "
                          "or `twinpatch train` (RUN_DIR/encoder.safetensors)")
    try:
        with safe_open(str(path), framework="pt") as f:
            meta = f.metadata() or {}
            tensors = {k: f.get_tensor(k) for k in f.keys()}
    except Exception as exc:  # safetensors raises several types for a damaged header or body
        raise BundleError(f"{path}: not a readable safetensors file ({type(exc).__name__}: {exc}); "
                          "re-export it with `twinpatch export RUN_DIR`") from None
    if CARD_KEY not in meta:
        raise BundleError(f"{path}: safetensors file without a twinpatch card (metadata key {CARD_KEY!r}); "
                          "it was not written by `twinpatch export`")
    try:
        card = json.loads(meta[CARD_KEY])
    except json.JSONDecodeError as exc:
        raise BundleError(f"{path}: its card is not valid JSON ({exc}); re-export the bundle") from None
    if card.get("format") != FORMAT:
        raise BundleError(f"{path}: card format is {card.get('format')!r}, expected {FORMAT!r}")
    if card.get("format_version") != FORMAT_VERSION:
        raise BundleError(f"{path}: bundle format version {card.get('format_version')!r} is not supported by this "
                          f"twinpatch (reads version {FORMAT_VERSION}); upgrade twinpatch or re-export the bundle")
    if verify:
        found = weights_sha256(tensors)
        if found != card.get("weights_sha256"):
            raise BundleError(f"{path}: weights checksum mismatch (card {str(card.get('weights_sha256'))[:12]}..., "
                              f"file {found[:12]}...): the file was altered or damaged; re-export it")
    return tensors, card


def load_encoder(path: str | Path) -> Encoder:
    """Load a bundle as a frozen :class:`~embed.dense.Encoder` (strict: every tensor must match)."""
    tensors, card = read_bundle(path)
    arch = card.get("architecture", {})
    try:
        module = PatchEncoder(int(arch["in_channels"]), int(arch["patch_size"]), tuple(arch["channels"]), int(arch["dim"]),
                              int(arch.get("dims", 2)))
        module.load_state_dict(tensors, strict=True)
    except (KeyError, TypeError, RuntimeError, ValueError) as exc:
        raise BundleError(f"{path}: card architecture and tensors disagree ({type(exc).__name__}: "
                          f"{str(exc).splitlines()[0]}); re-export the bundle") from None
    return Encoder(module, card)


def card_summary(card: dict) -> dict:
    """A few card fields for sidecars and printing."""
    return {
        "weights_sha256": card.get("weights_sha256"),
        "contrasts": card.get("contrasts"),
        "patch": card.get("patch"),
        "dim": card.get("architecture", {}).get("dim"),
        "twinpatch_version": card.get("twinpatch_version"),
    }


def verify(path: str | Path) -> tuple[dict, bool]:
    """``(card, checksum_ok)`` without raising on a checksum mismatch (other damage still raises)."""
    tensors, card = read_bundle(path, verify=False)
    return card, weights_sha256(tensors) == card.get("weights_sha256")


def patch_words(patch: dict) -> str:
    """``7 x 7 voxels, axial plane (voxel axis 2 fixed)`` or ``7 x 7 x 7 voxels (3D)`` from a card's patch."""
    if patch.get("dims", 2) == 3:
        return f"{' x '.join([str(patch.get('size'))] * 3)} voxels (3D)"
    return (f"{patch.get('size')} x {patch.get('size')} voxels, {patch.get('plane')} plane "
            f"(voxel axis {patch.get('axis')} fixed)")


def describe(card: dict, checksum_ok: bool) -> str:
    """The card in human form, for ``twinpatch inspect``."""
    arch, patch, grid = card.get("architecture", {}), card.get("patch", {}), card.get("grid", {})
    training, norm = card.get("training", {}), card.get("normalisation", {})
    final = training.get("final_validation", {})
    loss = card.get("config", {}).get("loss", {})
    lines = [
        f"format          {card.get('format')} v{card.get('format_version')} (twinpatch {card.get('twinpatch_version')})",
        f"checksum        {'OK' if checksum_ok else 'MISMATCH: weights altered or damaged'} "
        f"(sha256 {str(card.get('weights_sha256'))[:16]}...)",
        f"contrasts       {', '.join(card.get('contrasts', []))} (channel order)",
        f"normalisation   {norm.get('method')} inside the brain mask",
        f"patch           {patch_words(patch)}, {patch.get('padding')} outside the grid",
        f"grid            {' x '.join(map(str, grid.get('shape', [])))} voxels of "
        f"{' x '.join(f'{v:g}' for v in grid.get('voxel_size_mm', []))} mm, orientation {grid.get('orientation')}",
        f"embedding       {arch.get('dim')} dimensions; encoder widths {arch.get('channels')}, "
        f"activation {arch.get('activation')}",
        f"loss            reconstruction {loss.get('reconstruction')} + agreement weight {loss.get('agreement_weight')} "
        f"({loss.get('schedule')}{', centred' if loss.get('centred') else ''})",
        f"training        {training.get('steps')} steps in {training.get('seconds')} s on "
        f"{len(training.get('train_controls', []))} controls ({len(training.get('val_controls', []))} held out)",
    ]
    if final:
        lines.append(f"validation      reconstruction {final.get('reconstruction', float('nan')):.4f}, centred cosine "
                     f"co-located {final.get('cos_colocated', float('nan')):.3f} vs random "
                     f"{final.get('cos_random', float('nan')):.3f}, effective rank "
                     f"{final.get('effective_rank', float('nan')):.1f}")
    return "\n".join(lines)


def export_onnx(encoder: Encoder, path: str | Path, opset: int = 17) -> Path:
    """Write the encoder as ONNX (input ``x: (N, C, H, W)``, output ``z: (N, D, H-p+1, W-p+1)``).

    N, H and W are dynamic: the same file embeds patches (H = W = p gives ``(N, D, 1, 1)``) or
    whole zero-padded slices. A 3D encoder takes ``(N, C, H, W, L)`` (all sides dynamic). The card goes into the model's metadata (key ``twinpatch.card``).
    Needs the ``onnx`` package (``pip install onnx``).
    """
    try:
        import onnx
    except ImportError:
        raise BundleError("--onnx needs the onnx package: pip install onnx") from None
    path = Path(path)
    p = encoder.patch_size
    sides = (p + 4, p + 6) if encoder.module.dims == 2 else (p + 2, p + 4, p + 6)
    example = torch.zeros(1, encoder.in_channels, *sides)
    names = "hwl"[:len(sides)]
    with atomic(path) as tmp:
        with warnings.catch_warnings():  # the TorchScript-based exporter is deprecated but needs no onnxscript
            warnings.simplefilter("ignore", DeprecationWarning)
            torch.onnx.export(encoder.module, (example,), str(tmp), input_names=["x"], output_names=["z"],
                              dynamic_axes={"x": {0: "n", **{i + 2: a for i, a in enumerate(names)}},
                                            "z": {0: "n", **{i + 2: f"{a}_out" for i, a in enumerate(names)}}},
                              opset_version=opset, dynamo=False)
        model = onnx.load(str(tmp))
        entry = model.metadata_props.add()
        entry.key, entry.value = CARD_KEY, json.dumps(encoder.card, sort_keys=True)
        onnx.save(model, str(tmp))
    return path

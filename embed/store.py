"""The cohort embedding store: every subject's embeddings at one voxel set, laid out voxel-major.

Layout of a store folder::

    store.json            description: subjects and roles, voxel count, dim, dtype, grid, producer
    voxels.npy            (V, 3) int32 voxel indices of the store's voxels, C order (np.argwhere)
    subjects/<id>.npy     (V, D) one subject's embeddings, written as each subject finishes
    subjects/<id>.json    that subject's sidecar (sources, normalisation statistics, float16 error)
    embeddings.npy        (V, S, D) voxel-major: all subjects' vectors for a block of voxels are
                          one contiguous read. Written by :func:`merge` once every subject is done.

Subject files are written under a temporary name and renamed, so a subject file that exists is
complete: an interrupted run resumes by skipping them, and shards of a job array (each writing
some of the subjects into the same folder) need no coordination. Merging streams blocks of
voxels, so its memory does not grow with the number of voxels.

This module knows nothing about encoders: it stores arrays.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from tqdm.auto import tqdm

from .errors import InputError
from .files import atomic, write_json

LAYOUT = "twinpatch-embedding-store"
LAYOUT_VERSION = 1
DTYPES = ("float32", "float16")
MERGE_BLOCK_BYTES = 64 * 2**20  # memory for one block while merging


def _save_npy(path: Path, array: np.ndarray) -> None:
    with atomic(path) as tmp, open(tmp, "wb") as f:
        np.save(f, array)


def create(path: str | Path, *, subjects: list[str], roles: list[str], voxels: np.ndarray, dim: int,
           dtype: str = "float32", grid: dict | None = None, producer: dict | None = None) -> Path:
    """Lay out a store (or check that an existing one has this exact layout). Returns its path.

    ``voxels: (V, 3)`` int voxel indices. Re-creating with the same arguments is a no-op, which
    lets interrupted runs and parallel shards share the folder; a different layout is refused.
    """
    path = Path(path)
    if dtype not in DTYPES:
        raise InputError(f"store dtype must be one of {DTYPES}, got {dtype!r}")
    if len(set(subjects)) != len(subjects):
        raise InputError(f"store {path}: duplicate subject ids")
    desc = {"layout": LAYOUT, "layout_version": LAYOUT_VERSION, "subjects": list(subjects), "roles": list(roles),
            "n_voxels": int(len(voxels)), "dim": int(dim), "dtype": dtype, "grid": grid or {},
            "producer": producer or {}}
    meta = path / "store.json"
    if meta.exists():
        old = read_description(path)
        keys = ("subjects", "roles", "n_voxels", "dim", "dtype")
        changed = [k for k in keys if old.get(k) != desc[k]]
        same = {k: v for k, v in desc["producer"].items() if k != "bundle_path"}  # a moved bundle is fine
        if {k: v for k, v in old.get("producer", {}).items() if k != "bundle_path"} != same:
            changed.append("producer (bundle, precision or mask)")
        if changed:
            raise InputError(f"store {path} already holds a store with other {', '.join(changed)}; "
                             "use a new --out folder (or delete that one)")
        if not np.array_equal(np.load(path / "voxels.npy"), np.asarray(voxels, np.int32)):
            raise InputError(f"store {path} already holds a store over other voxels (another mask); "
                             "use a new --out folder")
        return path
    (path / "subjects").mkdir(parents=True, exist_ok=True)
    _save_npy(path / "voxels.npy", np.asarray(voxels, dtype=np.int32))
    write_json(meta, desc)  # last: marks the layout complete
    return path


def read_description(path: str | Path) -> dict:
    path = Path(path)
    try:
        desc = json.loads((path / "store.json").read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"{path} is not an embedding store (no store.json); "
                         "write one with `twinpatch embed BUNDLE --manifest M.csv --out STORE`") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}/store.json is damaged ({exc}); re-create the store") from None
    if desc.get("layout") != LAYOUT or desc.get("layout_version") != LAYOUT_VERSION:
        raise InputError(f"{path}/store.json: layout {desc.get('layout')!r} v{desc.get('layout_version')} is not "
                         f"{LAYOUT!r} v{LAYOUT_VERSION}; re-create the store with this twinpatch")
    return desc


def subject_path(path: str | Path, subject: str) -> Path:
    return Path(path) / "subjects" / f"{subject}.npy"


def subject_done(path: str | Path, subject: str) -> bool:
    return subject_path(path, subject).is_file()


def write_subject(path: str | Path, subject: str, emb: np.ndarray, sidecar: dict) -> dict:
    """Store one subject's ``emb: (V, D) float32`` (cast to the store's dtype). Returns the sidecar written.

    For float16 stores the sidecar records the largest absolute rounding error.
    """
    desc = read_description(path)
    if subject not in desc["subjects"]:
        raise InputError(f"store {path}: subject {subject!r} is not in this store's subject list")
    if emb.shape != (desc["n_voxels"], desc["dim"]):
        raise InputError(f"store {path}: {subject} embeddings have shape {emb.shape}, "
                         f"expected ({desc['n_voxels']}, {desc['dim']})")
    stored = emb.astype(desc["dtype"])
    sidecar = dict(sidecar, dtype=desc["dtype"])
    if desc["dtype"] != "float32":
        sidecar["max_abs_rounding_error"] = float(np.abs(stored.astype(np.float32) - emb).max()) if emb.size else 0.0
        sidecar["max_abs_value"] = float(np.abs(emb).max()) if emb.size else 0.0
    write_json(subject_path(path, subject).with_suffix(".json"), sidecar)
    _save_npy(subject_path(path, subject), stored)  # last: marks the subject done
    return sidecar


def missing_subjects(path: str | Path) -> list[str]:
    return [s for s in read_description(path)["subjects"] if not subject_done(path, s)]


def merge(path: str | Path, progress: bool = True) -> Path:
    """Write ``embeddings.npy (V, S, D)`` from the subject files, one block of voxels at a time."""
    path = Path(path)
    desc = read_description(path)
    missing = missing_subjects(path)
    if missing:
        raise InputError(f"store {path}: {len(missing)} subjects not embedded yet (first: {missing[0]}); "
                         "run the remaining shards first")
    n_vox, n_sub, dim = desc["n_voxels"], len(desc["subjects"]), desc["dim"]
    dtype = np.dtype(desc["dtype"])
    sources = [np.load(subject_path(path, s), mmap_mode="r") for s in desc["subjects"]]
    block = max(1, MERGE_BLOCK_BYTES // max(1, n_sub * dim * dtype.itemsize))
    out_path = path / "embeddings.npy"
    with atomic(out_path) as tmp:
        out = np.lib.format.open_memmap(tmp, mode="w+", dtype=dtype, shape=(n_vox, n_sub, dim))
        for v0 in tqdm(range(0, n_vox, block), desc="merge store", unit="block", disable=not progress):
            v1 = min(v0 + block, n_vox)
            out[v0:v1] = np.stack([src[v0:v1] for src in sources], axis=1)
        out.flush()
        del out
    return out_path


@dataclass(frozen=True)
class Store:
    """A merged store, read in voxel blocks.

    ``subjects``, ``roles`` (tuples), ``voxels: (V, 3) int32``, ``dim``, ``dtype``, ``grid``.
    """

    path: Path
    subjects: tuple[str, ...]
    roles: tuple[str, ...]
    voxels: np.ndarray
    dim: int
    dtype: str
    grid: dict
    producer: dict

    @classmethod
    def open(cls, path: str | Path) -> "Store":
        path = Path(path)
        desc = read_description(path)
        if not (path / "embeddings.npy").is_file():
            missing = missing_subjects(path)
            raise InputError(f"store {path} is not merged yet ({len(missing)} subjects missing); finish the "
                             "embedding run (or its remaining shards); it merges when the last subject is done")
        return cls(path, tuple(desc["subjects"]), tuple(desc["roles"]), np.load(path / "voxels.npy"),
                   desc["dim"], desc["dtype"], desc["grid"], desc["producer"])

    @property
    def n_voxels(self) -> int:
        return len(self.voxels)

    def block(self, v0: int, v1: int, subjects: np.ndarray | None = None) -> np.ndarray:
        """Embeddings of voxels ``[v0, v1)``: ``(S, v1 - v0, D) float32`` (one contiguous read).

        Returned as a transposed view of a voxel-major ``(B, S, D)`` array: per-voxel scorers read
        each voxel's controls contiguously.
        """
        data = np.load(self.path / "embeddings.npy", mmap_mode="r")
        part = np.array(data[v0:v1], dtype=np.float32)  # (B, S, D), a copy in RAM
        if subjects is not None:
            part = part[:, subjects]
        return part.transpose(1, 0, 2)

    def indices(self, role: str) -> np.ndarray:
        return np.array([i for i, r in enumerate(self.roles) if r == role], dtype=np.int64)

"""Writing files so that nothing on disk is ever half-written.

Every output goes to a hidden temporary name beside its final path (same folder, so the rename
is atomic on one filesystem) and is renamed into place only once complete; on any error the
temporary file is removed and an existing file at the final path is left as it was.
"""

from __future__ import annotations

import json
import os
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

# Suffixes kept at the end of temporary names, for writers that pick the format from the name.
_SUFFIXES = (".nii.gz", ".nii", ".npz", ".npy", ".png", ".onnx", ".safetensors")


def temp_path(path: str | Path) -> Path:
    """``dir/.name.partial-PID`` for ``dir/name``, keeping a known suffix last (``x.nii.gz`` ->
    ``.x.partial-PID.nii.gz``)."""
    path = Path(path)
    suffix = next((s for s in _SUFFIXES if path.name.endswith(s)), "")
    stem = path.name[: len(path.name) - len(suffix)]
    return path.with_name(f".{stem}.partial-{os.getpid()}{suffix}")


@contextmanager
def atomic(path: str | Path) -> Iterator[Path]:
    """``with atomic(p) as tmp: write(tmp)`` -> ``tmp`` is renamed to ``p`` when the block succeeds."""
    path = Path(path)
    tmp = temp_path(path)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def write_text(path: str | Path, text: str) -> Path:
    with atomic(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def write_json(path: str | Path, data, indent: int | None = 1) -> Path:
    return write_text(path, json.dumps(data, indent=indent, default=str))

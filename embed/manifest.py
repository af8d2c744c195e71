"""The manifest: a CSV file listing a cohort's subjects, roles and image paths.

Columns ``subject``, ``role`` (``control`` or ``case``), one column per contrast (the column name is
the contrast name; contrast order = column order) and optional ``mask`` and ``lesion`` columns
(cells may be empty). Paths are relative to the manifest's folder; absolute paths are accepted.
"""

from __future__ import annotations

import csv
import pathlib
from dataclasses import dataclass

from .errors import CohortError

ROLES = ("control", "case")
RESERVED_COLUMNS = ("subject", "role", "mask", "lesion")


@dataclass(frozen=True)
class ManifestRow:
    """One manifest line; ``images`` maps contrast -> absolute path, in contrast order."""

    subject: str
    role: str
    images: dict[str, pathlib.Path]
    mask: pathlib.Path | None
    lesion: pathlib.Path | None


@dataclass(frozen=True)
class Problem:
    """One problem found while checking a cohort; ``message`` is a full one-line error message.

    check: short category (manifest, file, format, dtype, shape, affine, xform, voxel_size,
    finite, mask, intensity, landmarks, controls).
    """

    subject: str
    file: str
    check: str
    message: str


# ---------------------------------------------------------------------------------------------
# manifest


def read_manifest(path, problems: list | None = None) -> tuple[list[ManifestRow], tuple[str, ...]]:
    """Read and check a manifest; return (rows, contrast names in column order).

    Problems with the file or its header line always raise. Problems on a subject's line raise
    too, unless ``problems`` is a list: then each is appended as a :class:`Problem`, the line is
    left out, and reading goes on (so every bad line is reported at once).
    """
    path = pathlib.Path(path).expanduser()
    if not path.is_file():
        raise CohortError(f"manifest {path} not found; give the path of an existing manifest.csv")
    with open(path, newline="", encoding="utf-8-sig") as f:
        lines = [(n, [c.strip() for c in cells]) for n, cells in enumerate(csv.reader(f), 1)]
    lines = [(n, cells) for n, cells in lines if any(cells)]
    if not lines:
        raise CohortError(f"manifest {path} is empty; write a header line 'subject,role,<contrast>...' and one line per subject")
    header_line, header = lines[0]
    found = ", ".join(header)
    for i, name in enumerate(header, 1):
        if not name:
            raise CohortError(f"manifest {path}: column {i} of the header has no name (found columns: {found}); name it or delete it")
    dups = sorted({h for h in header if header.count(h) > 1})
    if dups:
        raise CohortError(f"manifest {path}: column {dups[0]!r} appears more than once (found columns: {found}); keep one")
    for required in ("subject", "role"):
        if required not in header:
            raise CohortError(f"manifest {path} has no {required!r} column (found columns: {found}); add it to the header line")
    contrasts = tuple(h for h in header if h not in RESERVED_COLUMNS)
    if not contrasts:
        raise CohortError(f"manifest {path} has no contrast column (found columns: {found}); add one column per contrast, e.g. 'T1w'")
    base = path.resolve().parent

    def resolve(cell: str) -> pathlib.Path:
        p = pathlib.Path(cell).expanduser()
        return p if p.is_absolute() else base / p

    rows: list[ManifestRow] = []
    seen: dict[str, int] = {}

    def bad(subject: str, message: str) -> None:
        if problems is None:
            raise CohortError(message)
        problems.append(Problem(subject, str(path), "manifest", message))

    for n, cells in lines[1:]:
        where = f"manifest {path}, line {n}"
        if len(cells) != len(header):
            bad(cells[0] if cells else "", f"{where}: {len(cells)} cells but the header has {len(header)} columns; give every line one cell per column (empty cells allowed for mask/lesion)")
            continue
        cell = dict(zip(header, cells))
        subject, role = cell["subject"], cell["role"]
        if not subject:
            bad("", f"{where}: empty 'subject' cell; give every line a subject id")
            continue
        where = f"{where} (subject {subject})"
        if subject in seen:
            bad(subject, f"{where}: subject id {subject!r} already used on line {seen[subject]}; make subject ids unique")
            continue
        seen[subject] = n
        if role not in ROLES:
            bad(subject, f"{where}: unknown role {role!r} in column 'role'; use 'control' or 'case'")
            continue
        empty = [c for c in contrasts if not cell[c]]
        if empty:
            bad(subject, f"{where}: empty cell in contrast column {empty[0]!r}; give the path of the {empty[0]} image")
            continue
        images = {c: resolve(cell[c]) for c in contrasts}
        rows.append(ManifestRow(
            subject=subject, role=role, images=images,
            mask=resolve(cell["mask"]) if cell.get("mask") else None,
            lesion=resolve(cell["lesion"]) if cell.get("lesion") else None,
        ))
    if not rows and not problems:
        raise CohortError(f"manifest {path} has a header line but no subjects; add one line per subject")
    return rows, contrasts

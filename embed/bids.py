"""Cohort discovery in a BIDS derivatives folder (BIDS is an open standard for neuroimaging data).

Looked for, under ``root``: ``sub-<label>/[ses-<label>/]anat/<entities>_<suffix>.nii[.gz]`` where
the entities (``key-value`` pairs joined by ``_``, starting with ``sub-<label>``) include
``space-<space>``, and the suffix is one of the requested contrasts (e.g. ``T1w``, ``FLAIR``).

- Images: one file per contrast and subject. With ``desc`` set only ``desc-<desc>`` files count;
  when several files still match, the subject is skipped (say which with ``desc`` or ``session``).
- Masks (our choice, after the BIDS derivatives naming of masks): ``..._space-<space>_..._desc-
  <mask_desc>_mask.nii[.gz]`` (default ``desc-brain``) is the brain mask; without one the mask is
  derived from the images as for a manifest. ``desc-<lesion_desc>_mask`` (default
  ``desc-lesion``) is a lesion mask.
- Sessions: a subject is one cohort entry. When it has complete data in several sessions it is
  skipped unless ``session`` picks one (two sessions of one person are not two controls).
- Roles: from ``participants.tsv`` (default ``root/participants.tsv``; ``participant_id`` column,
  BIDS), column ``group_column``: values in ``control_values`` are controls, in ``case_values``
  cases; any other value, or a subject missing from the table, is skipped. Without a
  participants.tsv every subject is a control, and a note says so.

Every subject or file left out is reported (``BidsCohort.skipped``) with the reason.
Subject ids are the BIDS ``sub-<label>`` names, sorted.
"""

from __future__ import annotations

import csv
import io
import pathlib
import re
from dataclasses import dataclass

from .cohort import ManifestRow
from .errors import CohortError, InputError

_NAME = re.compile(r"^(?P<stem>[^.]+)\.(?P<ext>nii|nii\.gz)$")
_ENTITY = re.compile(r"^(?P<key>[a-zA-Z0-9]+)-(?P<value>[a-zA-Z0-9]+)$")
_LABEL = re.compile(r"^[a-zA-Z0-9]+$")


@dataclass(frozen=True)
class BidsQuery:
    """Where and what to look for; see the module docstring."""

    root: str | pathlib.Path
    space: str
    contrasts: tuple[str, ...]
    session: str | None = None
    desc: str | None = None
    mask_desc: str = "brain"
    lesion_desc: str | None = "lesion"
    participants: str | pathlib.Path | None = None
    group_column: str = "group"
    control_values: tuple[str, ...] = ("control",)
    case_values: tuple[str, ...] = ("case", "patient")


@dataclass(frozen=True)
class Skip:
    subject: str
    path: str
    reason: str


@dataclass(frozen=True)
class BidsCohort:
    root: pathlib.Path
    rows: list[ManifestRow]
    contrasts: tuple[str, ...]
    skipped: tuple[Skip, ...]
    notes: tuple[str, ...]
    query_record: dict  # JSON-ready record of the query (for the cache description)


def parse_name(name: str) -> tuple[dict[str, str], str] | None:
    """``sub-01_space-X_desc-brain_mask.nii.gz`` -> ({"sub": "01", "space": "X", "desc": "brain"}, "mask");
    None when the name is not ``key-value`` entities (starting with sub) plus a suffix, .nii or .nii.gz."""
    m = _NAME.match(name)
    if not m:
        return None
    parts = m.group("stem").split("_")
    if len(parts) < 2:
        return None
    entities = {}
    for part in parts[:-1]:
        e = _ENTITY.match(part)
        if not e or e.group("key") in entities:
            return None
        entities[e.group("key")] = e.group("value")
    if next(iter(entities)) != "sub" or not _LABEL.match(parts[-1]):
        return None
    return entities, parts[-1]


def _check_query(q: BidsQuery) -> pathlib.Path:
    root = pathlib.Path(q.root).expanduser()
    if not root.is_dir():
        raise CohortError(f"BIDS folder {root} not found; give the derivatives folder that holds the sub-*/ folders")
    for name, value in (("--space", q.space), ("--session", q.session), ("--desc", q.desc),
                        ("--mask-desc", q.mask_desc), ("--lesion-desc", q.lesion_desc)):
        if value is not None and not (isinstance(value, str) and _LABEL.match(value)):
            raise InputError(f"{name}: {value!r} is not a BIDS label (letters and digits only), e.g. --space MNI152NLin2009cAsym")
    if not q.contrasts or any(not (isinstance(c, str) and _LABEL.match(c)) for c in q.contrasts) \
            or len(set(q.contrasts)) != len(q.contrasts):
        raise InputError(f"--contrasts: {list(q.contrasts)!r} must be distinct BIDS suffixes (letters and digits), e.g. T1w,FLAIR")
    return root.resolve()


def _read_participants(path: pathlib.Path, q: BidsQuery) -> dict[str, str]:
    with open(path, newline="", encoding="utf-8-sig") as f:
        table = [row for row in csv.reader(f, delimiter="\t") if any(c.strip() for c in row)]
    header = [h.strip() for h in table[0]] if table else []
    for column in ("participant_id", q.group_column):
        if column not in header:
            fix = "BIDS names it participant_id" if column == "participant_id" else "pass --group-column NAME"
            raise CohortError(f"{path}: no column {column!r} (found columns: {', '.join(header) or 'none'}); {fix}")
    i, g = header.index("participant_id"), header.index(q.group_column)
    return {row[i].strip(): row[g].strip() if g < len(row) else "" for row in table[1:] if i < len(row)}


def discover(q: BidsQuery) -> BidsCohort:
    """Find the cohort in a BIDS derivatives folder; see the module docstring for the rules."""
    root = _check_query(q)
    skipped: list[Skip] = []
    notes: list[str] = []
    found: dict[str, dict[str, list]] = {}  # subject -> session ("" if none) -> [(entities, suffix, path)]
    for anat in sorted(list(root.glob("sub-*/anat")) + list(root.glob("sub-*/ses-*/anat"))):
        sub = anat.parts[len(root.parts)]
        ses = anat.parent.name if anat.parent.name.startswith("ses-") else ""
        for path in sorted(p for p in anat.iterdir() if p.name.endswith((".nii", ".nii.gz"))):
            parsed = parse_name(path.name)
            if parsed is None:
                skipped.append(Skip(sub, str(path), "file name is not BIDS (sub-<label>[_key-value...]_<suffix>.nii[.gz])"))
                continue
            ent, suffix = parsed
            if f"sub-{ent['sub']}" != sub or (ses and f"ses-{ent.get('ses')}" != ses):
                skipped.append(Skip(sub, str(path), f"entities sub-{ent['sub']}/ses-{ent.get('ses')} do not match the folder {anat.relative_to(root)}"))
                continue
            if ent.get("space") == q.space:
                found.setdefault(sub, {}).setdefault(ses, []).append((ent, suffix, path))
    groups = None
    tsv = pathlib.Path(q.participants).expanduser() if q.participants is not None else root / "participants.tsv"
    if tsv.is_file():
        groups = _read_participants(tsv, q)
    elif q.participants is not None:
        raise CohortError(f"participants table {tsv} not found; give the path of participants.tsv or leave the option out")
    else:
        notes.append(f"no participants.tsv in {root}: every subject is taken as a control")
    rows = []
    for sub in sorted(set(found) | set(groups or {})):
        if sub not in found:
            skipped.append(Skip(sub, str(tsv), f"listed in participants.tsv but no image with space-{q.space} under {sub}/"))
            continue
        if groups is not None and sub not in groups:
            skipped.append(Skip(sub, str(root / sub), "not listed in participants.tsv; add it with its group"))
            continue
        role = "control"
        if groups is not None:
            value = groups[sub]
            role = "control" if value in q.control_values else "case" if value in q.case_values else None
            if role is None:
                skipped.append(Skip(sub, str(tsv), f"{q.group_column} {value!r} is neither a control value {list(q.control_values)} nor a case value {list(q.case_values)}"))
                continue
        row = _pick(sub, role, found[sub], q, skipped)
        if row is not None:
            rows.append(row)
    record = {"space": q.space, "contrasts": list(q.contrasts), "session": q.session, "desc": q.desc,
              "mask_desc": q.mask_desc, "lesion_desc": q.lesion_desc, "participants": str(tsv) if groups is not None else None,
              "group_column": q.group_column, "control_values": list(q.control_values), "case_values": list(q.case_values),
              "notes": notes}
    if not rows:
        raise CohortError(f"BIDS folder {root}: no subject has {'+'.join(q.contrasts)} images with space-{q.space} "
                          f"({len(skipped)} skipped{': ' + skipped[0].reason if skipped else ''}); check --space and --contrasts")
    return BidsCohort(root, rows, tuple(q.contrasts), tuple(skipped), tuple(notes), record)


def _pick(sub: str, role: str, sessions: dict, q: BidsQuery, skipped: list) -> ManifestRow | None:
    """The subject's row, or None (with a Skip appended) when its files are missing or ambiguous."""
    if q.session is not None:
        sessions = {s: f for s, f in sessions.items() if s == f"ses-{q.session}"}
    complete, reasons = {}, []
    for ses, files in sorted(sessions.items()):
        where = f"{sub}/{ses + '/' if ses else ''}anat"
        pick, ok = {}, True
        for c in q.contrasts:
            hits = [p for e, s, p in files if s == c and (q.desc is None or e.get("desc") == q.desc)]
            if len(hits) != 1:
                ok = False
                reasons.append(f"{len(hits)} {c} images with space-{q.space}{f' and desc-{q.desc}' if q.desc else ''} in {where}"
                               + (f" ({', '.join(p.name for p in hits)}); pick one with --desc or --session" if hits else ""))
        for key, desc in (("mask", q.mask_desc), ("lesion", q.lesion_desc)):
            hits = [p for e, s, p in files if s == "mask" and desc is not None and e.get("desc") == desc]
            if len(hits) > 1:
                ok = False
                reasons.append(f"{len(hits)} desc-{desc} masks in {where} ({', '.join(p.name for p in hits)}); keep one")
            pick[key] = hits[0] if hits else None
        if ok:
            complete[ses] = ManifestRow(sub, role, {c: next(p for e, s, p in files if s == c and (q.desc is None or e.get("desc") == q.desc))
                                                    for c in q.contrasts}, pick["mask"], pick["lesion"])
    if len(complete) == 1:
        return next(iter(complete.values()))
    if len(complete) > 1:
        reason = f"complete data in sessions {', '.join(complete)}; pick one with --session LABEL"
    elif q.session is not None and not sessions:
        reason = f"no ses-{q.session} folder with images in space-{q.space}"
    else:
        reason = "; ".join(reasons)
    skipped.append(Skip(sub, sub, reason))
    return None


def skipped_csv(skipped: list[dict]) -> str:
    """The ``skipped.csv`` table: one line per subject or file left out, with the reason."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(("subject", "path", "reason"))
    w.writerows((s["subject"], s["path"], s["reason"]) for s in skipped)
    return buf.getvalue()

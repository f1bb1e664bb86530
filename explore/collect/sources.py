"""Collect: finding a study's files in a folder tree or a manifest CSV, and its metadata sidecar."""

from __future__ import annotations

import csv
import hashlib
import io
import os
from dataclasses import dataclass
from pathlib import Path

from explore.study import StudyError

SOURCES = ("consumer", "owned")
MANIFEST_REQUIRED = ("path", "brand", "source")
MANIFEST_OPTIONAL = ("category", "posted_at", "poster")
SIDECAR_OPTIONAL = ("posted_at", "poster")
COLUMNS = [
    "image_id",
    "path",
    "relpath",
    "brand",
    "category",
    "source",
    "posted_at",
    "poster",
    "sha256",
    "width",
    "height",
    "status",
    "reason",
    "duplicate_of",
    "near_duplicate_of",
    "repost_of",
    "near_repost_of",
    "near_repost_bits",
]
_CLUTTER = {".ds_store", "thumbs.db", "desktop.ini"}
_ROOT_DOCUMENTS = {".toml", ".csv", ".json", ".md", ".txt"}


class CollectError(StudyError):
    """The images source named by a study (root folder or manifest) cannot be read as a whole."""




@dataclass
class _Entry:
    """One candidate row before its file is read."""

    path: str
    relpath: str
    image_key: str  # what the image id is computed from
    brand: str = ""
    category: str = ""
    source: str = ""
    posted_at: str = ""
    poster: str = ""
    status: str = ""
    reason: str = ""
    extras: dict | None = None


def _image_id(key: str) -> str:
    return hashlib.sha1(key.encode("utf-8")).hexdigest()[:12]


def _tree_entries(root: Path, categories: dict[str, str], exclude: tuple[Path, ...] = ()) -> list[_Entry]:
    entries = []
    skip = {p.resolve() for p in exclude}
    for folder, dirs, files in os.walk(root):
        # An output folder inside the images root holds our own files, not photos.
        dirs[:] = sorted(d for d in dirs if (Path(folder) / d).resolve() not in skip)
        for name in sorted(files):
            if name.lower() in _CLUTTER or name.startswith("._"):
                continue
            if Path(folder) == root and Path(name).suffix.lower() in _ROOT_DOCUMENTS:
                continue  # the study file, a manifest or notes kept beside the brands
            full = Path(folder) / name
            rel = full.relative_to(root).as_posix()
            parts = rel.split("/")
            entry = _Entry(path=str(full), relpath=rel, image_key=rel)
            if len(parts) < 3:
                entry.status = "misplaced"
                entry.reason = (
                    "not inside ROOT/<brand>/<source>/ (expected a brand folder, then a "
                    "'consumer' or 'owned' folder)"
                )
                if len(parts) == 2:
                    entry.brand = parts[0]
            else:
                entry.brand = parts[0]
                entry.category = categories.get(parts[0], "all")
                source = parts[1].lower()
                if source in SOURCES:
                    entry.source = source
                else:
                    entry.status = "misplaced"
                    entry.reason = (
                        f"source folder '{parts[1]}' is neither 'consumer' nor 'owned'"
                    )
            entries.append(entry)
    entries.sort(key=lambda e: e.relpath)
    return entries


def _manifest_entries(manifest: Path, root: Path, categories: dict[str, str]) -> list[_Entry]:
    try:
        text = manifest.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise
    except UnicodeDecodeError as exc:
        raise CollectError(f"{manifest}: the manifest is not UTF-8 text: {exc}") from None
    except OSError as exc:
        raise CollectError(f"{manifest}: cannot read the manifest: {exc}") from None
    rows = list(csv.reader(io.StringIO(text)))
    if not rows:
        raise CollectError(f"{manifest}: the manifest is empty; it needs a header row with path, brand, source")
    header = [h.strip().lower() for h in rows[0]]
    missing = [c for c in MANIFEST_REQUIRED if c not in header]
    if missing:
        raise CollectError(
            f"{manifest}: the manifest lacks column(s) {', '.join(missing)}; "
            f"its header is: {', '.join(rows[0])}"
        )
    extras = _extra_columns(manifest, header, MANIFEST_REQUIRED + MANIFEST_OPTIONAL)
    doubled = sorted({h for h in header if header.count(h) > 1})
    if doubled:
        raise CollectError(f"{manifest}: column(s) {', '.join(doubled)} appear more than once")

    real_root = root.resolve()
    seen: dict[str, int] = {}
    entries = []
    line_numbers: list[int] = []  # of each entry, for messages
    for line_no, row in enumerate(rows[1:], start=2):
        if not row or all(not cell.strip() for cell in row):
            continue
        line_numbers.append(line_no)
        where = f"manifest line {line_no}"
        if len(row) != len(header):
            raw = ",".join(row)
            entries.append(
                _Entry(
                    path="",
                    relpath=row[0].strip() if row else "",
                    image_key=f"{raw}@{line_no}",
                    status="bad_row",
                    reason=f"{where} has {len(row)} fields; the header has {len(header)}",
                )
            )
            continue
        cells = {h: v.strip() for h, v in zip(header, row)}
        written = cells["path"]
        entry = _Entry(
            path="",
            relpath=written,
            image_key=f"{written}@{line_no}",  # replaced by the resolved path once it is valid
            brand=cells["brand"],
            source=cells["source"].lower(),
            posted_at=cells.get("posted_at", ""),
            poster=cells.get("poster", ""),
            extras={h: cells[h] for h in extras},
        )
        entry.category = cells.get("category", "") or categories.get(entry.brand, "all")
        entries.append(entry)
        problems = []
        if not written:
            problems.append("the path is empty")
        if not entry.brand:
            problems.append("the brand is empty")
        if entry.source not in SOURCES:
            problems.append(f"source '{cells['source']}' is neither 'consumer' nor 'owned'")
        if problems:
            entry.status, entry.reason = "bad_row", f"{where}: " + "; ".join(problems)
            continue
        candidate = Path(written).expanduser()
        if not candidate.is_absolute():
            candidate = root / candidate
        resolved = candidate.resolve()
        entry.path = str(resolved)
        if not resolved.is_relative_to(real_root):
            entry.status = "outside_root"
            entry.reason = (
                f"{where}: path '{written}' leads outside the images root {real_root}; refused"
            )
            continue
        key = resolved.relative_to(real_root).as_posix()
        entry.image_key = key
        if key in seen:
            entry.status = "bad_row"
            entry.reason = f"{where}: '{written}' is already listed on line {seen[key]}"
            entry.image_key = f"{key}@{line_no}"
            continue
        seen[key] = line_no
        if not resolved.exists():
            entry.status, entry.reason = "missing", f"{where}: '{written}' does not exist"
        elif resolved.is_dir():
            entry.status, entry.reason = "bad_row", f"{where}: '{written}' is a folder, not a file"
    _parse_posted_at(manifest, entries, line_numbers)
    return entries


def _extra_columns(path: Path, header: list[str], standard: tuple[str, ...], refused: tuple[str, ...] = ()) -> list[str]:
    """The extra (kept) columns of a metadata CSV; refuses typos of standard names and clashes."""
    import difflib

    extras = []
    for name in header:
        if name in standard:
            continue
        if name in refused:
            raise CollectError(
                f"{path}: column '{name}' is not allowed here: the folder tree decides brand and "
                f"source, and the study's [brands] table the category"
            )
        if not name:
            raise CollectError(f"{path}: a column has an empty name")
        close = difflib.get_close_matches(name, list(standard) + list(refused), n=1, cutoff=0.8)
        if close:
            raise CollectError(
                f"{path}: unknown column {name} (did you mean '{close[0]}'?); expected "
                f"{', '.join(standard)} and any extra columns with other names"
            )
        if name in COLUMNS:
            raise CollectError(
                f"{path}: column '{name}' would overwrite the images table's own column; rename it"
            )
        extras.append(name)
    return extras


def _parse_posted_at(path: Path, entries: list[_Entry], lines: list[str]) -> None:
    """Normalise ``posted_at`` to ISO 8601 text; raise naming the rows that do not parse."""
    from datetime import date, datetime

    bad = []
    for entry, line in zip(entries, lines):
        text = entry.posted_at
        if not text:
            continue
        try:  # a date stays a date; a date and time becomes its ISO 8601 form
            entry.posted_at = (date if len(text) <= 10 else datetime).fromisoformat(text).isoformat()
        except ValueError:
            bad.append(f"line {line} ('{text}')")
    if bad:
        shown = ", ".join(bad[:5]) + (f" and {len(bad) - 5} more" if len(bad) > 5 else "")
        raise CollectError(
            f"{path}: posted_at is not an ISO 8601 date or time (e.g. 2024-05-01 or "
            f"2024-05-01T14:30:00+02:00) on {shown}"
        )


def _apply_sidecar(sidecar: Path, root: Path, entries: list[_Entry]) -> list[str]:
    """Add poster, posted_at and extra columns from a folder study's sidecar CSV; returns the extras."""
    if not sidecar.is_file():
        raise FileNotFoundError(f"{sidecar}: metadata file (images.metadata) not found")
    try:
        text = sidecar.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise CollectError(f"{sidecar}: the metadata file is not UTF-8 text: {exc}") from None
    except OSError as exc:
        raise CollectError(f"{sidecar}: cannot read the metadata file: {exc}") from None
    rows = list(csv.reader(io.StringIO(text)))
    if not rows or "path" not in [h.strip().lower() for h in rows[0]]:
        raise CollectError(f"{sidecar}: the metadata file needs a header row with a 'path' column")
    header = [h.strip().lower() for h in rows[0]]
    doubled = sorted({h for h in header if header.count(h) > 1})
    if doubled:
        raise CollectError(f"{sidecar}: column(s) {', '.join(doubled)} appear more than once")
    extras = _extra_columns(sidecar, header, ("path",) + SIDECAR_OPTIONAL, refused=("brand", "source", "category"))
    by_path = {e.relpath: e for e in entries}
    seen: dict[str, int] = {}
    unknown, touched, lines = [], [], []
    for line_no, row in enumerate(rows[1:], start=2):
        if not row or all(not cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            raise CollectError(f"{sidecar}: line {line_no} has {len(row)} fields; the header has {len(header)}")
        cells = {h: v.strip() for h, v in zip(header, row)}
        rel = Path(cells["path"]).as_posix()
        if rel in seen:
            raise CollectError(f"{sidecar}: line {line_no}: '{rel}' is already listed on line {seen[rel]}")
        seen[rel] = line_no
        entry = by_path.get(rel)
        if entry is None:
            unknown.append(f"line {line_no} ('{rel}')")
            continue
        entry.poster = cells.get("poster", "")
        entry.posted_at = cells.get("posted_at", "")
        entry.extras = {h: cells[h] for h in extras}
        touched.append(entry)
        lines.append(str(line_no))
    if unknown:
        shown = ", ".join(unknown[:5]) + (f" and {len(unknown) - 5} more" if len(unknown) > 5 else "")
        raise CollectError(f"{sidecar}: no such file under the images root {root}: {shown}")
    _parse_posted_at(sidecar, touched, lines)
    return extras

"""Collect: find a study's images and describe every file in the images table.

Two layouts are read.

**Folder tree** ``ROOT/<brand>/<source>/...``: the first folder under the root
names the brand, the second the source (``consumer`` or ``owned``, any case);
deeper folders are allowed and ignored. A file anywhere else (directly under
the root, directly under a brand folder, or under a source folder with another
name) is listed with status ``misplaced``. Operating-system clutter
(``.DS_Store``, ``Thumbs.db``, ``desktop.ini``, AppleDouble ``._*`` files) is
not listed, nor are documents directly under the root (``.toml``, ``.csv``,
``.json``, ``.md``, ``.txt``: the study file ``explore init`` writes there, a
manifest, notes); every other file is.

**Manifest** (a CSV file, UTF-8, header row required). Columns:

=============  ========  ==========================================================
column         required  meaning
=============  ========  ==========================================================
``path``       yes       image file, relative to the images root (or absolute,
                         but then inside the root)
``brand``      yes       brand name
``source``     yes       ``consumer`` or ``owned`` (any case)
``category``   no        the brand's category; when empty, the study's
                         ``[brands]`` table decides, else ``all``
``posted_at``  no        when the image was posted: ISO 8601 (``2024-05-01``,
                         ``2024-05-01T14:30:00+02:00``); rows that do not parse
                         are named in the error
``poster``     no        id of the account that posted the photo (any text);
                         photos of one poster are treated as a cluster by the
                         attribute statistics
=============  ========  ==========================================================

Any other column is kept as it is and carried into the images table (and so
into its CSV export), after the standard columns. A column whose name is close
to a standard one (a misspelt ``catgory``) or that would overwrite a column of
the images table (``status``, ``sha256`` ...) is refused, naming the column.

**Metadata sidecar** for a folder tree (study key ``images.metadata``): a CSV
with a ``path`` column (relative to the root, as the tree lists it) and
``poster``, ``posted_at`` and any extra columns, the same rules as the
manifest. Brand and source come from the folders, so those columns are refused
there. A path that is not a file of the tree is refused, naming its line.

**Photos per poster** (``images.max_per_poster``, 0 = no cap): within each
brand x source, a poster with more usable photos than the cap keeps a seeded
random sample of that many (seeded from the study seed and the poster); the
others stay in the table with status ``over_poster_cap``. A path that resolves (following symbolic links) outside
the declared root is ``outside_root``; one that does not exist is ``missing``;
a row with an empty path or brand, an unknown source, the wrong number of
fields, or a path listed before is ``bad_row``.

Every file that cannot be used keeps its row, with a ``status`` and a
human-readable ``reason`` (see DEVELOPERS.md, "Images table"). One bad file
never stops a run. Exact duplicates (same sha256 of the file bytes) are kept
once within a brand and source: later copies there get status ``duplicate``
and ``duplicate_of``; the same photo under another brand or source is kept
there too, since each brand and source counts what was posted to it (the
embedding is still computed once per content). A brand's owned photo found
again in its consumer set is a **repost**: its consumer row gets
``repost_of`` (the owned row's id) and, by default (``reposts="exclude"``,
study key ``images.reposts``), status ``repost``, so consumer shares describe
what consumers posted themselves; ``repost_summary`` reports them per brand.
Visually
near-identical images within one brand x source (a 64-bit difference hash of
the content box, ``content_hash``, within ``NEAR_DUPLICATE_BITS``) are
proposed in ``near_duplicate_of``; ``explore.duplicates`` confirms them with
the image vectors after embed.

Decoding (``open_rgb``) reads JPEG (and MPO), PNG, WebP, GIF (first frame),
BMP and TIFF, applies the EXIF orientation, and converts palette, CMYK, 16-bit
and alpha images to 8-bit RGB.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
import warnings
import zlib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from PIL import Image, ImageOps, UnidentifiedImageError

from explore.study import StudyError

#: Image formats we decode (PIL plugin names; the JPEG plugin also opens MPO,
#: the multi-picture JPEG many phones write). Limiting PIL to these keeps
#: rarely used decoders away.
FORMATS = ("JPEG", "PNG", "WEBP", "GIF", "BMP", "TIFF")

#: Largest image accepted, in pixels. This equals PIL's own decompression-bomb
#: error level (2 x ``Image.MAX_IMAGE_PIXELS`` = 2 x 89,478,485 in Pillow's
#: defaults), so a 108-megapixel phone photo passes and a crafted bomb does not.
MAX_PIXELS = 178_956_970

#: Near-duplicate proposal threshold: content hashes (64 bits) at most this
#: many bits apart, within one brand x source, are proposed as near-identical;
#: ``explore.duplicates`` confirms them with the image vectors. Chosen on an
#: outside set with known duplicates (benchmarks/near_duplicates.py).
NEAR_DUPLICATE_BITS = 14

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
]
_CLUTTER = {".ds_store", "thumbs.db", "desktop.ini"}
_ROOT_DOCUMENTS = {".toml", ".csv", ".json", ".md", ".txt"}

# collect_images applies MAX_PIXELS to every header itself, so PIL's warning
# (issued at half that size) would only repeat what the table already says.
warnings.filterwarnings("ignore", category=Image.DecompressionBombWarning)


class CollectError(StudyError):
    """The images source named by a study (root folder or manifest) cannot be read as a whole."""


class ImageProblem(Exception):
    """One file cannot be used; ``status`` is the skip kind, the message the reason."""

    def __init__(self, status: str, reason: str):
        super().__init__(reason)
        self.status = status
        self.reason = reason


# --------------------------------------------------------------------------
# Decoding


def open_rgb(
    path: str | Path,
    draft_size: int | None = None,
    max_pixels: int = MAX_PIXELS,
    expect_sha256: str | None = None,
    data: bytes | None = None,
) -> Image.Image:
    """Decode one image file to an upright 8-bit RGB PIL image.

    Parameters
    ----------
    path : the image file.
    draft_size : when given, JPEGs are decoded at a reduced scale (1/2, 1/4 or
        1/8, libjpeg's DCT scaling) chosen so both sides stay at least this
        many pixels. Much cheaper than a full decode when the model input is
        small. Other formats are decoded in full, then shrunk by a whole
        factor (box filter) while both sides stay at least this size.
    max_pixels : images larger than this are refused (decompression bombs).
    expect_sha256 : when given, the file's bytes must still hash to this
        (so vectors are never stored under the hash of other content).
    data : the file's bytes, when they were read elsewhere (a cluster worker
        that cannot see ``path`` gets them from the driver); ``path`` is then
        only named in messages.

    Returns
    -------
    PIL.Image.Image in mode ``RGB``, EXIF orientation applied.

    Raises
    ------
    ImageProblem with ``status`` one of ``empty``, ``unreadable``, ``not_image``,
    ``too_large``, ``truncated``, ``corrupt``, or ``changed`` (content differs
    from ``expect_sha256``).
    """
    if data is None:
        data = _read_bytes(Path(path))
    elif not data:
        raise ImageProblem("empty", "the file is empty (0 bytes)")
    if expect_sha256 is not None and hashlib.sha256(data).hexdigest() != expect_sha256:
        raise ImageProblem("changed", "the file's content changed since it was collected")
    image, _ = _decode(data, draft_size, max_pixels)
    return image


def _read_bytes(path: Path) -> bytes:
    try:
        with open(path, "rb") as f:
            data = f.read()
    except PermissionError:
        raise ImageProblem("unreadable", "permission denied when reading the file") from None
    except FileNotFoundError:
        raise ImageProblem("missing", "the file no longer exists (or is a broken link)") from None
    except IsADirectoryError:
        raise ImageProblem("bad_row", "the path is a folder, not a file") from None
    except OSError as exc:
        raise ImageProblem("unreadable", f"cannot read the file: {exc.strerror or exc}") from None
    if not data:
        raise ImageProblem("empty", "the file is empty (0 bytes)")
    return data


def _decode(data: bytes, draft_size: int | None, max_pixels: int) -> tuple[Image.Image, tuple[int, int]]:
    """Bytes -> (upright RGB image, upright full-resolution (width, height))."""
    try:
        image = Image.open(io.BytesIO(data), formats=FORMATS)
    except UnidentifiedImageError:
        raise ImageProblem(
            "not_image", "not a JPEG, PNG, WebP, GIF, BMP or TIFF image that can be identified"
        ) from None
    except Image.DecompressionBombError as exc:
        raise ImageProblem("too_large", f"refused as a decompression bomb: {exc}") from None
    except Exception as exc:  # a broken header can raise almost anything inside PIL
        raise ImageProblem("corrupt", f"the image header cannot be read: {exc}") from None
    width, height = image.size
    if width * height > max_pixels:
        raise ImageProblem(
            "too_large",
            f"{width}x{height} = {width * height:,} pixels is over the limit of {max_pixels:,} "
            "(decompression-bomb protection)",
        )
    try:
        if draft_size and image.format in ("JPEG", "MPO"):
            image.draft(None, (draft_size, draft_size))
        image.load()
    except Image.DecompressionBombError as exc:
        raise ImageProblem("too_large", f"refused as a decompression bomb: {exc}") from None
    except OSError as exc:
        if "truncated" in str(exc).lower():
            raise ImageProblem("truncated", f"the file is truncated: {exc}") from None
        raise ImageProblem("corrupt", f"the image data cannot be decoded: {exc}") from None
    except Exception as exc:
        raise ImageProblem("corrupt", f"the image data cannot be decoded: {exc}") from None

    try:
        orientation = int(image.getexif().get(0x0112, 1) or 1)
    except Exception:  # malformed EXIF: keep the image, ignore the tag
        orientation = 1
    try:
        if orientation in (2, 3, 4, 5, 6, 7, 8):
            image = ImageOps.exif_transpose(image)
        rgb = to_rgb(image)
        if draft_size:  # other formats (and JPEGs libjpeg could not scale enough): box-reduce
            factor = min(rgb.size) // draft_size
            if factor >= 2:
                rgb = rgb.reduce(factor)
    except Exception as exc:
        raise ImageProblem("corrupt", f"the image cannot be converted to RGB: {exc}") from None
    if orientation in (5, 6, 7, 8):  # these orientations swap the sides
        width, height = height, width
    return rgb, (width, height)


def to_rgb(image: Image.Image) -> Image.Image:
    """Convert any PIL mode to 8-bit RGB the way a viewer would show it.

    - 16-bit and 32-bit integer greyscale (``I;16*``, ``I``) is scaled by
      255/65535 (PIL's own ``convert("L")`` clips it instead, turning most
      pixels white); float ``F`` images in [0, 1] are scaled by 255.
    - Transparent images (alpha channel or palette transparency) are
      composited over white.
    - CMYK uses the embedded ICC profile when there is one (LittleCMS via
      ``PIL.ImageCms``), else PIL's conversion.
    """
    mode = image.mode
    if mode == "RGB":
        return image
    if mode.startswith("I") or mode == "F":
        values = np.asarray(image, dtype=np.float64)
        if mode == "F" and values.size and np.nanmax(values) <= 1.0:
            values = values * 255.0
        elif mode != "F":
            values = np.clip(values, 0, 65535) * (255.0 / 65535.0)
        grey = np.clip(np.rint(np.nan_to_num(values)), 0, 255).astype(np.uint8)
        return Image.fromarray(grey, mode="L").convert("RGB")
    if mode == "P":
        if "transparency" in image.info:
            return _over_white(image.convert("RGBA"))
        return image.convert("RGB")
    if mode in ("RGBA", "RGBa", "LA", "La", "PA"):
        return _over_white(image.convert("RGBA"))
    if mode == "CMYK":
        icc = image.info.get("icc_profile")
        if icc:
            try:
                from PIL import ImageCms

                source = ImageCms.ImageCmsProfile(io.BytesIO(icc))
                return ImageCms.profileToProfile(
                    image, source, ImageCms.createProfile("sRGB"), outputMode="RGB"
                )
            except Exception:  # a broken profile: fall back to the plain formula
                pass
        return image.convert("RGB")
    return image.convert("RGB")


def _over_white(rgba: Image.Image) -> Image.Image:
    background = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
    background.alpha_composite(rgba)
    return background.convert("RGB")


def difference_hash(image: Image.Image) -> int:
    """64-bit difference hash (dHash): grey 9x8 thumbnail, bit = left pixel brighter than right.

    Krawetz, "Kind of Like That" (2013). Robust to resizing and recompression,
    so re-encoded or resized copies of one photo land a few bits apart.
    """
    grey = np.asarray(image.convert("L").resize((9, 8), Image.Resampling.BOX), dtype=np.int16)
    bits = (grey[:, :-1] > grey[:, 1:]).ravel()
    return int(np.packbits(bits).view(">u8")[0])


#: A picture's border counts as a uniform background when at least this share
#: of its border pixels are within ``BACKGROUND_TOLERANCE`` grey levels of the
#: border's median (studio shots, clip art and product photos on white).
BACKGROUND_BORDER_SHARE = 0.8
BACKGROUND_TOLERANCE = 12


def content_box(image: Image.Image) -> tuple[int, int, int, int] | None:
    """Bounding box (left, top, right, bottom) of what is not uniform background, or None.

    None when the border is not a uniform background (an ordinary photo) or
    when nothing but background is found. Used so that near-duplicate hashes
    describe the object, not the white space around it: two unrelated objects
    on white otherwise share most of their difference-hash bits.
    """
    grey = np.asarray(image.convert("L"), dtype=np.int16)
    if grey.shape[0] < 4 or grey.shape[1] < 4:
        return None
    border = np.concatenate([grey[0], grey[-1], grey[1:-1, 0], grey[1:-1, -1]])
    background = np.median(border)
    if np.mean(np.abs(border - background) <= BACKGROUND_TOLERANCE) < BACKGROUND_BORDER_SHARE:
        return None
    content = np.abs(grey - background) > BACKGROUND_TOLERANCE
    rows, cols = np.flatnonzero(content.any(axis=1)), np.flatnonzero(content.any(axis=0))
    if len(rows) < 2 or len(cols) < 2:
        return None
    return int(cols[0]), int(rows[0]), int(cols[-1]) + 1, int(rows[-1]) + 1


def content_hash(image: Image.Image) -> int:
    """Difference hash of the picture with any uniform background border cropped away."""
    box = content_box(image)
    return difference_hash(image.crop(box) if box else image)


# --------------------------------------------------------------------------
# Finding files


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


def _cap_posters(table: pd.DataFrame, cap: int, seed: int) -> None:
    """Keep at most ``cap`` usable photos per poster within each brand x source (seeded)."""
    if cap <= 0:
        return
    ok = (table["status"] == "ok") & (table["poster"] != "")
    for key, frame in table[ok].groupby(["brand", "source", "poster"], sort=True):
        if len(frame) <= cap:
            continue
        rng = np.random.default_rng([int(seed) & 0xFFFFFFFF, zlib.crc32(repr(key).encode("utf-8"))])
        keep = set(rng.choice(frame.index.to_numpy(), size=cap, replace=False).tolist())
        drop = [i for i in frame.index if i not in keep]
        table.loc[drop, "status"] = "over_poster_cap"
        table.loc[drop, "reason"] = (
            f"poster '{key[2]}' has {len(frame)} usable photos of {key[0]} ({key[1]}); "
            f"images.max_per_poster = {cap} keeps a seeded sample of {cap}"
        )


# --------------------------------------------------------------------------
# The images table


def collect_images(
    root: str | Path | None = None,
    manifest: str | Path | None = None,
    categories: dict[str, str] | None = None,
    progress: bool = True,
    max_pixels: int = MAX_PIXELS,
    near_duplicate_bits: int = NEAR_DUPLICATE_BITS,
    workers: int | None = None,
    metadata: str | Path | None = None,
    max_per_poster: int = 0,
    seed: int = 0,
    reposts: str = "exclude",
    exclude: tuple[Path, ...] = (),
    index: str | Path | None = None,
) -> pd.DataFrame:
    """Find the images and build the images table (one row per file found).

    Parameters
    ----------
    root : the folder tree ``ROOT/<brand>/<source>/...``; with a manifest, the
        folder its paths are relative to and may not leave (default: the
        manifest's folder).
    manifest : optional CSV file (columns in the module docstring).
    categories : brand -> category (a study's ``[brands]`` table); brands not
        in it get ``all``.
    progress : show a progress bar (count, rate, time left) while reading.
    max_pixels : larger images are refused as ``too_large``.
    near_duplicate_bits : Hamming distance (of 64 bits) up to which two
        difference hashes count as near-identical.
    workers : threads reading and hashing files (default: the CPUs available).
    metadata : optional sidecar CSV for a folder tree (path, poster, posted_at,
        extra columns; see the module docstring).
    max_per_poster : at most this many usable photos per poster within a
        brand x source (0: no cap); the rest get status ``over_poster_cap``.
    seed : seeds the choice of the photos kept under the cap.
    reposts : ``exclude`` (a brand's owned photo re-posted in its consumer set
        gets status ``repost``) or ``keep`` (stays ``ok``); ``repost_of`` is
        filled either way.
    exclude : folders under the root that are not searched (a study's output folder).
    index : a read index file (``collect_index.ReadIndex``): files whose
        (path, size, mtime) match an earlier successful read are not opened
        again; updated at the end. None: read every file.

    Returns
    -------
    pandas.DataFrame with the columns of DEVELOPERS.md "Images table".
    """
    categories = dict(categories or {})
    if manifest is not None:
        manifest = Path(manifest)
        if not manifest.is_file():
            raise FileNotFoundError(f"{manifest}: manifest file not found")
        root = Path(root) if root is not None else manifest.parent
        if not root.is_dir():
            raise CollectError(f"{root}: the images root given for manifest {manifest} is not a folder")
        if metadata is not None:
            raise CollectError(
                f"{metadata}: a metadata sidecar is for a folder tree; with a manifest, put the "
                f"poster and extra columns in the manifest {manifest}"
            )
        entries = _manifest_entries(manifest, root.absolute(), categories)
    elif root is not None:
        root = Path(root)
        if not root.exists():
            raise FileNotFoundError(f"{root}: images folder not found")
        if not root.is_dir():
            raise CollectError(f"{root}: expected a folder ROOT/<brand>/<source>/... of images")
        entries = _tree_entries(root.absolute(), categories, tuple(Path(p) for p in exclude))
        if metadata is not None:
            _apply_sidecar(Path(metadata), root.absolute(), entries)
    else:
        raise CollectError("collect needs an images root folder or a manifest CSV")

    todo = [e for e in entries if not e.status]
    results = _read_all(todo, progress, max_pixels, workers, index)
    hashes: dict[int, int] = {}
    rows = []
    extra_names: list[str] = []
    by_entry = dict(zip(map(id, todo), results))
    for entry in entries:
        row = {
            "image_id": _image_id(entry.image_key),
            "path": entry.path,
            "relpath": entry.relpath,
            "brand": entry.brand,
            "category": entry.category,
            "source": entry.source,
            "posted_at": entry.posted_at,
            "poster": entry.poster,
            "sha256": "",
            "width": 0,
            "height": 0,
            "status": entry.status,
            "reason": entry.reason,
            "duplicate_of": "",
            "near_duplicate_of": "",
            "repost_of": "",
        }
        result = by_entry.get(id(entry))
        if result is not None:
            if isinstance(result, ImageProblem):
                row["status"], row["reason"] = result.status, result.reason
            else:
                sha, (w, h), dhash = result
                row.update(sha256=sha, width=w, height=h, status="ok")
                hashes[len(rows)] = dhash
        for name, value in (entry.extras or {}).items():
            row.setdefault(name, value)
            if name not in extra_names:
                extra_names.append(name)
        rows.append(row)

    table = pd.DataFrame(rows, columns=COLUMNS + extra_names)
    for name in extra_names:
        table[name] = table[name].fillna("").astype(str)
    table["width"] = table["width"].astype("int64")
    table["height"] = table["height"].astype("int64")
    if reposts not in ("exclude", "keep"):
        raise ValueError(f"reposts must be 'exclude' or 'keep', got {reposts!r}")
    _flag_duplicates(table)
    _flag_reposts(table, exclude=reposts == "exclude")
    _flag_near_duplicates(table, hashes, near_duplicate_bits)
    _cap_posters(table, max_per_poster, seed)
    return table


def _read_one(entry: _Entry, max_pixels: int):
    """-> (sha256, (width, height), dhash) or an ImageProblem; never raises."""
    try:
        data = _read_bytes(Path(entry.path))
        sha = hashlib.sha256(data).hexdigest()
        # An eighth-scale JPEG decode is enough for the hash and still reads
        # (and so checks) the whole compressed stream.
        image, size = _decode(data, 64, max_pixels)
        return sha, size, content_hash(image)
    except ImageProblem as problem:
        return problem
    except Exception as exc:  # one bad file never stops a run
        return ImageProblem("corrupt", f"unexpected error while reading: {type(exc).__name__}: {exc}")


def _read_all(entries: list[_Entry], progress: bool, max_pixels: int, workers: int | None, index=None) -> list:
    from tqdm.auto import tqdm

    from explore.collect_index import ReadIndex, file_key

    if not entries:
        return []
    read_index = ReadIndex(index) if index is not None else None
    results: list = [None] * len(entries)
    keys: list = [None] * len(entries)
    if read_index is not None:  # unchanged files (same size and mtime) are not opened again
        for i, entry in enumerate(entries):
            keys[i] = file_key(entry.path)  # taken before reading: a change during the read is seen next time
            results[i] = read_index.get(entry.path, keys[i], max_pixels)
    todo = [i for i, result in enumerate(results) if result is None]
    workers = workers or _cpu_count()
    with ThreadPoolExecutor(max_workers=workers) as pool, tqdm(
        total=len(todo), desc="collect", unit="file", disable=not progress or not todo
    ) as bar:
        for i, result in zip(todo, pool.map(lambda i: _read_one(entries[i], max_pixels), todo)):
            results[i] = result
            if read_index is not None:
                read_index.put(entries[i].path, keys[i], result)
            bar.update(1)
    if read_index is not None:
        read_index.save()
    return results


def _cpu_count() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def _flag_duplicates(table: pd.DataFrame) -> None:
    """Later copies of one content within one brand x source become ``duplicate`` (vectorised)."""
    usable = table.loc[table["status"].to_numpy() == "ok", ["brand", "source", "sha256", "image_id", "relpath"]]
    keys = ["brand", "source", "sha256"]
    later = usable.duplicated(keys, keep="first").to_numpy()
    if not later.any():
        return
    first = usable[~later].set_index(keys)
    index = pd.MultiIndex.from_frame(usable.loc[later, keys])
    rows = usable.index[later]
    table.loc[rows, "status"] = "duplicate"
    table.loc[rows, "duplicate_of"] = first.loc[index, "image_id"].to_numpy()
    table.loc[rows, "reason"] = [f"same content as {p} (kept once)" for p in first.loc[index, "relpath"]]


def _flag_reposts(table: pd.DataFrame, exclude: bool) -> None:
    """Mark consumer rows whose content is one of the same brand's owned photos."""
    ok = table["status"] == "ok"
    owned = table[ok & (table["source"] == "owned")]
    first_owned = owned.drop_duplicates(["brand", "sha256"]).set_index(["brand", "sha256"])
    for i in np.flatnonzero((ok & (table["source"] == "consumer")).to_numpy()):
        key = (table.at[i, "brand"], table.at[i, "sha256"])
        if key not in first_owned.index:
            continue
        kept = first_owned.loc[key]
        table.at[i, "repost_of"] = kept["image_id"]
        if exclude:
            table.at[i, "status"] = "repost"
            table.at[i, "reason"] = (
                f"the brand's own photo {kept['relpath']} re-posted in its consumer set; left out "
                "of consumer shares (study key images.reposts = 'keep' counts it)"
            )


def repost_summary(table: pd.DataFrame, examples: int = 3) -> pd.DataFrame:
    """Per brand: how many consumer photos are reposts of its owned photos, with examples.

    Columns: ``brand``, ``category``, ``reposts``, ``consumer_files`` (consumer
    rows that are ``ok`` or ``repost``), ``repost_share`` (reposts /
    consumer_files), ``excluded`` (status ``repost``: left out of consumer
    shares), ``examples`` (up to ``examples`` consumer paths, `` | ``-separated,
    each with the owned path it repeats). Brands without reposts have no row.
    """
    columns = ["brand", "category", "reposts", "consumer_files", "repost_share", "excluded", "examples"]
    if "repost_of" not in table or not (table["repost_of"].fillna("") != "").any():
        return pd.DataFrame(columns=columns)
    path_of = table.set_index("image_id")["relpath"].to_dict()
    consumer = table[(table["source"] == "consumer") & table["status"].isin(["ok", "repost"])]
    rows = []
    for brand, group in consumer.groupby("brand", sort=True):
        hits = group[group["repost_of"].fillna("") != ""]
        if not len(hits):
            continue
        shown = [f"{r.relpath} (= {path_of.get(r.repost_of, r.repost_of)})" for r in hits.head(examples).itertuples()]
        rows.append(
            dict(
                brand=brand,
                category=str(group["category"].iloc[0]),
                reposts=len(hits),
                consumer_files=len(group),
                repost_share=len(hits) / len(group),
                excluded=bool((hits["status"] == "repost").all()),
                examples=" | ".join(shown),
            )
        )
    return pd.DataFrame(rows, columns=columns)


def _flag_near_duplicates(table: pd.DataFrame, hashes: dict[int, int], max_bits: int) -> None:
    """Point each used image at the first earlier used image of its brand x source within ``max_bits``.

    These are proposals: ``explore.duplicates`` confirms them with the image vectors after embed.
    """
    used = [i for i in np.flatnonzero(table["status"].to_numpy() == "ok") if i in hashes]
    if len(used) < 2 or max_bits < 0:
        return
    ids = table["image_id"].to_numpy()
    cells: dict[tuple, list[int]] = {}
    for i in used:
        cells.setdefault((table.at[i, "brand"], table.at[i, "source"]), []).append(i)
    for rows in cells.values():
        if len(rows) < 2:
            continue
        values = np.array([hashes[i] for i in rows], dtype=np.uint64)
        partner = near_duplicate_partners(values, max_bits)
        for k in np.flatnonzero(partner >= 0):
            table.at[rows[k], "near_duplicate_of"] = ids[rows[partner[k]]]


def near_duplicate_partners(values: np.ndarray, max_bits: int) -> np.ndarray:
    """For each 64-bit hash, the index of the first earlier hash within ``max_bits`` bits, else -1.

    Exact, without comparing all pairs: split the 64 bits into ``max_bits + 1``
    bands; two hashes at most ``max_bits`` apart differ in at most that many
    bands, so (pigeonhole) they agree on at least one whole band. Only hashes
    sharing a band value are compared.
    """
    values = np.asarray(values, dtype=np.uint64)
    n = len(values)
    best = np.full(n, n, dtype=np.int64)
    bands = max_bits + 1
    edges = np.linspace(0, 64, bands + 1).round().astype(int)
    for low, high in zip(edges[:-1], edges[1:]):
        width = int(high - low)
        if width == 0:
            continue
        mask = np.uint64((1 << width) - 1)
        key = (values >> np.uint64(low)) & mask
        order = np.argsort(key, kind="stable")  # stable: each group stays in table order
        key_sorted = key[order]
        starts = np.concatenate([[0], np.flatnonzero(np.diff(key_sorted)) + 1])
        sizes = np.diff(np.concatenate([starts, [n]]))
        # Small groups, all at once: pairs that are d places apart in sorted order.
        small = np.repeat(sizes <= _SMALL_GROUP, sizes)
        largest_small = int(sizes[sizes <= _SMALL_GROUP].max(initial=1))
        for d in range(1, largest_small):
            at = np.flatnonzero((key_sorted[d:] == key_sorted[:-d]) & small[d:])
            earlier, later = order[at], order[at + d]  # earlier < later (stable sort)
            close = _popcount(values[earlier] ^ values[later]) <= max_bits
            np.minimum.at(best, later[close], earlier[close])
        # Large groups (e.g. many flat images share hash 0), block by block.
        for first, size in zip(starts[sizes > _SMALL_GROUP], sizes[sizes > _SMALL_GROUP]):
            _closest_earlier(values, order[first : first + size], max_bits, best)
    return np.where(best < n, best, -1)


_SMALL_GROUP = 64


def _closest_earlier(values: np.ndarray, group: np.ndarray, max_bits: int, best: np.ndarray) -> None:
    """Within ``group`` (indices in increasing order), lower ``best`` to the first close earlier index."""
    block = max(8, 4_000_000 // len(group))  # keeps each distance block near 4 million entries
    group_values = values[group]
    for start in range(1, len(group), block):
        stop = min(start + block, len(group))
        dist = _popcount(group_values[start:stop, None] ^ group_values[None, :stop])
        earlier = np.arange(stop)[None, :] < np.arange(start, stop)[:, None]
        close = (dist <= max_bits) & earlier
        for k in np.flatnonzero(close.any(axis=1)):
            i = group[start + k]
            best[i] = min(best[i], group[int(np.argmax(close[k]))])


_BYTE_BITS = np.array([bin(b).count("1") for b in range(256)], dtype=np.uint8)


def _popcount(x: np.ndarray) -> np.ndarray:
    """Set bits per uint64 element (numpy >= 2 has it built in)."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(x)
    return _BYTE_BITS[x.view(np.uint8).reshape(x.shape + (8,))].sum(axis=-1)


def collect_study_images(study, progress: bool = True) -> pd.DataFrame:
    """The images table of a study: its ``[images]`` root/manifest and ``[brands]`` categories.

    Unchanged files are not read again: the read index lives in the study's
    cache (``OUT/cache/collect_index.parquet``, see ``collect_index``).
    """
    from explore.collect_index import INDEX_NAME

    return collect_images(
        root=study.images.root,
        manifest=study.images.manifest,
        categories=study.brands,
        progress=progress,
        metadata=study.images.metadata,
        max_per_poster=study.images.max_per_poster,
        seed=study.seed,
        reposts=getattr(study.images, "reposts", "exclude"),
        exclude=(study.output,),
        index=Path(study.output) / "cache" / INDEX_NAME,
    )


def poster_note(table: pd.DataFrame) -> str:
    """How the statistics treat photos: clustered by poster, or assumed independent."""
    usable = table[table["status"] == "ok"]
    posters = usable["poster"].fillna("").astype(str) if "poster" in usable else pd.Series([], dtype=str)
    known = posters[posters != ""]
    if known.empty:
        return (
            "no poster ids: photos are assumed independent (several photos by one poster would "
            "make intervals too narrow; add a poster column to the manifest or images.metadata)"
        )
    return (
        f"{known.nunique()} posters for {len(known)} of {len(usable)} usable photos: intervals and "
        f"tests treat each poster's photos as a cluster (photos without a poster count as their own)"
    )


def skipped_files(table: pd.DataFrame) -> pd.DataFrame:
    """Rows whose status is not ``ok`` (duplicates included), in table order."""
    return table[table["status"] != "ok"].reset_index(drop=True)


def summarise(table: pd.DataFrame, examples: int = 5) -> str:
    """A short printable summary: files found, used, skipped by kind, duplicates, examples."""
    n = len(table)
    used = int((table["status"] == "ok").sum())
    lines = [f"found {n} file{'s' if n != 1 else ''}: {used} used, {n - used} skipped"]
    counts = table.loc[table["status"] != "ok", "status"].value_counts()
    if len(counts):
        lines[0] += " (" + ", ".join(f"{count} {kind}" for kind, count in counts.items()) + ")"
    reposted = table["repost_of"].fillna("") != "" if "repost_of" in table else pd.Series(False, index=table.index)
    if reposted.any():
        brands = table.loc[reposted, "brand"].nunique()
        excluded = int((table["status"] == "repost").sum())
        lines.append(
            f"{int(reposted.sum())} consumer photo(s) of {brands} brand(s) are reposts of the brand's own "
            + ("photos (left out of consumer shares)" if excluded else "photos (kept in consumer shares)")
        )
    near = int((table["near_duplicate_of"] != "").sum())
    if near:
        lines.append(
            f"{near} near-duplicate image{'s' if near != 1 else ''} proposed by the content hash "
            "(confirmed by the image vectors after embed)"
        )
    problems = table[~table["status"].isin(["ok", "duplicate", "repost"])]
    for _, row in problems.head(examples).iterrows():
        lines.append(f"  {row['status']}: {row['relpath'] or row['path']}: {row['reason']}")
    if len(problems) > examples:
        lines.append(f"  ... and {len(problems) - examples} more (see the skipped table)")
    return "\n".join(lines)

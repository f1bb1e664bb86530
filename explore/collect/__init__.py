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
the image vectors after embed. A re-share is seldom byte-identical, so each
used consumer photo that is not an exact repost is also proposed as a
near-copy of the closest used owned photo of its brand within the same bits
(``near_repost_of``, ``near_repost_bits``; after the poster cap, since both
photos must be embedded); ``explore.duplicates`` confirms it by the same rule
and then makes it a repost like an exact one.

Decoding (``open_rgb``) reads JPEG (and MPO), PNG, WebP, GIF (first frame),
BMP and TIFF, applies the EXIF orientation, and converts palette, CMYK, 16-bit
and alpha images to 8-bit RGB.
"""

# The private names below are re-exported for the tests and benchmarks that use them.
from explore.collect.decode import (  # noqa: F401
    FORMATS,
    MAX_PIXELS,
    ImageProblem,
    _decode,
    _over_white,
    _read_bytes,
    open_rgb,
    to_rgb,
)
from explore.collect.flags import (  # noqa: F401
    _cap_posters,
    _flag_duplicates,
    _flag_near_duplicates,
    _flag_reposts,
    _propose_near_reposts,
    is_near_copy,
    repost_description,
    repost_summary,
)
from explore.collect.hashing import (  # noqa: F401
    BACKGROUND_BORDER_SHARE,
    BACKGROUND_TOLERANCE,
    NEAR_DUPLICATE_BITS,
    _popcount,
    content_box,
    content_hash,
    difference_hash,
    near_duplicate_partners,
    nearest_partners,
)
from explore.collect.sources import (  # noqa: F401
    COLUMNS,
    MANIFEST_OPTIONAL,
    MANIFEST_REQUIRED,
    SIDECAR_OPTIONAL,
    SOURCES,
    CollectError,
    _Entry,
    _image_id,
)
from explore.collect.table import (  # noqa: F401
    _cpu_count,
    _read_all,
    _read_one,
    collect_images,
    collect_study_images,
    poster_note,
    skipped_files,
    summarise,
)

__all__ = [
    "BACKGROUND_BORDER_SHARE",
    "BACKGROUND_TOLERANCE",
    "COLUMNS",
    "FORMATS",
    "MANIFEST_OPTIONAL",
    "MANIFEST_REQUIRED",
    "MAX_PIXELS",
    "NEAR_DUPLICATE_BITS",
    "SIDECAR_OPTIONAL",
    "SOURCES",
    "CollectError",
    "ImageProblem",
    "collect_images",
    "collect_study_images",
    "content_box",
    "content_hash",
    "difference_hash",
    "near_duplicate_partners",
    "nearest_partners",
    "open_rgb",
    "poster_note",
    "is_near_copy",
    "repost_description",
    "repost_summary",
    "skipped_files",
    "summarise",
    "to_rgb",
]

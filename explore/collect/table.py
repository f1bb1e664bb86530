"""Collect: the images table (reading every file once, in parallel, through the read index)."""

from __future__ import annotations

import hashlib
import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pandas as pd

from explore.collect.decode import MAX_PIXELS, ImageProblem, _decode, _read_bytes
from explore.collect.flags import (
    _cap_posters,
    _flag_duplicates,
    _flag_near_duplicates,
    _flag_reposts,
    _propose_near_reposts,
    is_near_copy,
)
from explore.collect.hashing import NEAR_DUPLICATE_BITS, content_hash
from explore.collect.sources import COLUMNS, CollectError, _apply_sidecar, _Entry, _image_id, _manifest_entries, _tree_entries



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
        content hashes count as near-identical: near-duplicates within a brand
        x source, and near-copy reposts (a consumer photo and the brand's
        owned photo).
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
            "near_repost_of": "",
            "near_repost_bits": -1,
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
    table["near_repost_bits"] = table["near_repost_bits"].astype("int64")
    if reposts not in ("exclude", "keep"):
        raise ValueError(f"reposts must be 'exclude' or 'keep', got {reposts!r}")
    _flag_duplicates(table)
    _flag_reposts(table, exclude=reposts == "exclude")
    _flag_near_duplicates(table, hashes, near_duplicate_bits)
    _cap_posters(table, max_per_poster, seed)
    # After the cap: a near-copy is confirmed with the vectors of both photos,
    # and only rows still used are embedded.
    _propose_near_reposts(table, hashes, near_duplicate_bits)
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
        near_copies = int(is_near_copy(table).sum())
        kinds = f"{int(reposted.sum()) - near_copies} same file, {near_copies} near-cop{'y' if near_copies == 1 else 'ies'}"
        lines.append(
            f"{int(reposted.sum())} consumer photo(s) of {brands} brand(s) are reposts of the brand's own "
            f"photos ({kinds}; "
            + ("left out of consumer shares)" if excluded else "kept in consumer shares)")
        )
    proposed = table["near_repost_of"].fillna("") != "" if "near_repost_of" in table else reposted & False
    if proposed.any():
        lines.append(
            f"{int(proposed.sum())} consumer photo(s) proposed by the content hash as near-copies of the brand's "
            "own photos (a repost when the image vectors confirm it after embed)"
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

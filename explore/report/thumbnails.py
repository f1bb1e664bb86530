"""Small WebP thumbnails, base64 encoded, for embedding in the report.

Which images get one: every usable image up to ``max_thumbnails``; beyond it a
seeded random sample plus every context exemplar (exemplars are what the
report shows first, so they are never sampled out). Thumbnails are cached in
the output folder (``cache/thumbnails_<px>_webp.parquet``, keyed by content sha256)
so that rebuilding a report does not decode every photo again.
"""

from __future__ import annotations

import base64
import io
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

#: Thumbnail format. WebP at quality 70 measured about 30 % smaller than JPEG at quality 72 on the demo
#: photos at 112 px (1.6 vs 2.3 KB) with no visible difference at that size; every current browser shows it.
FORMAT, MIME, QUALITY = "WEBP", "image/webp", 70


@dataclass
class ThumbnailChoice:
    """Which image ids get a thumbnail and why."""

    ids: list[str]
    total: int
    sampled: bool
    seed: int
    cap: int

    def describe(self) -> str:
        if not self.sampled:
            return f"Thumbnails are embedded for all {self.total:,} usable images."
        return (
            f"Thumbnails are embedded for {len(self.ids):,} of {self.total:,} usable images: "
            f"a random sample (seed {self.seed}) up to the cap of {self.cap:,}, stratified so every brand, source "
            "and context has its share and at least one, plus every context exemplar. All points stay on the map; "
            "those without a thumbnail show their details without a picture."
        )


def choose_thumbnail_ids(
    usable_ids: list[str], exemplar_ids: list[str], cap: int, seed: int, strata: list | None = None
) -> ThumbnailChoice:
    """Pick the images that get a thumbnail.

    Parameters
    ----------
    usable_ids : ids of all usable images, in table order.
    exemplar_ids : ids that must always be included (context exemplars).
    cap : at most this many thumbnails when sampling (more only when there are more
        exemplars than that).
    seed : seed of the sample (the study's seed), so rebuilds embed the same images.
    strata : optional label per usable id (e.g. brand, source and context). Each stratum
        gets one thumbnail first and the rest of the room in proportion to its size
        (largest remainders), so every brand and context is represented.

    Returns
    -------
    ThumbnailChoice with ids in table order.
    """
    if cap < 0:
        raise ValueError(f"report.max_thumbnails must not be negative, got {cap}")
    total = len(usable_ids)
    if total <= cap:
        return ThumbnailChoice(list(usable_ids), total, False, seed, cap)
    known = set(usable_ids)
    must = [i for i in dict.fromkeys(exemplar_ids) if i in known]
    must_set = set(must)
    room = max(cap - len(must), 0)
    rng = np.random.default_rng(seed)
    labels = list(strata) if strata is not None else [0] * total
    if len(labels) != total:
        raise ValueError(f"strata has {len(labels)} labels for {total} images")
    groups: dict = {}
    for image_id, lab in zip(usable_ids, labels):
        if image_id not in must_set:
            groups.setdefault(lab, []).append(image_id)
    rest_total = sum(len(g) for g in groups.values())
    chosen = set(must_set)
    if room and rest_total:
        keys = list(groups)
        sizes = np.array([len(groups[k]) for k in keys])
        # With strata, one each first (so every stratum is represented), then the rest in
        # proportion to size by largest remainders (Hamilton's method); the total stays at the cap.
        base = np.zeros(len(keys), dtype=int)
        if strata is not None:
            if room < len(keys):
                base[rng.choice(len(keys), size=room, replace=False)] = 1
            else:
                base[:] = 1
        spare = room - int(base.sum())
        extra = sizes - base
        exact = spare * extra / max(int(extra.sum()), 1)
        quota = np.floor(exact).astype(int)
        left = min(spare - int(quota.sum()), int((extra - quota > 0).sum()))
        if left > 0:
            quota[np.argsort(-(exact - quota), kind="stable")[:left]] += 1
        for k, q in zip(keys, np.minimum(base + quota, sizes)):
            if q:
                members = groups[k]
                chosen.update(members[j] for j in rng.choice(len(members), size=int(q), replace=False))
    return ThumbnailChoice([i for i in usable_ids if i in chosen], total, True, seed, cap)


def make_thumbnail(path: str | Path, px: int, blur_faces: bool = False) -> bytes | None:
    """Decode one image and return a thumbnail (``FORMAT``) of at most ``px`` x ``px`` pixels (None if unreadable).

    With ``blur_faces``, faces found by ``explore.report.faces`` are blurred,
    detected on a larger decode before shrinking (``thumbnail_and_faces`` also
    returns how many).
    """
    made = thumbnail_and_faces(path, px, blur_faces)
    return None if made is None else made[0]


def thumbnail_and_faces(path: str | Path, px: int, blur_faces: bool = False) -> tuple[bytes, int] | None:
    """``(thumbnail bytes, faces blurred)`` for one image, or None when it cannot be read."""
    from PIL import Image, ImageOps

    from explore.collect import to_rgb

    try:
        with Image.open(path) as im:
            side = max(px * 2, _faces().DETECT_SIDE) if blur_faces else px * 2
            im.draft("RGB", (side, side))  # JPEG: decode at reduced scale, much faster
            im = ImageOps.exif_transpose(im)
            im = to_rgb(im)  # the model's own conversion (16-bit grey scaled, alpha over white, CMYK via ICC)
            found = 0
            if blur_faces:
                im, found = _faces().blur_faces(im)
            im.thumbnail((px, px), Image.Resampling.LANCZOS)
            buf = io.BytesIO()
            im.save(buf, FORMAT, quality=QUALITY, method=4)
            return buf.getvalue(), found
    except Exception:  # unreadable now (moved, damaged): the report shows a placeholder
        return None


def _faces():
    from explore.report import faces

    return faces


def thumbnails_for(
    images: pd.DataFrame,
    ids: list[str],
    px: int,
    cache_file: Path | None = None,
    blur_faces: bool = False,
    face_counts: dict[str, int] | None = None,
) -> dict[str, str]:
    """Base64 thumbnails (``FORMAT``) for ``ids`` (image_id -> base64 text, no ``data:`` prefix).

    Parameters
    ----------
    images : the images table (needs image_id, path, sha256).
    ids : which images.
    px : longest side in pixels.
    cache_file : optional parquet cache keyed by sha256; read first, updated after
        (use a different file with and without ``blur_faces``).
    blur_faces : blur detected faces (``explore.report.faces``).
    face_counts : when given, filled with image_id -> faces blurred (0 when none).

    Returns
    -------
    dict; images whose file cannot be read now are left out.
    """
    if not ids:
        return {}
    rows = images.set_index("image_id").loc[ids, ["path", "sha256"]]
    cached: dict[str, bytes] = {}
    cached_faces: dict[str, int] = {}
    if cache_file is not None and cache_file.is_file():
        try:
            table = pd.read_parquet(cache_file)
            cached = dict(zip(table["sha256"], table["image"]))
            cached_faces = dict(zip(table["sha256"], table["faces"])) if "faces" in table else {}
        except Exception:
            cached, cached_faces = {}, {}
    out: dict[str, str] = {}
    fresh: dict[str, bytes] = {}
    todo = [(i, p, s) for i, p, s in zip(rows.index, rows["path"], rows["sha256"]) if not (s and s in cached)]
    made: dict[str, bytes | None] = {}
    made_faces: dict[str, int] = {}
    fresh_faces: dict[str, int] = {}
    if todo:
        # Pillow releases the GIL while decoding and resizing, so threads use every core.
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=max(1, min(8, os.cpu_count() or 1))) as pool:
            work = pool.map(lambda t: thumbnail_and_faces(t[1], px, blur_faces), todo)
            for (image_id, _, _), result in zip(todo, work):
                made[image_id] = None if result is None else result[0]
                made_faces[image_id] = 0 if result is None else result[1]
    for image_id, sha in zip(rows.index, rows["sha256"]):
        data = cached.get(sha) if sha else None
        count = int(cached_faces.get(sha, 0)) if data is not None else 0
        if data is None:
            data = made.get(image_id)
            if data is None:
                continue
            count = made_faces.get(image_id, 0)
            if sha:
                fresh[sha] = data
                fresh_faces[sha] = count
        if face_counts is not None:
            face_counts[image_id] = count
        out[image_id] = base64.b64encode(data).decode("ascii")
    if cache_file is not None and fresh:
        merged = {**cached, **fresh}
        merged_faces = {**cached_faces, **fresh_faces}
        cache_file.parent.mkdir(parents=True, exist_ok=True)
        tmp = cache_file.with_suffix(".tmp")
        pd.DataFrame(
            {"sha256": list(merged), "image": list(merged.values()), "faces": [int(merged_faces.get(k, 0)) for k in merged]}
        ).to_parquet(tmp, index=False)
        tmp.replace(cache_file)
    return out

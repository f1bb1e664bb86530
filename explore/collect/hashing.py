"""Collect: difference hashes of images, near-duplicate and near-copy repost proposals between them."""

from __future__ import annotations

import numpy as np
from PIL import Image

#: Near-duplicate proposal threshold: content hashes (64 bits) at most this
#: many bits apart, within one brand x source, are proposed as near-identical;
#: ``explore.duplicates`` confirms them with the image vectors. Chosen on an
#: outside set with known duplicates (benchmarks/near_duplicates.py).
NEAR_DUPLICATE_BITS = 14


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


def nearest_partners(queries: np.ndarray, targets: np.ndarray, max_bits: int) -> tuple[np.ndarray, np.ndarray]:
    """For each query hash, the closest target hash within ``max_bits`` bits: (index, bits), -1 where none.

    Ties go to the lowest target index (table order), so the choice is
    deterministic. Every pair is compared, in blocks of about 4 million: at 14
    bits the bands of ``near_duplicate_partners`` are 4 or 5 bits wide and
    would pass nearly every pair anyway (20,000 x 20,000 hashes take about a
    second this way).
    """
    queries = np.asarray(queries, dtype=np.uint64)
    targets = np.asarray(targets, dtype=np.uint64)
    nq, nt = len(queries), len(targets)
    index = np.full(nq, -1, dtype=np.int64)
    bits = np.full(nq, -1, dtype=np.int64)
    if nq == 0 or nt == 0 or max_bits < 0:
        return index, bits
    block = max(1, 4_000_000 // nt)
    for start in range(0, nq, block):
        dist = _popcount(queries[start : start + block, None] ^ targets[None, :])
        closest = np.argmin(dist, axis=1)  # the first of equal distances: the lowest index
        nearest = dist[np.arange(len(closest)), closest].astype(np.int64)
        hit = nearest <= max_bits
        index[start : start + block] = np.where(hit, closest, -1)
        bits[start : start + block] = np.where(hit, nearest, -1)
    return index, bits


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

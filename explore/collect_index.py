"""Collect's read index: what reading each file found, keyed by (path, size, mtime).

Collect hashes and decodes every image to fill the images table (sha256,
width, height, difference hash). On a re-run nearly every file is unchanged,
so this small table remembers, per absolute path, the file's size and
modification time (nanoseconds) when it was read and what was found. A file
whose size and mtime still match is not opened again; any other file is read
as usual and its entry replaced. Only successful reads are kept (a skipped
file is read again, so a fixed file is noticed), and only with the pixel
limit they were checked against, so a lower ``max_pixels`` re-checks them.

The index lives in the output folder's cache (``OUT/cache/collect_index.parquet``,
written to a temporary name and renamed into place); deleting it only costs
one full read.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd

INDEX_NAME = "collect_index.parquet"
_COLUMNS = ["path", "size", "mtime_ns", "sha256", "width", "height", "dhash"]


def file_key(path: str) -> tuple[int, int] | None:
    """(size, mtime_ns) of ``path``, or None when it cannot be stat'ed."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_size, st.st_mtime_ns


class ReadIndex:
    """The read results of earlier runs; ``get`` before reading, ``put`` after, ``save`` at the end."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self._rows: dict[str, tuple] = {}
        self._new: dict[str, tuple] = {}
        self.hits = 0
        if self.path.is_file():
            try:
                table = pd.read_parquet(self.path)
                for row in table[_COLUMNS].itertuples(index=False):
                    self._rows[row.path] = (int(row.size), int(row.mtime_ns), row.sha256,
                                            int(row.width), int(row.height), int(np.uint64(row.dhash)))
            except Exception:  # unreadable or from another version: read everything once more
                self._rows = {}

    def get(self, path: str, key: tuple[int, int] | None, max_pixels: int):
        """The stored ``(sha256, (width, height), dhash)`` when ``key`` matches, else None."""
        row = self._rows.get(path)
        if row is None or key is None or (row[0], row[1]) != key or row[3] * row[4] > max_pixels:
            return None
        self.hits += 1
        self._new[path] = row
        return row[2], (row[3], row[4]), row[5]

    def put(self, path: str, key: tuple[int, int] | None, result) -> None:
        """Remember a successful read; ``key`` is the (size, mtime_ns) taken before reading."""
        if key is not None and isinstance(result, tuple):
            sha, (width, height), dhash = result
            self._new[path] = (key[0], key[1], sha, width, height, dhash)

    def save(self) -> None:
        """Write the entries of this run (files no longer found are dropped), atomically."""
        if self._new == self._rows and self.path.is_file():
            return
        rows = [(p, *v[:5]) for p, v in self._new.items()]
        table = pd.DataFrame(rows, columns=_COLUMNS[:-1])
        table["dhash"] = np.array([v[5] for v in self._new.values()], dtype=np.uint64)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_name(f".{self.path.name}.{os.getpid()}.tmp")
        table.to_parquet(tmp, index=False)
        os.replace(tmp, self.path)

"""The embedding cache: vectors on disk, keyed by (content sha256, encoder id).

Layout of a cache folder::

    CACHE/
      lock                       held (flock) by the run using the cache
      <encoder-slug>-<digest>/   one folder per encoder id; never shared
        encoder.json             {"encoder_id": ..., "format": 1}, checked on open
        shard-<time>-<pid>.npz   sha256 (n,), cluster (n, d_c), joint (n, d_j)

Why it is safe to interrupt: every batch of new vectors becomes its own shard
file, written to a temporary name, flushed and fsync'd, then renamed into place
with ``os.replace`` (atomic on POSIX and Windows) and the folder fsync'd. A
reader only ever sees complete shards; a ``kill -9`` loses at most the batch
being written, and the temporary file it leaves is removed on the next open.
Compaction merges shards into one the same way (new file in place first, old
ones deleted after), so an interruption there leaves duplicate rows, which are
harmless: equal keys hold equal vectors and the newest wins.

Why two runs cannot collide: opening takes an exclusive, non-blocking
``flock`` on ``CACHE/lock``. A second run gets ``CacheBusy`` at once with the
holder's process id. The kernel drops the lock when the holder dies, even by
``kill -9``, so a stale lock never blocks the next run.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import time
from pathlib import Path

import numpy as np

FORMAT = 1
#: When a cache folder holds more shards than this after a run, all are merged.
MAX_SHARDS = 32


class CacheError(RuntimeError):
    """The embedding cache cannot be used as asked; the message says why and what to do."""


class CacheBusy(CacheError):
    """Another run holds the cache's lock."""


def encoder_folder_name(encoder_id: str) -> str:
    """A file-system-safe, collision-free folder name for an encoder id."""
    slug = re.sub(r"[^A-Za-z0-9._-]+", "-", encoder_id).strip("-.")[:60] or "encoder"
    return f"{slug}-{hashlib.sha1(encoder_id.encode('utf-8')).hexdigest()[:10]}"


def check_not_busy(folder: str | Path) -> None:
    """Raise ``CacheBusy`` now if another run holds the cache at ``folder``.

    A courtesy for commands that load a model before embedding: they can
    refuse at once instead of after the model load. ``EmbeddingCache.open``
    still takes the lock itself, so this check is never what protects the cache.
    """
    folder = Path(folder)
    if not (folder / "lock").exists():
        return
    probe = EmbeddingCache(folder, "probe")
    probe._lock()
    probe.close()


class EmbeddingCache:
    """Vectors of one encoder, stored under ``folder``; use as a context manager.

    Parameters
    ----------
    folder : the cache folder (created if needed); several encoders may share
        it, each in its own subfolder.
    encoder_id : the encoder whose vectors are read and written.

    Examples
    --------
    >>> with EmbeddingCache(out / "cache", encoder.id) as cache:   # doctest: +SKIP
    ...     todo = cache.missing(shas)
    ...     cache.put(todo, cluster, joint)
    ...     cluster, joint = cache.get(shas)
    """

    def __init__(self, folder: str | Path, encoder_id: str):
        if not encoder_id:
            raise CacheError("an encoder id is required to open the embedding cache")
        self.root = Path(folder)
        self.encoder_id = encoder_id
        self.folder = self.root / encoder_folder_name(encoder_id)
        self.notes: list[str] = []
        self._lock_fd: int | None = None
        self._shards: list[dict] = []  # {"path", "sha256", "cluster", "joint"}
        self._index: dict[str, tuple[int, int]] = {}
        self._written: list[Path] = []  # shards this session wrote

    # -- opening and closing ------------------------------------------------

    def open(self) -> "EmbeddingCache":
        """Take the lock, check the encoder id, remove leftovers, load every shard."""
        self.root.mkdir(parents=True, exist_ok=True)
        self._lock()
        try:
            self.folder.mkdir(exist_ok=True)
            self._check_encoder_file()
            for leftover in self.folder.glob("*.tmp"):
                leftover.unlink(missing_ok=True)
            self._load()
        except BaseException:
            self.close()
            raise
        return self

    def close(self) -> None:
        """Release the lock (the vectors already written stay on disk)."""
        if self._lock_fd is not None:
            _unlock(self._lock_fd)
            os.close(self._lock_fd)
            self._lock_fd = None

    def __enter__(self) -> "EmbeddingCache":
        return self.open()

    def __exit__(self, *exc) -> bool:
        self.close()
        return False

    def _lock(self) -> None:
        path = self.root / "lock"
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            _try_lock(fd)
        except OSError:
            holder = ""
            try:
                holder = os.pread(fd, 64, 0).decode("ascii", "replace").strip()
            except OSError:
                pass
            os.close(fd)
            who = f" (process {holder})" if holder else ""
            raise CacheBusy(
                f"the embedding cache {self.root} is in use by another explore run{who}; "
                "wait for it to finish, or use a different output folder"
            ) from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, str(os.getpid()).encode("ascii"), 0)
        self._lock_fd = fd

    def _check_encoder_file(self) -> None:
        meta = self.folder / "encoder.json"
        if meta.exists():
            try:
                stored = json.loads(meta.read_text(encoding="utf-8"))
            except (OSError, ValueError) as exc:
                raise CacheError(f"{meta}: unreadable cache description ({exc}); delete {self.folder}") from None
            if stored.get("encoder_id") != self.encoder_id:
                raise CacheError(
                    f"{meta}: this cache folder belongs to encoder '{stored.get('encoder_id')}', "
                    f"not '{self.encoder_id}'; vectors of different encoders are never mixed"
                )
            if stored.get("format") != FORMAT:
                raise CacheError(f"{meta}: cache format {stored.get('format')} is not {FORMAT}; delete {self.folder}")
            return
        _atomic_write(meta, json.dumps({"encoder_id": self.encoder_id, "format": FORMAT}).encode("utf-8"))

    def _load(self) -> None:
        self._shards, self._index = [], {}
        for path in sorted(self.folder.glob("shard-*.npz")):
            try:
                with np.load(path, allow_pickle=False) as data:
                    shard = {
                        "path": path,
                        "sha256": data["sha256"].astype(str),
                        "cluster": np.asarray(data["cluster"], dtype=np.float32),
                        "joint": np.asarray(data["joint"], dtype=np.float32),
                    }
                    stored_id = str(data["encoder_id"])
            except Exception as exc:  # only possible after disk faults: set aside, re-embed
                bad = path.with_suffix(".bad")
                os.replace(path, bad)
                self.notes.append(f"cache shard {path.name} could not be read ({exc}); set aside as {bad.name}")
                continue
            n = len(shard["sha256"])
            if stored_id != self.encoder_id or len(shard["cluster"]) != n or len(shard["joint"]) != n:
                raise CacheError(f"{path}: shard does not match encoder '{self.encoder_id}'; delete {self.folder}")
            self._add(shard)

    def _check_dimensions(self, shard: dict) -> None:
        if self._shards:
            first = self._shards[0]
            for key in ("cluster", "joint"):
                if shard[key].shape[1] != first[key].shape[1]:
                    raise CacheError(
                        f"{shard['path']}: {key} vectors have {shard[key].shape[1]} dimensions, "
                        f"the cached ones {first[key].shape[1]}; delete {self.folder}"
                    )

    def _add(self, shard: dict) -> None:
        self._check_dimensions(shard)
        number = len(self._shards)
        self._shards.append(shard)
        for row, sha in enumerate(shard["sha256"]):
            self._index[sha] = (number, row)

    def _require_open(self) -> None:
        if self._lock_fd is None:
            raise CacheError("the embedding cache is not open (use it in a 'with' block)")

    # -- reading ------------------------------------------------------------

    def __len__(self) -> int:
        return len(self._index)

    def __contains__(self, sha256: str) -> bool:
        return sha256 in self._index

    @property
    def shard_count(self) -> int:
        return len(self._shards)

    def missing(self, shas) -> list[str]:
        """The distinct hashes of ``shas`` not yet cached, in first-seen order."""
        return [s for s in dict.fromkeys(shas) if s not in self._index]

    def get(self, shas) -> tuple[np.ndarray, np.ndarray]:
        """(cluster, joint) float32 matrices for ``shas``, row for row."""
        shas = list(shas)
        absent = [s for s in shas if s not in self._index]
        if absent:
            raise KeyError(f"{len(absent)} vector(s) not in the cache, e.g. sha256 {absent[0]}")
        if not self._shards:
            return np.zeros((0, 0), np.float32), np.zeros((0, 0), np.float32)
        d_c = self._shards[0]["cluster"].shape[1]
        d_j = self._shards[0]["joint"].shape[1]
        cluster = np.empty((len(shas), d_c), np.float32)
        joint = np.empty((len(shas), d_j), np.float32)
        where = np.array([self._index[sha] for sha in shas], dtype=np.int64).reshape(-1, 2)
        for number in np.unique(where[:, 0]):  # one fancy-indexing copy per shard, not per row
            mine = where[:, 0] == number
            shard = self._shards[number]
            cluster[mine] = shard["cluster"][where[mine, 1]]
            joint[mine] = shard["joint"][where[mine, 1]]
        return cluster, joint

    # -- writing ------------------------------------------------------------

    def put(self, shas, cluster: np.ndarray, joint: np.ndarray) -> Path:
        """Store one batch of vectors as a new shard (atomic). Returns its path."""
        self._require_open()
        shas = np.asarray(list(shas), dtype="U64")
        cluster = np.ascontiguousarray(cluster, dtype=np.float32)
        joint = np.ascontiguousarray(joint, dtype=np.float32)
        if cluster.ndim != 2 or joint.ndim != 2 or not len(shas) == len(cluster) == len(joint):
            raise CacheError(
                f"put: {len(shas)} hashes but cluster {cluster.shape} and joint {joint.shape}"
            )
        shard = {"path": "new shard", "sha256": shas, "cluster": cluster, "joint": joint}
        self._check_dimensions(shard)  # before anything reaches the disk
        shard["path"] = path = self._write_shard(shas, cluster, joint)
        self._written.append(path)
        self._add(shard)
        return path

    def _write_shard(self, shas: np.ndarray, cluster: np.ndarray, joint: np.ndarray) -> Path:
        name = f"shard-{time.time_ns():020d}-{os.getpid()}.npz"
        path = self.folder / name
        buffer = _npz_bytes(sha256=shas, cluster=cluster, joint=joint, encoder_id=np.array(self.encoder_id))
        _atomic_write(path, buffer)
        return path

    def compact(self, max_shards: int = MAX_SHARDS) -> None:
        """Merge the shards this session wrote into one; merge all when there are too many.

        Keeps the number of files small without rewriting a large cache on
        every incremental run.
        """
        self._require_open()
        if len(self._shards) > max_shards:
            targets = [s["path"] for s in self._shards]
        else:
            targets = self._written
        if len(targets) < 2:
            return
        chosen = set(targets)
        keep = [s for s in self._shards if s["path"] in chosen]
        merged: dict[str, tuple[int, int]] = {}
        for number, shard in enumerate(keep):
            for row, sha in enumerate(shard["sha256"]):
                merged[sha] = (number, row)  # the newest shard wins
        shas = np.array(list(merged), dtype="U64")
        cluster = np.stack([keep[n]["cluster"][r] for n, r in merged.values()])
        joint = np.stack([keep[n]["joint"][r] for n, r in merged.values()])
        path = self._write_shard(shas, cluster, joint)
        for old in targets:  # the merged shard is in place before anything is deleted
            Path(old).unlink(missing_ok=True)
        _fsync_folder(self.folder)
        self._written = [path]
        self._load()


# --------------------------------------------------------------------------
# Small file-system helpers


def _npz_bytes(**arrays) -> bytes:
    import io

    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def _atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers see either nothing or all of it."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:  # a full disk or an interruption: no half-written file stays behind
        tmp.unlink(missing_ok=True)
        raise
    _fsync_folder(path.parent)


def _fsync_folder(folder: Path) -> None:
    if os.name != "posix":  # Windows cannot open a folder for fsync
        return
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


try:
    import fcntl

    def _try_lock(fd: int) -> None:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)

    def _unlock(fd: int) -> None:
        fcntl.flock(fd, fcntl.LOCK_UN)

except ImportError:  # Windows
    import msvcrt

    def _try_lock(fd: int) -> None:
        os.lseek(fd, 0, os.SEEK_SET)
        msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)

    def _unlock(fd: int) -> None:
        os.lseek(fd, 0, os.SEEK_SET)
        msvcrt.locking(fd, msvcrt.LK_UNLCK, 1)

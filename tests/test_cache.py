"""The embedding cache: round trips, encoder separation, locking, interruption."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from explore.cache import CacheBusy, CacheError, EmbeddingCache, check_not_busy, encoder_folder_name


def vectors(start: int, n: int, d: int = 6):
    """Deterministic unit vectors for keys start..start+n-1 (the same in every process)."""
    rows = []
    for i in range(start, start + n):
        v = np.random.default_rng(i).normal(size=d).astype(np.float32)
        rows.append(v / np.linalg.norm(v))
    return np.stack(rows)


def key(i: int) -> str:
    return f"{i:064x}"


def test_round_trip_and_reopen(tmp_path):
    with EmbeddingCache(tmp_path, "enc-a") as cache:
        assert len(cache) == 0 and cache.missing([key(1), key(2)]) == [key(1), key(2)]
        cache.put([key(1), key(2)], vectors(1, 2), vectors(1, 2, 3))
        cache.put([key(3)], vectors(3, 1), vectors(3, 1, 3))
        assert cache.missing([key(2), key(3), key(4), key(4)]) == [key(4)]
    with EmbeddingCache(tmp_path, "enc-a") as cache:
        assert len(cache) == 3
        cluster, joint = cache.get([key(3), key(1), key(3)])
        assert cluster.dtype == np.float32 and joint.shape == (3, 3)
        np.testing.assert_array_equal(cluster, np.concatenate([vectors(3, 1), vectors(1, 1), vectors(3, 1)]))
        with pytest.raises(KeyError, match="not in the cache"):
            cache.get([key(9)])


def test_encoders_never_mix(tmp_path):
    with EmbeddingCache(tmp_path, "clip:ViT-B-32:abc") as cache:
        cache.put([key(1)], vectors(1, 1), vectors(1, 1))
    with EmbeddingCache(tmp_path, "bundled:xyz") as other:
        assert len(other) == 0 and key(1) not in other
    folders = sorted(p.name for p in tmp_path.iterdir() if p.is_dir())
    assert folders == sorted([encoder_folder_name("clip:ViT-B-32:abc"), encoder_folder_name("bundled:xyz")])
    assert all("/" not in name and ":" not in name for name in folders)
    # The id stored inside is checked, so a folder cannot serve another encoder.
    meta = tmp_path / encoder_folder_name("bundled:xyz") / "encoder.json"
    meta.write_text(json.dumps({"encoder_id": "someone-else", "format": 1}))
    with pytest.raises(CacheError, match="belongs to encoder 'someone-else'"):
        EmbeddingCache(tmp_path, "bundled:xyz").open()
    # ... and the failed open released the lock.
    with EmbeddingCache(tmp_path, "clip:ViT-B-32:abc") as cache:
        assert len(cache) == 1


def test_second_open_is_refused_while_the_first_holds_the_lock(tmp_path):
    with EmbeddingCache(tmp_path, "enc"):
        with pytest.raises(CacheBusy, match=f"in use by another explore run \\(process {os.getpid()}\\)"):
            EmbeddingCache(tmp_path, "enc").open()
        with pytest.raises(CacheBusy):  # the lock covers the whole cache, every encoder
            EmbeddingCache(tmp_path, "another-encoder").open()
        with pytest.raises(CacheBusy):  # the early check before loading a model
            check_not_busy(tmp_path)
    check_not_busy(tmp_path)  # released on close; the check itself keeps no lock:
    check_not_busy(tmp_path / "never-used")
    with EmbeddingCache(tmp_path, "enc"):
        pass


HOLDER = textwrap.dedent(
    """
    import sys, time
    from explore.cache import EmbeddingCache
    cache = EmbeddingCache(sys.argv[1], "enc").open()
    print("holding", flush=True)
    time.sleep(60)
    """
)


def test_lock_held_by_another_process_and_freed_by_its_death(tmp_path):
    holder = subprocess.Popen([sys.executable, "-c", HOLDER, str(tmp_path)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "holding"
        with pytest.raises(CacheBusy, match=f"process {holder.pid}"):
            EmbeddingCache(tmp_path, "enc").open()
        with pytest.raises(CacheBusy, match=f"process {holder.pid}"):
            check_not_busy(tmp_path)
    finally:
        holder.send_signal(signal.SIGKILL)
        holder.wait()
    with EmbeddingCache(tmp_path, "enc"):  # the kernel dropped the dead holder's lock
        pass


WRITER = textwrap.dedent(
    """
    import sys
    import numpy as np
    from explore.cache import EmbeddingCache
    sys.path.insert(0, sys.argv[2])
    from test_cache import key, vectors
    cache = EmbeddingCache(sys.argv[1], "enc").open()
    i = 0
    while True:  # batches of 50 until killed
        cache.put([key(j) for j in range(i, i + 50)], vectors(i, 50, 64), vectors(i, 50, 16))
        i += 50
    """
)


def test_kill_during_writes_never_corrupts_what_was_written(tmp_path):
    writer = subprocess.Popen([sys.executable, "-c", WRITER, str(tmp_path), str(Path(__file__).parent)])
    folder = tmp_path / encoder_folder_name("enc")
    deadline = time.monotonic() + 60
    try:
        while len(list(folder.glob("shard-*.npz"))) < 5:
            assert writer.poll() is None, "the writer stopped on its own"
            assert time.monotonic() < deadline, "the writer wrote nothing"
            time.sleep(0.01)
    finally:
        writer.send_signal(signal.SIGKILL)
        writer.wait()
    with EmbeddingCache(tmp_path, "enc") as cache:
        n = len(cache)
        assert n >= 250 and n % 50 == 0, "only whole batches are visible"
        assert cache.notes == []
        cluster, joint = cache.get([key(i) for i in range(n)])
        np.testing.assert_array_equal(cluster, vectors(0, n, 64))
        np.testing.assert_array_equal(joint, vectors(0, n, 16))
        assert not list(folder.glob("*.tmp")), "leftover temporary files are removed on open"


def test_compaction_merges_and_keeps_every_vector(tmp_path):
    with EmbeddingCache(tmp_path, "enc") as cache:
        for i in range(0, 40, 4):
            cache.put([key(j) for j in range(i, i + 4)], vectors(i, 4), vectors(i, 4, 2))
        assert cache.shard_count == 10
        cache.compact()
        assert cache.shard_count == 1
    with EmbeddingCache(tmp_path, "enc") as cache:
        cache.put([key(99)], vectors(99, 1), vectors(99, 1, 2))
        cache.compact()  # this session's one shard: nothing to merge
        assert cache.shard_count == 2
        cache.compact(max_shards=1)  # too many shards: everything is merged
        assert cache.shard_count == 1
        cluster, joint = cache.get([key(i) for i in range(40)] + [key(99)])
        np.testing.assert_array_equal(cluster, np.concatenate([vectors(0, 40), vectors(99, 1)]))
        np.testing.assert_array_equal(joint, np.concatenate([vectors(0, 40, 2), vectors(99, 1, 2)]))


def test_unreadable_shard_is_set_aside_not_fatal(tmp_path):
    with EmbeddingCache(tmp_path, "enc") as cache:
        cache.put([key(1)], vectors(1, 1), vectors(1, 1))
        cache.put([key(2)], vectors(2, 1), vectors(2, 1))
    folder = tmp_path / encoder_folder_name("enc")
    first = sorted(folder.glob("shard-*.npz"))[0]
    first.write_bytes(first.read_bytes()[:40])  # as after a disk fault
    (folder / ".shard-x.npz.123.tmp").write_bytes(b"partial")
    with EmbeddingCache(tmp_path, "enc") as cache:
        assert len(cache) == 1 and key(2) in cache
        assert "could not be read" in cache.notes[0]
    assert not list(folder.glob("*.tmp"))
    assert len(list(folder.glob("*.bad"))) == 1


def test_put_checks_shapes(tmp_path):
    with EmbeddingCache(tmp_path, "enc") as cache:
        with pytest.raises(CacheError, match="2 hashes"):
            cache.put([key(1), key(2)], vectors(1, 3), vectors(1, 2))
        cache.put([key(1)], vectors(1, 1, 6), vectors(1, 1, 2))
        with pytest.raises(CacheError, match="dimensions"):
            cache.put([key(2)], vectors(2, 1, 5), vectors(2, 1, 2))
    with pytest.raises(CacheError, match="not open"):
        EmbeddingCache(tmp_path, "enc").put([key(3)], vectors(3, 1), vectors(3, 1))

"""Collect's read index: unchanged files are not opened again, changed ones are.

The reference for every row is a collect run without the index (each file
read and hashed afresh) and ``hashlib.sha256`` of the file's bytes.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import pandas as pd
import pytest

from explore import collect
from test_embed import make_tree


@pytest.fixture
def counted(monkeypatch):
    """Count the files collect opens."""
    opened: list[str] = []
    real = collect._read_one

    def spy(entry, max_pixels):
        opened.append(entry.path)
        return real(entry, max_pixels)

    monkeypatch.setattr(collect.table, "_read_one", spy)  # where collect_images looks it up
    return opened


def test_rerun_reads_nothing_and_gives_the_same_table(tmp_path, counted):
    root = tmp_path / "images"
    make_tree(root, 10)
    (root / "Alpha" / "consumer" / "broken.jpg").write_bytes(b"\xff\xd8\xff\xe0 not really a jpeg")
    index = tmp_path / "cache" / "collect_index.parquet"
    first = collect.collect_images(root=root, progress=False, index=index)
    assert len(counted) == 11 and index.is_file()
    counted.clear()
    again = collect.collect_images(root=root, progress=False, index=index)
    # only the skipped file is read again (so a fixed file is noticed)
    assert counted == [str((root / "Alpha" / "consumer" / "broken.jpg").absolute())]
    pd.testing.assert_frame_equal(again, first)
    plain = collect.collect_images(root=root, progress=False)  # no index: every file read afresh
    pd.testing.assert_frame_equal(again, plain)


def test_changed_file_is_read_again(tmp_path, counted):
    root = tmp_path / "images"
    make_tree(root, 6)
    index = tmp_path / "collect_index.parquet"
    collect.collect_images(root=root, progress=False, index=index)
    changed = root / "Alpha" / "consumer" / "img0000.jpg"
    make_tree(tmp_path / "other", 8)
    changed.write_bytes((tmp_path / "other" / "Beta" / "owned" / "img0007.jpg").read_bytes())
    st = os.stat(changed)
    os.utime(changed, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))  # mtime surely differs
    counted.clear()
    table = collect.collect_images(root=root, progress=False, index=index)
    assert counted == [str(changed.absolute())]
    row = table[table["path"] == str(changed.absolute())].iloc[0]
    assert row["sha256"] == hashlib.sha256(changed.read_bytes()).hexdigest()  # reference: hashlib


def test_lower_pixel_limit_rechecks(tmp_path, counted):
    root = tmp_path / "images"
    make_tree(root, 4, size=(96, 72))
    index = tmp_path / "collect_index.parquet"
    collect.collect_images(root=root, progress=False, index=index)
    counted.clear()
    table = collect.collect_images(root=root, progress=False, index=index, max_pixels=96 * 72 - 1)
    assert len(counted) == 4 and set(table["status"]) == {"too_large"}


def test_study_rerun_uses_the_index_in_the_output_cache(tmp_path, counted):
    from explore.study import study_from_dict

    root = tmp_path / "images"
    make_tree(root, 4)
    study = study_from_dict({"images": {"root": str(root)}, "output": str(tmp_path / "out")}, tmp_path / "s.toml")
    collect.collect_study_images(study, progress=False)
    assert (tmp_path / "out" / "cache" / "collect_index.parquet").is_file()
    counted.clear()
    collect.collect_study_images(study, progress=False)
    assert counted == []


def test_unreadable_index_costs_one_full_read(tmp_path, counted):
    root = tmp_path / "images"
    make_tree(root, 3)
    index = tmp_path / "collect_index.parquet"
    index.write_bytes(b"garbage")
    table = collect.collect_images(root=root, progress=False, index=index)
    assert len(counted) == 3 and (table["status"] == "ok").all()
    counted.clear()
    collect.collect_images(root=root, progress=False, index=index)
    assert counted == []

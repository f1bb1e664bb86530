"""Embed: cached, incremental, interruptible; vectors aligned with the images table.

Fast tests use a tiny fake encoder (the protocol of explore/encoders/base.py);
the interruption and concurrency tests run the real command line with the
bundled encoder in a subprocess.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from explore import collect
from explore.cache import CacheBusy, EmbeddingCache, encoder_folder_name
from explore.embed import EmbedError, Embeddings, EmbedStats, embed_table

VENV_EXPLORE = Path(sys.executable).parent / "explore"


class FakeEncoder:
    """Deterministic stand-in: 8x8 thumbnail -> fixed random projections, normalised."""

    family = "fake"
    input_size = 8
    logit_scale = 1.0
    logit_bias = 0.0

    def __init__(self, id="fake-v1", normalise=True):
        rng = np.random.default_rng(0)
        self.id = id
        self.normalise = normalise
        self.w_cluster = rng.normal(size=(3 * 8 * 8, 5)).astype(np.float32)
        self.w_joint = rng.normal(size=(3 * 8 * 8, 3)).astype(np.float32)
        self.images_encoded = 0
        self.batch_sizes: list[int] = []

    def preprocess(self, image):
        import torch

        small = np.asarray(image.resize((8, 8), Image.Resampling.BOX), dtype=np.float32) / 255.0
        return torch.from_numpy(small).permute(2, 0, 1).contiguous()

    def encode_images(self, batch):
        flat = batch.reshape(len(batch), -1).numpy()
        self.images_encoded += len(batch)
        self.batch_sizes.append(len(batch))
        out = {}
        for key, w in (("cluster", self.w_cluster), ("joint", self.w_joint)):
            v = flat @ w
            out[key] = v / np.linalg.norm(v, axis=1, keepdims=True) if self.normalise else v
        return out

    def encode_texts(self, texts):
        raise NotImplementedError("not needed here")


def photo(seed: int, size=(96, 72)) -> Image.Image:
    rng = np.random.default_rng(seed)
    return Image.fromarray((rng.random((4, 5, 3)) * 255).astype(np.uint8)).resize(size, Image.Resampling.BICUBIC)


def make_tree(root: Path, n: int, size=(96, 72), start: int = 0) -> None:
    for i in range(start, start + n):
        brand = ["Alpha", "Beta"][i % 2]
        source = ["consumer", "owned"][(i // 2) % 2]
        path = root / brand / source / f"img{i:04d}.jpg"
        path.parent.mkdir(parents=True, exist_ok=True)
        photo(i, size).save(path, quality=90)


def direct_vectors(encoder: FakeEncoder, paths) -> dict[str, np.ndarray]:
    """The encoder applied image by image, without the pipeline."""
    import torch

    batch = torch.stack([encoder.preprocess(collect.open_rgb(p, draft_size=2 * encoder.input_size)) for p in paths])
    return encoder.encode_images(batch)


def test_vectors_are_aligned_with_usable_rows(tmp_path):
    make_tree(tmp_path / "photos", 11)
    (tmp_path / "photos/Alpha/owned/broken.jpg").write_bytes(b"not a jpeg")
    table = collect.collect_images(tmp_path / "photos", progress=False)
    encoder = FakeEncoder()
    emb, stats = embed_table(table, encoder, tmp_path / "cache", batch_size=4, progress=False, streams=2)

    usable = table[table["status"] == "ok"]
    assert isinstance(emb, Embeddings) and emb.encoder_id == "fake-v1"
    assert emb.image_ids == usable["image_id"].tolist() and len(emb) == 11
    assert emb.cluster.shape == (11, 5) and emb.joint.shape == (11, 3)
    assert emb.cluster.dtype == np.float32 and emb.joint.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(emb.cluster, axis=1), 1.0, atol=1e-6)
    expected = direct_vectors(FakeEncoder(), usable["path"])
    np.testing.assert_allclose(emb.cluster, expected["cluster"], atol=1e-6)
    np.testing.assert_allclose(emb.joint, expected["joint"], atol=1e-6)
    assert sorted(encoder.batch_sizes) == [3, 4, 4]  # batches run in parallel streams, in any order
    assert (stats.embedded, stats.reused) == (11, 0)
    assert stats.describe().startswith("embedded 11 new images, reused 0 from cache")
    # Every batch was its own shard; the run ends with them merged into one.
    shards = list((tmp_path / "cache" / encoder_folder_name("fake-v1")).glob("shard-*.npz"))
    assert len(shards) == 1


def test_second_run_embeds_nothing_and_a_changed_file_is_embedded_again(tmp_path):
    root = tmp_path / "photos"
    make_tree(root, 6)
    table = collect.collect_images(root, progress=False)
    first, _ = embed_table(table, FakeEncoder(), tmp_path / "cache", progress=False)

    encoder = FakeEncoder()
    again, stats = embed_table(collect.collect_images(root, progress=False), encoder, tmp_path / "cache", progress=False)
    assert encoder.images_encoded == 0
    assert (stats.embedded, stats.reused) == (0, 6)
    assert stats.describe() == "embedded 0 new images, reused 6 from cache"
    np.testing.assert_array_equal(again.cluster, first.cluster)

    changed = root / "Alpha/consumer/img0000.jpg"
    photo(100).save(changed, quality=90)
    make_tree(root, 2, start=6)  # and two new files
    table = collect.collect_images(root, progress=False)
    encoder = FakeEncoder()
    third, stats = embed_table(table, encoder, tmp_path / "cache", progress=False)
    assert (stats.embedded, stats.reused, encoder.images_encoded) == (3, 5, 3)
    row = third.image_ids.index(first.image_ids[0])  # same path, same image id
    assert not np.allclose(third.cluster[row], first.cluster[0])
    np.testing.assert_allclose(third.cluster[row], direct_vectors(FakeEncoder(), [changed])["cluster"][0], atol=1e-6)


def test_rows_sharing_content_are_embedded_once(tmp_path):
    make_tree(tmp_path / "photos", 3)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    doubled = pd.concat([table, table.assign(image_id=table["image_id"] + "x")], ignore_index=True)
    encoder = FakeEncoder()
    emb, stats = embed_table(doubled, encoder, tmp_path / "cache", progress=False)
    assert encoder.images_encoded == 3 and stats.embedded == 3 and stats.duplicates == 3
    assert len(emb) == 6
    np.testing.assert_array_equal(emb.cluster[:3], emb.cluster[3:])


def test_encoders_keep_separate_vectors(tmp_path):
    make_tree(tmp_path / "photos", 3)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    embed_table(table, FakeEncoder("fake-v1"), tmp_path / "cache", progress=False)
    other = FakeEncoder("fake-v2")
    _, stats = embed_table(table, other, tmp_path / "cache", progress=False)
    assert stats.embedded == 3 and other.images_encoded == 3


def test_no_usable_images(tmp_path):
    (tmp_path / "photos").mkdir()
    table = collect.collect_images(tmp_path / "photos", progress=False)
    emb, stats = embed_table(table, FakeEncoder(), tmp_path / "cache", progress=False)
    assert len(emb) == 0 and stats.embedded == 0


def test_file_gone_since_collect_is_skipped_with_its_reason(tmp_path):
    make_tree(tmp_path / "photos", 3)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    gone = Path(table.loc[1, "path"])
    gone.unlink()
    emb, stats = embed_table(table, FakeEncoder(), tmp_path / "cache", batch_size=1, progress=False)
    sha = table.loc[1, "sha256"]
    assert stats.skipped[sha][0] == "missing" and "no longer exists" in stats.skipped[sha][1]
    assert table.loc[1, "image_id"] not in emb.image_ids and len(emb) == len(table) - 1
    with EmbeddingCache(tmp_path / "cache", "fake-v1") as cache:
        assert table.loc[0, "sha256"] in cache and sha not in cache


def test_file_changed_since_collect_is_skipped_never_cached_under_the_old_hash(tmp_path):
    make_tree(tmp_path / "photos", 2)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    changed = Path(table.loc[1, "path"])
    photo(999).save(changed, quality=90)  # still a fine image, other content
    emb, stats = embed_table(table, FakeEncoder(), tmp_path / "cache", batch_size=2, progress=False)
    assert stats.skipped[table.loc[1, "sha256"]] == ("changed", "the file's content changed since it was collected")
    assert emb.image_ids == [i for i in table.loc[table["status"] == "ok", "image_id"] if i != table.loc[1, "image_id"]]
    with EmbeddingCache(tmp_path / "cache", "fake-v1") as cache:
        assert table.loc[0, "sha256"] in cache and table.loc[1, "sha256"] not in cache


def test_encoder_output_is_checked(tmp_path):
    make_tree(tmp_path / "photos", 2)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    with pytest.raises(EmbedError, match="not L2-normalised"):
        embed_table(table, FakeEncoder(normalise=False), tmp_path / "cache", progress=False)


class MeetingEncoder(FakeEncoder):
    """Each batch waits in encode_images until another batch is there too."""

    def __init__(self, streams: int):
        super().__init__()
        self.barrier = threading.Barrier(streams, timeout=20)

    def encode_images(self, batch):
        self.barrier.wait()  # BrokenBarrierError unless `streams` batches run at once
        return super().encode_images(batch)


def test_streams_encode_batches_at_the_same_time_with_the_same_vectors(tmp_path):
    make_tree(tmp_path / "photos", 12)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    one, _ = embed_table(table, FakeEncoder(), tmp_path / "cache-1", batch_size=3, progress=False, streams=1)
    encoder = MeetingEncoder(streams=2)
    two, stats = embed_table(table, encoder, tmp_path / "cache-2", batch_size=3, progress=False, streams=2)
    assert stats.embedded == 12 and sorted(encoder.batch_sizes) == [3, 3, 3, 3]
    assert two.image_ids == one.image_ids
    np.testing.assert_array_equal(two.cluster, one.cluster)
    np.testing.assert_array_equal(two.joint, one.joint)
    with pytest.raises(ValueError, match="streams must be at least 1"):
        embed_table(table, FakeEncoder(), tmp_path / "cache-3", progress=False, streams=0)


class ThreadCountingEncoder(MeetingEncoder):
    """Records the torch thread count each batch is encoded with."""

    def __init__(self, streams: int):
        super().__init__(streams)
        self.torch_threads: list[int] = []

    def encode_images(self, batch):
        import torch

        self.torch_threads.append(torch.get_num_threads())
        return super().encode_images(batch)


def test_a_small_job_is_spread_over_the_streams(tmp_path):
    from explore.embed import available_cpus

    make_tree(tmp_path / "photos", 5)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    # 5 images, room for 32 per batch: two batches that run at once, not one.
    encoder = ThreadCountingEncoder(streams=2)
    emb, _ = embed_table(table, encoder, tmp_path / "cache-a", batch_size=32, progress=False, streams=2)
    assert sorted(encoder.batch_sizes) == [2, 3] and len(emb) == 5
    assert encoder.torch_threads == [max(1, available_cpus() // 2)] * 2
    # One image: one stream, which gets every CPU's torch thread.
    single = table.iloc[:1]
    encoder = ThreadCountingEncoder(streams=1)
    embed_table(single, encoder, tmp_path / "cache-b", batch_size=32, progress=False, streams=2)
    assert encoder.batch_sizes == [1] and encoder.torch_threads == [available_cpus()]


class FailingEncoder(FakeEncoder):
    """Fails on the batch holding one chosen image, after the other stream has its batch."""

    def __init__(self, bad_value: float):
        super().__init__()
        self.bad_value = bad_value
        self.barrier = threading.Barrier(2, timeout=20)

    def encode_images(self, batch):
        self.barrier.wait()
        if np.isclose(batch.reshape(len(batch), -1)[:, 0].numpy(), self.bad_value).any():
            raise RuntimeError("model failure on purpose")
        time.sleep(0.2)  # the good batch finishes after the failure is seen
        return super().encode_images(batch)


def test_an_error_in_one_stream_keeps_what_the_others_finish(tmp_path):
    make_tree(tmp_path / "photos", 2)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    draft = int(FakeEncoder.input_size / 0.875) + 1  # as embed_batch decodes
    first_pixel = float(FakeEncoder().preprocess(collect.open_rgb(table.loc[1, "path"], draft_size=draft)).reshape(-1)[0])
    with pytest.raises(RuntimeError, match="on purpose"):
        embed_table(table, FailingEncoder(first_pixel), tmp_path / "cache", batch_size=1, progress=False, streams=2)
    with EmbeddingCache(tmp_path / "cache", "fake-v1") as cache:
        assert table.loc[0, "sha256"] in cache and table.loc[1, "sha256"] not in cache


def test_concurrent_run_is_refused_in_process(tmp_path):
    make_tree(tmp_path / "photos", 2)
    table = collect.collect_images(tmp_path / "photos", progress=False)
    with EmbeddingCache(tmp_path / "cache", "whatever"):
        with pytest.raises(CacheBusy, match="in use by another explore run"):
            embed_table(table, FakeEncoder(), tmp_path / "cache", progress=False)


def test_stats_describe():
    assert EmbedStats(embedded=120, reused=380).describe() == "embedded 120 new images, reused 380 from cache"
    text = EmbedStats(embedded=1, reused=0, seconds=0.5, duplicates=2).describe()
    assert text == "embedded 1 new image, reused 0 from cache (2.0 images/s); 2 duplicate rows share vectors"


# --------------------------------------------------------------------------
# The real command line, bundled encoder, in subprocesses


def _bundled_available() -> str:
    try:
        from explore.encoders import bundled

        bundled.image_weights_path()
        bundled.text_model_dir()
    except Exception as exc:  # pragma: no cover - depends on the installed packages
        return str(exc)
    return ""


needs_bundled = pytest.mark.skipif(bool(_bundled_available()), reason="bundled encoder unavailable: " + _bundled_available())


def _embed_cmd(source: Path, out: Path, batch_size: int = 4) -> list[str]:
    return [str(VENV_EXPLORE), "--quiet", "embed", str(source), "--out", str(out), "--encoder", "bundled", "--batch-size", str(batch_size)]


def _cached_vectors(out: Path) -> tuple[pd.DataFrame, np.ndarray, np.ndarray]:
    table = pd.read_csv(out / "images.csv", keep_default_na=False)
    usable = table[table["status"] == "ok"]
    folders = [p for p in (out / "cache").iterdir() if p.is_dir()]
    assert len(folders) == 1
    import json

    encoder_id = json.loads((folders[0] / "encoder.json").read_text())["encoder_id"]
    with EmbeddingCache(out / "cache", encoder_id) as cache:
        cluster, joint = cache.get(usable["sha256"])
    return usable, cluster, joint


KILL_IMAGES = 64


@pytest.fixture(scope="module")
def kill_photos(tmp_path_factory):
    root = tmp_path_factory.mktemp("kill") / "photos"
    make_tree(root, KILL_IMAGES, size=(320, 240))
    return root


@needs_bundled
def test_sigkill_mid_run_then_resume_equals_an_uninterrupted_run(kill_photos, tmp_path):
    interrupted = tmp_path / "interrupted"
    process = subprocess.Popen(_embed_cmd(kill_photos, interrupted), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    shard_glob = "cache/*/shard-*.npz"
    deadline = time.monotonic() + 300
    try:
        while len(list(interrupted.glob(shard_glob))) < 2:
            assert process.poll() is None, process.communicate()
            assert time.monotonic() < deadline, "no shard written within 300 s"
            time.sleep(0.05)
    finally:
        process.send_signal(signal.SIGKILL)
        process.communicate()
    assert process.returncode == -signal.SIGKILL
    shards_after_kill = len(list(interrupted.glob(shard_glob)))
    assert 2 <= shards_after_kill < KILL_IMAGES // 4, "the kill must land mid-run"

    resumed = subprocess.run(_embed_cmd(kill_photos, interrupted), capture_output=True, text=True, timeout=600)
    assert resumed.returncode == 0, resumed.stderr
    done_before = shards_after_kill * 4
    line = next(l for l in resumed.stdout.splitlines() if l.startswith("embedded"))
    embedded, reused = int(line.split()[1]), int(line.split("reused ")[1].split()[0])
    assert embedded + reused == KILL_IMAGES and reused >= done_before and embedded > 0, line

    clean = tmp_path / "clean"
    full = subprocess.run(_embed_cmd(kill_photos, clean), capture_output=True, text=True, timeout=600)
    assert full.returncode == 0, full.stderr
    assert f"embedded {KILL_IMAGES} new images, reused 0 from cache" in full.stdout

    rows_a, cluster_a, joint_a = _cached_vectors(interrupted)
    rows_b, cluster_b, joint_b = _cached_vectors(clean)
    assert rows_a["sha256"].tolist() == rows_b["sha256"].tolist() and len(rows_a) == KILL_IMAGES
    np.testing.assert_allclose(cluster_a, cluster_b, atol=1e-6)
    np.testing.assert_allclose(joint_a, joint_b, atol=1e-6)


@needs_bundled
def test_cli_refuses_a_concurrent_run(tmp_path):
    make_tree(tmp_path / "photos", 2)
    with EmbeddingCache(tmp_path / "out" / "cache", "held-by-this-test"):
        result = subprocess.run(_embed_cmd(tmp_path / "photos", tmp_path / "out"), capture_output=True, text=True, timeout=600)
    assert result.returncode == 2
    assert f"is in use by another explore run (process {os.getpid()})" in result.stderr
    assert "Traceback" not in result.stderr

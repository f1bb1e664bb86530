"""The ONNX Runtime fast path (``[encoder] runtime = "onnxruntime"``): its own encoder id, cache
entries that never mix with the exact path's, and vectors within cosine 0.999 of the exact
(torch) encoder on outside images.

Outside images: scikit-image's sample photos (``skimage.data``) and Debian's
openclipart-png clip art composited on white (benchmarks/outside_set.py). The
reference is our exact torch encoder on the same pixels; the bound 0.999 is the
issue's acceptance rule for a fast path (README "Fast path").
"""

from __future__ import annotations

import sys

import numpy as np
import pytest

pytest.importorskip("onnxruntime")
pytest.importorskip("onnx")

from explore.encoders import EncoderUnavailable, load_encoder  # noqa: E402
from explore.encoders.fast import MIN_COSINE  # noqa: E402

OPENCLIPART = "/usr/share/openclipart/png"


def outside_images():
    from pathlib import Path

    from PIL import Image
    from skimage import data

    images = [Image.fromarray(getattr(data, name)()) for name in ("astronaut", "chelsea", "coffee", "rocket")]
    folders = ["food/fruit", "animals/mammals", "transportation/boating"]
    if Path(OPENCLIPART).is_dir():
        sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
        from benchmarks.outside_set import on_white

        for folder in folders:
            images += [on_white(p) for p in sorted((Path(OPENCLIPART) / folder).glob("*.png"))[:2]]
    return images


@pytest.fixture(scope="module")
def bundled_pair():
    exact, _ = load_encoder("bundled")
    fast, _ = load_encoder("bundled", runtime="onnxruntime")
    return exact, fast


def _cosines(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return (a.astype(np.float64) * b.astype(np.float64)).sum(axis=1)


def test_bundled_fast_vectors_within_bound_of_exact(bundled_pair):
    import torch

    exact, fast = bundled_pair
    images = outside_images()
    batch = torch.stack([exact.preprocess(im) for im in images])
    want, got = exact.encode_images(batch), fast.encode_images(batch)
    for kind in ("cluster", "joint"):
        assert got[kind].shape == want[kind].shape and got[kind].dtype == np.float32
        np.testing.assert_allclose(np.linalg.norm(got[kind], axis=1), 1.0, atol=1e-5)
        cos = _cosines(got[kind], want[kind])
        assert cos.min() >= MIN_COSINE, (kind, cos.round(5))
    # a batch of one (the exported graph has a dynamic batch axis) gives the same vectors
    one = fast.encode_images(batch[1:2])
    assert _cosines(one["joint"], want["joint"][1:2]).min() >= MIN_COSINE
    # vectors that do not belong to their image fail the bound (the check can bite)
    assert _cosines(got["cluster"][::-1], want["cluster"]).min() < MIN_COSINE


def test_fast_encoder_id_differs_and_cache_entries_do_not_mix(bundled_pair, tmp_path):
    from PIL import Image
    from skimage import data

    from explore.cache import EmbeddingCache
    from explore.collect import collect_images
    from explore.embed import embed_table

    exact, fast = bundled_pair
    assert fast.id != exact.id and fast.id.startswith(exact.id) and fast.id.endswith("-onnxruntime")
    root = tmp_path / "photos"
    for i, name in enumerate(("chelsea", "coffee", "astronaut")):
        folder = root / "Alpha" / ("consumer", "owned")[i % 2]
        folder.mkdir(parents=True, exist_ok=True)
        Image.fromarray(getattr(data, name)()).save(folder / f"{name}.jpg", quality=92)
    table = collect_images(root, progress=False)
    cache = tmp_path / "cache"
    emb_exact, stats = embed_table(table, exact, cache, progress=False)
    assert stats.embedded == 3
    emb_fast, stats = embed_table(table, fast, cache, progress=False)
    # nothing of the exact path's is reused for the fast path: all three embedded anew
    assert (stats.embedded, stats.reused) == (3, 0)
    assert emb_fast.encoder_id == fast.id and emb_exact.encoder_id == exact.id
    _, stats = embed_table(table, fast, cache, progress=False)
    assert (stats.embedded, stats.reused) == (0, 3)  # its own entries are reused
    folders = sorted(p.name for p in cache.iterdir() if p.is_dir())
    assert len(folders) == 2, folders
    shas = [dict(zip(table["image_id"], table["sha256"]))[i] for i in emb_exact.image_ids]
    for encoder, emb in ((exact, emb_exact), (fast, emb_fast)):  # each folder holds its own vectors
        with EmbeddingCache(cache, encoder.id) as store:
            cluster, joint = store.get(shas)
        np.testing.assert_array_equal(joint, emb.joint)
        np.testing.assert_array_equal(cluster, emb.cluster)
    assert _cosines(emb_fast.joint, emb_exact.joint).min() >= MIN_COSINE


def test_missing_onnxruntime_is_named_before_any_model_loads(monkeypatch):
    import explore.encoders.bundled as bundled

    monkeypatch.setitem(sys.modules, "onnxruntime", None)  # import fails as if not installed
    monkeypatch.setattr(bundled, "BundledEncoder", None)  # building the model would fail differently
    with pytest.raises(EncoderUnavailable, match=r"explore\[fast\]"):
        load_encoder("bundled", runtime="onnxruntime")


def test_unknown_runtime_refused_in_study(tmp_path):
    from explore.study import StudyError, load_study

    (tmp_path / "photos").mkdir()
    path = tmp_path / "study.toml"
    path.write_text('[images]\nroot = "photos"\n[encoder]\nruntime = "int8"\n', encoding="utf-8")
    with pytest.raises(StudyError, match="encoder.runtime"):
        load_study(path)


def test_clip_is_refused_where_not_measured_faster():
    # benchmarks/fast_path.py: onnxruntime x0.82 of exact end to end for the default clip model here
    with pytest.raises(EncoderUnavailable, match="not offered for the clip encoder"):
        load_encoder("clip", model="ViT-B-32", weights="/nonexistent.pt", runtime="onnxruntime")

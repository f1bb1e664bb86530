"""Near-duplicates confirmed by the image vectors (explore/duplicates.py).

Outside data: Debian's openclipart-png drawings composited on white (unrelated
objects on the same plain background, the case that produced false pairs) and
copies derived from them (resize to half, JPEG quality 35), embedded with the
bundled encoder. The thresholds come from benchmarks/near_duplicates.py (a
larger outside set); this test checks them on other drawings.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from explore import collect, duplicates
from explore.embed import Embeddings

CLIPART = Path("/usr/share/openclipart/png")


def fake(rows, vectors):
    table = pd.DataFrame(rows)
    for col in ("relpath", "reason"):
        table[col] = table.get(col, table["image_id"])
    emb = Embeddings(
        image_ids=list(table.loc[table["status"] == "ok", "image_id"]),
        encoder_id="test",
        cluster=np.asarray(vectors, dtype=np.float32),
        joint=np.asarray(vectors, dtype=np.float32),
    )
    return table, emb


def unit(angle):
    return [np.cos(angle), np.sin(angle)]


def test_proposals_are_confirmed_by_cosine_and_counted_once():
    # b is proposed as a copy of a and its vector agrees; d is proposed as a copy of c
    # but its vector points elsewhere (cos 0.5 < MIN_COSINE).
    rows = [
        dict(image_id="a", status="ok", near_duplicate_of=""),
        dict(image_id="b", status="ok", near_duplicate_of="a"),
        dict(image_id="c", status="ok", near_duplicate_of=""),
        dict(image_id="d", status="ok", near_duplicate_of="c"),
    ]
    table, emb = fake(rows, [unit(0), unit(0.1), unit(2), unit(2 + np.pi / 3)])
    out, kept, notes = duplicates.confirm_near_duplicates(table, emb)
    assert out.set_index("image_id")["status"].to_dict() == dict(a="ok", b="near_duplicate", c="ok", d="ok")
    assert out.set_index("image_id")["near_duplicate_of"].to_dict() == dict(a="", b="a", c="", d="")
    assert out.set_index("image_id").loc["d", "near_duplicate_cosine"] == pytest.approx(0.5, abs=1e-6)
    assert kept.image_ids == ["a", "c", "d"]
    assert np.allclose(kept.cluster[1], unit(2))
    assert "1 confirmed" in notes[0] and "1 hash-only proposal(s) rejected" in notes[0]
    # keep: flagged, still used
    out, kept, _ = duplicates.confirm_near_duplicates(table, emb, exclude=False)
    assert (out["status"] == "ok").all() and kept.image_ids == emb.image_ids
    assert out.set_index("image_id").loc["b", "near_duplicate_of"] == "a"


def on_white(path: Path) -> Image.Image:
    with Image.open(path) as im:
        im = im.convert("RGBA")
        im.thumbnail((300, 300))
        canvas = Image.new("RGBA", (330, 330), (255, 255, 255, 255))
        canvas.alpha_composite(im, ((330 - im.size[0]) // 2, (330 - im.size[1]) // 2))
        return canvas.convert("RGB")


@pytest.mark.skipif(not CLIPART.is_dir(), reason="Debian's openclipart-png is not installed")
def test_unrelated_drawings_on_white_are_not_near_duplicates_but_copies_are(tmp_path):
    from explore.embed import embed_table
    from explore.encoders import load_encoder

    # The benchmark fitted on the first three drawings of each topic folder; take the
    # last two of every folder instead, and keep the hard cases: drawings whose plain
    # difference hash (the old rule, 4 bits) is close to another's.
    candidates, seen = [], set()
    for folder in sorted(p for p in CLIPART.iterdir() if p.is_dir()):
        for path in sorted(folder.rglob("*.png"))[-2:]:
            if path.read_bytes() not in seen:  # one drawing filed under two folders: once
                seen.add(path.read_bytes())
                candidates.append(path)
    pictures = [on_white(p) for p in candidates]
    plain = np.array([collect.difference_hash(p.reduce(4)) for p in pictures], np.uint64)
    bits = collect._popcount(plain[:, None] ^ plain[None, :])
    hard = [k for k in range(len(pictures)) if ((bits[k] <= 4) & (np.arange(len(pictures)) != k)).any()]
    assert len(hard) >= 4, "expected white-background drawings that the old rule confuses"
    root = tmp_path / "photos" / "Alpha" / "consumer"
    root.mkdir(parents=True)
    for k, index in enumerate(hard[:12]):
        picture = pictures[index]
        picture.save(root / f"{k:02d}_a_original.jpg", quality=92)
        picture.resize((165, 165), Image.Resampling.LANCZOS).save(root / f"{k:02d}_b_half.jpg", quality=92)
        buf = io.BytesIO()
        picture.save(buf, "JPEG", quality=35)
        (root / f"{k:02d}_c_jpeg35.jpg").write_bytes(buf.getvalue())
    table = collect.collect_images(tmp_path / "photos", progress=False)
    encoder, _ = load_encoder("bundled")
    emb, _ = embed_table(table, encoder, cache_dir=tmp_path / "cache", batch_size=16, progress=False)
    out, kept, _ = duplicates.confirm_near_duplicates(table, emb)

    drawing = out["relpath"].str.extract(r"/(\d\d)_")[0]
    partner = out["near_duplicate_of"].map(dict(zip(out["image_id"], drawing)))
    confirmed = out["near_duplicate_of"] != ""
    assert (partner[confirmed] == drawing[confirmed]).all(), "an unrelated drawing was called a near-duplicate"
    # Every copy counts once with its original (representative: the original, first by path).
    n = min(len(hard), 12)
    assert confirmed.sum() >= 0.8 * 2 * n  # measured 21 of 24 here; 0.91 recall on the benchmark set
    assert set(out.loc[out["status"] == "ok", "relpath"].str.extract(r"_(\w)_")[0]) <= {"a", "b", "c"}
    assert (out.loc[out["relpath"].str.contains("_a_original"), "status"] == "ok").all()
    # The old rule (plain dHash within 4 bits) pairs unrelated drawings of this set, so the
    # check above does not pass for want of hard cases.
    originals = out[out["relpath"].str.contains("_a_original")]
    plain = np.array([collect.difference_hash(collect.open_rgb(p, draft_size=64)) for p in originals["path"]], np.uint64)
    bits = collect._popcount(plain[:, None] ^ plain[None, :])
    assert ((bits <= 4) & ~np.eye(len(plain), dtype=bool)).any()

"""Near-duplicates and near-copy reposts confirmed by the image vectors (explore/duplicates.py).

Outside data: Debian's openclipart-png drawings composited on white (unrelated
objects on the same plain background, the case that produced false pairs) and
copies derived from them (resize to half, JPEG quality 35), embedded with the
bundled encoder; scikit-image's sample photos (skimage.data: astronaut,
coffee, chelsea, rocket, camera) as a brand's owned photos and their re-shares.
The thresholds come from benchmarks/near_duplicates.py (a larger outside set);
these tests check them on other pictures.
"""

from __future__ import annotations

import io
import json
import shutil
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


# --------------------------------------------------------------------------
# Near-copy reposts: a brand's own photo re-shared by consumers, recompressed


def sample_photo(name: str) -> Image.Image:
    """A scikit-image sample photo (skimage.data), outside data."""
    data = pytest.importorskip("skimage.data")
    return Image.fromarray(getattr(data, name)()).convert("RGB")


def reshared(image: Image.Image, path: Path, scale: float, quality: int) -> Path:
    """A re-share: resized and recompressed at a lower JPEG quality."""
    path.parent.mkdir(parents=True, exist_ok=True)
    w, h = image.size
    image.resize((round(w * scale), round(h * scale)), Image.Resampling.LANCZOS).save(path, quality=quality)
    return path


REPOST_STUDY = """name = "near-copy reposts"
output = "out"
[images]
root = "photos"
{extra}
[encoder]
name = "bundled"
[[attribute]]
name = "outdoor"
positive = ["outdoors in nature"]
negative = ["indoors in a room"]
"""

#: The hard negative on white: two unrelated openclipart drawings (a shopping-cart
#: button, a zero-stars rating sign) whose content hashes are 6-8 bits apart, so
#: collect proposes the pair and only the image vectors can reject it. Found as
#: the only pair of different topic folders within 14 bits among the last two
#: drawings of every folder (the set tests/test_duplicates.py uses above).
CART = CLIPART / "buttons/shopping_cart_mimooh_01.png"
STARS = CLIPART / "signs_and_symbols/zero_stars_saurabh_nanda_01.png"


def repost_study(tmp_path: Path, extra: str = ""):
    """Alpha owns scikit-image's astronaut (launch), coffee (picnic) and the cart
    drawing on white; Beta owns chelsea (cat). Alpha's consumer set holds two
    re-shares of launch (3/4 size at JPEG quality 60; half size at 80), the same
    file as picnic, the stars drawing on white, rocket (a consumer's own photo)
    and a re-share of Beta's cat; Beta's consumer set holds the same re-share of
    its cat and camera."""
    from explore.study import load_study

    root = tmp_path / "photos"
    (root / "Alpha/owned").mkdir(parents=True)
    sample_photo("astronaut").save(root / "Alpha/owned/launch.jpg", quality=92)
    sample_photo("coffee").save(root / "Alpha/owned/picnic.jpg", quality=92)
    on_white(CART).save(root / "Alpha/owned/cart.jpg", quality=92)
    reshared(sample_photo("astronaut"), root / "Alpha/consumer/fan_a.jpg", 0.75, 60)
    reshared(sample_photo("astronaut"), root / "Alpha/consumer/fan_b.jpg", 0.5, 80)
    shutil.copy(root / "Alpha/owned/picnic.jpg", root / "Alpha/consumer/picnic_same_file.jpg")
    on_white(STARS).save(root / "Alpha/consumer/stars.jpg", quality=92)
    sample_photo("rocket").save(root / "Alpha/consumer/rocket.jpg", quality=92)
    reshared(sample_photo("chelsea"), root / "Alpha/consumer/beta_cat.jpg", 0.75, 60)
    (root / "Beta/owned").mkdir(parents=True)
    sample_photo("chelsea").save(root / "Beta/owned/cat.jpg", quality=92)
    (root / "Beta/consumer").mkdir(parents=True)
    shutil.copy(root / "Alpha/consumer/beta_cat.jpg", root / "Beta/consumer/cat_copy.jpg")
    sample_photo("camera").save(root / "Beta/consumer/camera.jpg", quality=92)
    (tmp_path / "study.toml").write_text(REPOST_STUDY.format(extra=extra), encoding="utf-8")
    return load_study(tmp_path / "study.toml")


def by_path(table: pd.DataFrame) -> pd.DataFrame:
    return table.set_index("relpath")


def cell_counts(table: pd.DataFrame) -> dict:
    ok = table[table["status"] == "ok"]
    return {f"{b}/{s}": int(n) for (b, s), n in ok.groupby(["brand", "source"]).size().items()}


@pytest.mark.skipif(not CLIPART.is_dir(), reason="Debian's openclipart-png is not installed")
@pytest.mark.parametrize("reposts", ["exclude", "keep"])
def test_recompressed_reshare_of_an_owned_photo_is_a_repost(tmp_path, reposts):
    from explore.embed import embed_table
    from explore.encoders import load_encoder

    study = repost_study(tmp_path, f'reposts = "{reposts}"')
    table = collect.collect_study_images(study, progress=False)
    encoder, _ = load_encoder("bundled")
    emb, _ = embed_table(table, encoder, cache_dir=tmp_path / "cache", batch_size=16, progress=False)
    out, kept, notes = duplicates.confirm_near_duplicates(table, emb, exclude_reposts=reposts == "exclude")
    rows = by_path(out)
    ids = rows["image_id"]

    # The re-shares of Alpha's launch photo are reposts of it (different files, so
    # no exact match), with the evidence in the reason.
    for name in ("Alpha/consumer/fan_a.jpg", "Alpha/consumer/fan_b.jpg"):
        r = rows.loc[name]
        assert r["sha256"] != rows.loc["Alpha/owned/launch.jpg", "sha256"]
        assert r["repost_of"] == ids["Alpha/owned/launch.jpg"], name
        assert r["near_repost_bits"] <= duplicates.CANDIDATE_BITS and r["near_repost_cosine"] >= duplicates.MIN_COSINE
    # The exact repost stays as collect made it.
    same = rows.loc["Alpha/consumer/picnic_same_file.jpg"]
    assert same["repost_of"] == ids["Alpha/owned/picnic.jpg"] and same["near_repost_of"] == ""
    # The unrelated drawing on white was proposed by the hash and rejected by the vectors.
    stars = rows.loc["Alpha/consumer/stars.jpg"]
    assert stars["near_repost_of"] == ids["Alpha/owned/cart.jpg"] and stars["near_repost_bits"] <= 14
    assert stars["near_repost_cosine"] < duplicates.MIN_COSINE
    assert stars["status"] == "ok" and stars["repost_of"] == ""
    # Beta's cat re-shared is a repost for Beta, never for Alpha.
    assert rows.loc["Beta/consumer/cat_copy.jpg", "repost_of"] == ids["Beta/owned/cat.jpg"]
    assert rows.loc["Alpha/consumer/beta_cat.jpg", "repost_of"] == ""
    assert rows.loc["Alpha/consumer/beta_cat.jpg", "status"] == "ok"
    assert rows.loc["Alpha/consumer/rocket.jpg", "repost_of"] == ""
    assert (rows.loc[rows["source"] == "owned", "status"] == "ok").all()

    if reposts == "exclude":
        for name in ("Alpha/consumer/fan_a.jpg", "Alpha/consumer/fan_b.jpg", "Beta/consumer/cat_copy.jpg"):
            assert rows.loc[name, "status"] == "repost", name
            assert "near-copy of the brand's own photo" in rows.loc[name, "reason"]
            assert "hash distance" in rows.loc[name, "reason"] and "cosine 0.9" in rows.loc[name, "reason"]
        assert "Alpha/owned/launch.jpg (hash distance" in rows.loc["Alpha/consumer/fan_a.jpg", "reason"]
        assert rows.loc["Alpha/consumer/fan_b.jpg", "near_duplicate_of"] == ""  # a repost, decided first
        assert same["status"] == "repost" and "Alpha/owned/picnic.jpg re-posted" in same["reason"]
        # By hand: Alpha consumer keeps stars, rocket, beta_cat; Beta consumer keeps camera.
        assert cell_counts(out) == {"Alpha/consumer": 3, "Alpha/owned": 3, "Beta/consumer": 1, "Beta/owned": 1}
    else:
        # Counted, flagged; fan_b (near-identical to fan_a, same brand and source)
        # is then counted once with fan_a as a near-duplicate.
        assert rows.loc["Alpha/consumer/fan_a.jpg", "status"] == "ok"
        assert rows.loc["Alpha/consumer/fan_b.jpg", "status"] == "near_duplicate"
        assert rows.loc["Alpha/consumer/fan_b.jpg", "near_duplicate_of"] == ids["Alpha/consumer/fan_a.jpg"]
        assert rows.loc["Beta/consumer/cat_copy.jpg", "status"] == "ok" and same["status"] == "ok"
        # By hand: Alpha consumer keeps fan_a, picnic_same_file, stars, rocket, beta_cat.
        assert cell_counts(out) == {"Alpha/consumer": 5, "Alpha/owned": 3, "Beta/consumer": 2, "Beta/owned": 1}
    assert sorted(kept.image_ids) == sorted(out.loc[out["status"] == "ok", "image_id"])

    summary = collect.repost_summary(out)
    want = {
        "exclude": [dict(brand="Alpha", reposts=3, same_file=1, near_copies=2, consumer_files=6, excluded=True),
                    dict(brand="Beta", reposts=1, same_file=0, near_copies=1, consumer_files=2, excluded=True)],
        "keep": [dict(brand="Alpha", reposts=2, same_file=1, near_copies=1, consumer_files=5, excluded=False),
                 dict(brand="Beta", reposts=1, same_file=0, near_copies=1, consumer_files=2, excluded=False)],
    }[reposts]
    cols = ["brand", "reposts", "same_file", "near_copies", "consumer_files", "excluded"]
    assert summary[cols].to_dict("records") == want
    assert "Alpha/consumer/fan_a.jpg (near-copy of Alpha/owned/launch.jpg (hash distance" in summary["examples"].iloc[0]
    note = next(n for n in notes if n.startswith("reposts:"))
    assert "3 consumer photo(s) confirmed as near-copies" in note and "1 hash-only proposal(s) rejected" in note


@pytest.mark.skipif(not CLIPART.is_dir(), reason="Debian's openclipart-png is not installed")
def test_a_run_reports_near_copy_reposts_and_leaves_them_out_of_consumer_shares(tmp_path):
    """The whole run on the study above (bundled encoder): run notes, the reposts
    table, the report's left-out section and the attribute shares agree."""
    import re

    from explore.run import run_study

    study = repost_study(tmp_path)
    run_study(study, progress=False, log=lambda line: None)
    out = tmp_path / "out"
    images = pd.read_parquet(out / "images.parquet")
    rows = by_path(images)
    assert rows.loc[["Alpha/consumer/fan_a.jpg", "Alpha/consumer/fan_b.jpg", "Alpha/consumer/picnic_same_file.jpg",
                     "Beta/consumer/cat_copy.jpg"], "status"].tolist() == ["repost"] * 4
    notes = json.loads((out / "run.json").read_text())["notes"]
    alpha = next(n for n in notes if n.startswith("reposts: Alpha:"))
    assert "3 of 6 consumer photos are reposts of its own photos (1 same file, 2 near-copies; left out" in alpha
    assert "Alpha/consumer/fan_a.jpg (near-copy of Alpha/owned/launch.jpg (hash distance" in alpha
    assert any(n.startswith("reposts: Beta: 1 of 2 consumer photos") and "1 near-copy;" in n for n in notes)
    table = pd.read_csv(out / "reposts.csv")
    assert table[["brand", "reposts", "same_file", "near_copies"]].values.tolist() == [
        ["Alpha", 3, 1, 2], ["Beta", 1, 0, 1]
    ]

    html = (out / "report.html").read_text(encoding="utf-8")
    block = re.search(r'data-kind="repost">(.*?)<div class="left-out-kind"', html, re.S).group(1)
    assert "or a near-copy" in block and "Of these 4: 3 near-copies (not the same file), 1 the same file" in block
    cells = re.findall(r"<tr><td>(.*?)</td><td>(.*?)</td><td class=\"num\">(\d+)</td><td class=\"num\">(\d+)</td></tr>", block)
    assert cells == [("Alpha", "consumer", "3", "0"), ("Beta", "consumer", "1", "0")]
    assert "near-copy of the brand&#39;s own photo Alpha/owned/launch.jpg (hash distance" in block

    # Consumer shares count the rows still used, reposts not among them.
    shares = pd.read_parquet(out / "attribute_shares.parquet")
    cell = shares[(shares["level"] == "brand") & (shares["source"] == "consumer")].set_index("brand")["n"]
    used = images[(images["status"] == "ok") & (images["source"] == "consumer")].groupby("brand").size()
    assert cell.to_dict() == used.to_dict()
    assert used["Alpha"] <= 3  # stars, rocket, beta_cat at most (a commercial-looking one may also leave)

"""Collect: every layout and file kind ends up in the images table with the right status.

References used below:
- EXIF orientation values: CIPA DC-008 (Exif 2.3), tag 0x0112, which repeats
  TIFF 6.0's Orientation tag (1 = upright, 2 = mirrored left-right, 3 = turned
  180, 4 = mirrored top-bottom, 5 = transposed, 6 = needs a 90 degree clockwise
  turn to view, 7 = transversed, 8 = needs a 90 degree counter-clockwise turn).
- PNG file layout (signature, IHDR/IDAT/IEND chunks, CRC-32, filter byte per
  row): the PNG specification (W3C, 2nd edition, 2003), used to write a 48-bit
  PNG by hand because PIL cannot write one.
- CMYK -> RGB without a colour profile: R = 255 (1 - C)(1 - K) and likewise for
  G, B (the usual device-CMYK formula, from memory).
- Alpha over a white background: out = a * colour + (1 - a) * 255 (Porter and
  Duff, 1984, "over").
"""

from __future__ import annotations

import builtins
import shutil
import struct
import zlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from explore import collect
from explore.collect import CollectError, collect_images, open_rgb, skipped_files, summarise


def smooth_photo(seed: int, size=(160, 120)) -> Image.Image:
    """A photo-like picture: blurred noise (smooth structure, unlike raw noise)."""
    rng = np.random.default_rng(seed)
    small = (rng.random((6, 8, 3)) * 255).astype(np.uint8)
    return Image.fromarray(small).resize(size, Image.Resampling.BICUBIC)


def save(image: Image.Image, path: Path, **kwargs) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    image.save(path, **kwargs)
    return path


def row(table: pd.DataFrame, relpath: str) -> pd.Series:
    hits = table[table["relpath"] == relpath]
    assert len(hits) == 1, f"{relpath} not in the table: {list(table['relpath'])}"
    return hits.iloc[0]


# --------------------------------------------------------------------------
# Folder tree


def test_tree_reads_every_supported_format(tmp_path):
    root = tmp_path / "photos"
    base = smooth_photo(1)
    save(base, root / "Alpha/consumer/a.jpg", quality=92)
    save(smooth_photo(2), root / "Alpha/consumer/deeper/still/b.png")
    save(smooth_photo(3), root / "Alpha/owned/c.webp", quality=90)
    save(smooth_photo(4).convert("P"), root / "Beta/owned/d.gif")
    save(smooth_photo(5), root / "Beta/consumer/e.bmp")
    save(smooth_photo(6), root / "Beta/Consumer/f.tiff")
    table = collect_images(root, categories={"Alpha": "snacks"}, progress=False)

    assert list(table.columns) == collect.COLUMNS
    assert (table["status"] == "ok").all(), table[["relpath", "status", "reason"]]
    assert set(table["width"]) == {160} and set(table["height"]) == {120}
    a = row(table, "Alpha/consumer/a.jpg")
    assert (a["brand"], a["source"], a["category"]) == ("Alpha", "consumer", "snacks")
    assert row(table, "Beta/Consumer/f.tiff")["source"] == "consumer"  # source folder in any case
    assert row(table, "Beta/owned/d.gif")["category"] == "all"
    # image_id: first 12 hex digits of sha1 of the relative path (DEVELOPERS.md)
    import hashlib

    assert a["image_id"] == hashlib.sha1(b"Alpha/consumer/a.jpg").hexdigest()[:12]
    assert a["sha256"] == hashlib.sha256((root / "Alpha/consumer/a.jpg").read_bytes()).hexdigest()
    assert Path(a["path"]).is_absolute() and Path(a["path"]).is_file()


def test_every_bad_file_kind_gets_its_status_and_reason(tmp_path, monkeypatch):
    root = tmp_path / "photos"
    good = save(smooth_photo(1, (800, 600)), root / "Alpha/consumer/good.jpg", quality=90)
    (root / "Alpha/consumer/empty.jpg").write_bytes(b"")
    data = good.read_bytes()
    (root / "Alpha/consumer/truncated.jpg").write_bytes(data[: len(data) // 2])
    (root / "Alpha/consumer/notes.jpg").write_text("this is not a picture", encoding="utf-8")
    # A decompression bomb: 20000 x 10000 pixels in a few kilobytes. PIL itself
    # refuses images over 2 x Image.MAX_IMAGE_PIXELS with DecompressionBombError.
    bomb = root / "Alpha/consumer/bomb.png"
    Image.new("1", (20000, 10000)).save(bomb)
    assert bomb.stat().st_size < 100_000
    locked = save(smooth_photo(2), root / "Alpha/owned/locked.png")
    locked.chmod(0)
    save(smooth_photo(3), root / "stray.png")
    save(smooth_photo(4), root / "Alpha/loose.png")
    save(smooth_photo(5), root / "Alpha/press/kit.png")
    (root / "Alpha/owned/.DS_Store").write_bytes(b"\0\0\0\1Bud1")
    (root / "Alpha/owned/gone.jpg").symlink_to(root / "Alpha/owned/deleted.jpg")

    real_open = builtins.open

    def open_as_user(file, mode="r", *args, **kwargs):
        # Tests may run as root, who reads any file whatever its permissions;
        # then raise what the kernel raises for an ordinary user.
        if Path(str(file)) == locked and "r" in mode:
            raise PermissionError(13, "Permission denied", str(file))
        return real_open(file, mode, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", open_as_user)
    table = collect_images(root, progress=False)
    locked.chmod(0o644)

    expected = {
        "Alpha/consumer/good.jpg": "ok",
        "Alpha/consumer/empty.jpg": "empty",
        "Alpha/consumer/truncated.jpg": "truncated",
        "Alpha/consumer/notes.jpg": "not_image",
        "Alpha/consumer/bomb.png": "too_large",
        "Alpha/owned/locked.png": "unreadable",
        "Alpha/owned/gone.jpg": "missing",
        "stray.png": "misplaced",
        "Alpha/loose.png": "misplaced",
        "Alpha/press/kit.png": "misplaced",
    }
    assert dict(zip(table["relpath"], table["status"])) == expected
    for relpath, status in expected.items():
        r = row(table, relpath)
        if status == "ok":
            assert r["reason"] == "" and r["width"] == 800
        else:
            assert r["reason"], relpath
            assert r["sha256"] == "" or status in ("truncated", "not_image", "too_large")
            assert r["width"] == 0 and r["height"] == 0
    assert "truncated" in row(table, "Alpha/consumer/truncated.jpg")["reason"]
    assert "decompression bomb" in row(table, "Alpha/consumer/bomb.png")["reason"]
    assert "permission" in row(table, "Alpha/owned/locked.png")["reason"]
    assert "press" in row(table, "Alpha/press/kit.png")["reason"]

    skipped = skipped_files(table)
    assert len(skipped) == len(expected) - 1 and "ok" not in set(skipped["status"])
    text = summarise(table)
    assert text.startswith("found 10 files: 1 used, 9 skipped")
    assert "3 misplaced" in text and "1 truncated" in text


def test_own_pixel_limit_refuses_large_images(tmp_path):
    root = tmp_path / "photos"
    save(smooth_photo(1, (100, 100)), root / "Alpha/owned/big.png")
    save(smooth_photo(2, (20, 20)), root / "Alpha/owned/small.png")
    table = collect_images(root, progress=False, max_pixels=5_000)
    assert row(table, "Alpha/owned/big.png")["status"] == "too_large"
    assert "10,000 pixels" in row(table, "Alpha/owned/big.png")["reason"]
    assert row(table, "Alpha/owned/small.png")["status"] == "ok"


def test_exact_and_near_duplicates(tmp_path):
    root = tmp_path / "photos"
    first = save(smooth_photo(7, (320, 240)), root / "Alpha/consumer/a.jpg", quality=95)
    shutil.copy(first, root / "Alpha/consumer/copy_of_a.jpg")
    # The same picture resized and recompressed: a near-duplicate, still used.
    save(Image.open(first).resize((200, 150)), root / "Alpha/consumer/a_small.jpg", quality=70)
    save(smooth_photo(8, (320, 240)), root / "Beta/consumer/other.jpg", quality=95)
    table = collect_images(root, progress=False)

    a = row(table, "Alpha/consumer/a.jpg")
    copy = row(table, "Alpha/consumer/copy_of_a.jpg")
    assert a["status"] == "ok" and copy["status"] == "duplicate"
    assert copy["duplicate_of"] == a["image_id"] and copy["sha256"] == a["sha256"]
    assert "Alpha/consumer/a.jpg" in copy["reason"]
    small = row(table, "Alpha/consumer/a_small.jpg")
    assert small["status"] == "ok" and small["near_duplicate_of"] == a["image_id"]
    assert row(table, "Beta/consumer/other.jpg")["near_duplicate_of"] == ""
    assert "1 duplicate" in summarise(table) and "1 near-duplicate" in summarise(table)


STUDY_WITH_REPOSTS = """
name = "reposts"
[images]
root = "photos"
{extra}
[brands]
Alpha = "drinks"
Beta = "drinks"
"""


def reposts_study(tmp_path, extra=""):
    """Alpha and Beta each post the same photo (shared.jpg) in their consumer sets;
    Alpha's owned launch.jpg is re-posted in Alpha's consumer set; Alpha's consumer
    set also holds one exact copy of its own photo (kept once)."""
    root = tmp_path / "photos"
    shared = save(smooth_photo(21, (240, 180)), root / "Alpha/consumer/shared.jpg", quality=90)
    (root / "Beta/consumer").mkdir(parents=True)
    shutil.copy(shared, root / "Beta/consumer/shared_too.jpg")
    launch = save(smooth_photo(22, (240, 180)), root / "Alpha/owned/launch.jpg", quality=90)
    shutil.copy(launch, root / "Alpha/consumer/fan_repost.jpg")
    own = save(smooth_photo(23, (240, 180)), root / "Alpha/consumer/picnic.jpg", quality=90)
    shutil.copy(own, root / "Alpha/consumer/picnic_again.jpg")
    save(smooth_photo(24, (240, 180)), root / "Alpha/owned/studio.jpg", quality=90)
    save(smooth_photo(25, (240, 180)), root / "Beta/owned/ad.jpg", quality=90)
    study_file = tmp_path / "study.toml"
    study_file.write_text(STUDY_WITH_REPOSTS.format(extra=extra), encoding="utf-8")
    from explore.study import load_study

    return load_study(study_file)


def used_counts(table):
    ok = table[table["status"] == "ok"]
    return {k: int(v) for k, v in ok.groupby(["brand", "source"]).size().items()}


def test_photo_under_two_brands_counts_for_both_and_reposts_are_reported(tmp_path):
    """Rules (issue 16): an exact copy counts once within a brand x source and in
    every brand/source where it was posted; a brand's owned photo in its consumer
    set is a repost, reported, and left out of consumer counts by default.
    Expected counts by hand from the files written above."""
    study = reposts_study(tmp_path)
    table = collect.collect_study_images(study, progress=False)
    assert used_counts(table) == {
        ("Alpha", "consumer"): 2,  # shared, picnic (picnic_again = duplicate, fan_repost = repost)
        ("Alpha", "owned"): 2,  # launch, studio
        ("Beta", "consumer"): 1,  # shared_too: same content as Alpha's, kept for Beta
        ("Beta", "owned"): 1,
    }
    assert row(table, "Beta/consumer/shared_too.jpg")["status"] == "ok"
    assert row(table, "Alpha/consumer/picnic_again.jpg")["status"] == "duplicate"
    repost = row(table, "Alpha/consumer/fan_repost.jpg")
    assert repost["status"] == "repost"
    assert repost["repost_of"] == row(table, "Alpha/owned/launch.jpg")["image_id"]
    assert "Alpha/owned/launch.jpg" in repost["reason"]
    # The owned photo itself is untouched; the shared photo is no repost (other brand).
    assert row(table, "Alpha/owned/launch.jpg")["status"] == "ok"
    assert row(table, "Beta/consumer/shared_too.jpg")["repost_of"] == ""

    report = collect.repost_summary(table)
    assert report[["brand", "reposts", "consumer_files", "excluded"]].to_dict("records") == [
        dict(brand="Alpha", reposts=1, consumer_files=3, excluded=True)
    ]
    assert report["repost_share"].iloc[0] == pytest.approx(1 / 3)
    assert "Alpha/consumer/fan_repost.jpg (= Alpha/owned/launch.jpg)" in report["examples"].iloc[0]
    assert "1 consumer photo(s) of 1 brand(s) are reposts" in summarise(table)
    # Embedding stays once per content: 5 distinct contents among 6 used rows.
    assert table.loc[table["status"] == "ok", "sha256"].nunique() == 5


def test_reposts_kept_when_the_study_says_so(tmp_path):
    study = reposts_study(tmp_path, extra='reposts = "keep"')
    table = collect.collect_study_images(study, progress=False)
    assert used_counts(table)[("Alpha", "consumer")] == 3
    repost = row(table, "Alpha/consumer/fan_repost.jpg")
    assert repost["status"] == "ok" and repost["repost_of"] != ""
    report = collect.repost_summary(table)
    assert report["reposts"].tolist() == [1] and report["excluded"].tolist() == [False]


def test_reposts_setting_is_checked(tmp_path):
    from explore.study import StudyError

    with pytest.raises(StudyError, match="images.reposts"):
        reposts_study(tmp_path, extra='reposts = "drop"')


def test_difference_hash_follows_its_definition():
    # Krawetz (2013): shrink to 9x8 grey, each bit = pixel brighter than its right neighbour.
    grey = np.tile(np.arange(9, 0, -1, dtype=np.uint8) * 20, (8, 1))  # falls left to right
    image = Image.fromarray(grey, "L").resize((90, 80), Image.Resampling.NEAREST)
    assert collect.difference_hash(image) == 2**64 - 1
    assert collect.difference_hash(image.transpose(Image.Transpose.FLIP_LEFT_RIGHT)) == 0


def test_missing_root_and_empty_root(tmp_path):
    with pytest.raises(FileNotFoundError, match="not found"):
        collect_images(tmp_path / "nope", progress=False)
    (tmp_path / "empty").mkdir()
    table = collect_images(tmp_path / "empty", progress=False)
    assert len(table) == 0 and list(table.columns) == collect.COLUMNS
    assert summarise(table).startswith("found 0 files")


# --------------------------------------------------------------------------
# Orientation and colour conversion

# Stored picture = the inverse of the turn the viewer applies (EXIF tag 0x0112).
_STORE = {
    1: None,
    2: Image.Transpose.FLIP_LEFT_RIGHT,
    3: Image.Transpose.ROTATE_180,
    4: Image.Transpose.FLIP_TOP_BOTTOM,
    5: Image.Transpose.TRANSPOSE,
    6: Image.Transpose.ROTATE_90,  # PIL's ROTATE_90 turns counter-clockwise
    7: Image.Transpose.TRANSVERSE,
    8: Image.Transpose.ROTATE_270,
}


@pytest.mark.parametrize("orientation", sorted(_STORE))
def test_exif_rotated_images_come_out_upright(tmp_path, orientation):
    upright = Image.new("RGB", (64, 96), (0, 0, 255))  # portrait, blue
    upright.paste((255, 0, 0), (0, 0, 32, 32))  # red square top-left
    stored = upright if _STORE[orientation] is None else upright.transpose(_STORE[orientation])
    exif = Image.Exif()
    exif[0x0112] = orientation
    root = tmp_path / "photos"
    path = save(stored, root / "Alpha/consumer/turned.jpg", quality=95, exif=exif.tobytes())

    table = collect_images(root, progress=False)
    r = row(table, "Alpha/consumer/turned.jpg")
    assert (r["status"], r["width"], r["height"]) == ("ok", 64, 96)
    pixels = np.asarray(open_rgb(path))
    assert pixels.shape == (96, 64, 3)
    assert np.abs(pixels[16, 16].astype(int) - (255, 0, 0)).max() < 12  # top-left red
    assert np.abs(pixels[80, 48].astype(int) - (0, 0, 255)).max() < 12  # elsewhere blue


def test_palette_with_transparency_goes_over_white(tmp_path):
    image = Image.new("P", (4, 4), 0)
    image.putpalette([0, 0, 0, 200, 30, 40] + [0] * 762)
    image.putpixel((1, 1), 1)
    path = save(image, tmp_path / "p.png", transparency=0)
    rgb = open_rgb(path)
    assert rgb.mode == "RGB"
    assert rgb.getpixel((0, 0)) == (255, 255, 255)  # transparent -> white background
    assert rgb.getpixel((1, 1)) == (200, 30, 40)
    gif = save(image, tmp_path / "p.gif", transparency=0)
    assert open_rgb(gif).getpixel((0, 0)) == (255, 255, 255)


def test_alpha_is_composited_over_white(tmp_path):
    rgba = Image.new("RGBA", (2, 1), (255, 0, 0, 0))
    rgba.putpixel((1, 0), (255, 0, 0, 128))
    rgb = open_rgb(save(rgba, tmp_path / "a.png"))
    assert rgb.getpixel((0, 0)) == (255, 255, 255)
    # Porter-Duff over white: 128/255 * 0 + (1 - 128/255) * 255 = 127 for green and blue
    r, g, b = rgb.getpixel((1, 0))
    assert r == 255 and abs(g - 127) <= 1 and abs(b - 127) <= 1
    la = Image.new("LA", (1, 1), (0, 0))
    assert open_rgb(save(la, tmp_path / "la.png")).getpixel((0, 0)) == (255, 255, 255)


def test_cmyk_converts_with_the_device_formula(tmp_path):
    cmyk = Image.new("CMYK", (3, 1))
    cmyk.putpixel((0, 0), (255, 0, 0, 0))  # cyan
    cmyk.putpixel((1, 0), (0, 0, 0, 0))  # paper white
    cmyk.putpixel((2, 0), (0, 128, 0, 128))
    for name in ("c.tiff", "c.jpg"):
        kwargs = {"quality": 100} if name.endswith("jpg") else {}
        rgb = open_rgb(save(cmyk, tmp_path / name, **kwargs))
        assert rgb.mode == "RGB"
        got = np.asarray(rgb).astype(int)
        # R = 255 (1 - C)(1 - K): cyan -> (0, 255, 255); (0, .5, 0, .5) -> (127, 64, 127)
        expected = np.array([[[0, 255, 255], [255, 255, 255], [127, 64, 127]]])
        tolerance = 1 if name.endswith("tiff") else 6  # JPEG is lossy
        assert np.abs(got - expected).max() <= tolerance, (name, got)


def test_sixteen_bit_grey_is_scaled_not_clipped(tmp_path):
    values = np.array([[0, 13107, 32768, 65535]], dtype=np.uint16)
    for name in ("g.png", "g.tiff"):
        path = save(Image.fromarray(values), tmp_path / name)
        assert Image.open(path).mode.startswith("I")
        got = np.asarray(open_rgb(path))[0, :, 0]
        # 8-bit = 16-bit * 255 / 65535: 13107 -> 51, 32768 -> 127.5 -> 128
        assert got.tolist() == [0, 51, 128, 255], name


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def test_sixteen_bit_rgb_png(tmp_path):
    # A 48-bit (16 bits per channel) PNG written by hand per the PNG specification.
    pixels = np.array([[[65535, 0, 0x8000], [0x4000, 0xFFFF, 0x0100]]], dtype=">u2")
    raw = b"".join(b"\0" + line.tobytes() for line in pixels)  # filter type 0 per row
    ihdr = struct.pack(">IIBBBBB", 2, 1, 16, 2, 0, 0, 0)  # width, height, depth 16, colour type 2
    data = b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", zlib.compress(raw))
    data += _png_chunk(b"IEND", b"")
    path = tmp_path / "deep.png"
    path.write_bytes(data)
    got = np.asarray(open_rgb(path)).astype(int)
    expected = np.rint(pixels.astype(float) * 255 / 65535)
    assert np.abs(got - expected).max() <= 1


def test_gif_first_frame(tmp_path):
    frames = [Image.new("RGB", (8, 8), (250, 10, 10)), Image.new("RGB", (8, 8), (10, 10, 250))]
    path = tmp_path / "anim.gif"
    frames[0].save(path, save_all=True, append_images=frames[1:], duration=100)
    r, g, b = open_rgb(path).getpixel((4, 4))
    assert r > 200 and b < 60


def test_draft_decoding_keeps_at_least_the_requested_size(tmp_path):
    path = save(smooth_photo(3, (1600, 1200)), tmp_path / "big.jpg", quality=90)
    small = open_rgb(path, draft_size=448)
    # libjpeg scales by 1/2, 1/4 or 1/8; 1/2 is the smallest keeping both sides >= 448
    assert small.size == (800, 600)
    full = open_rgb(path)
    assert full.size == (1600, 1200)
    reference = np.asarray(full.resize((800, 600), Image.Resampling.BOX), dtype=float)
    assert np.abs(np.asarray(small, dtype=float) - reference).mean() < 3
    # Other formats are shrunk by a whole factor, both sides staying >= the draft size.
    png = save(smooth_photo(3, (1600, 1200)), tmp_path / "big.png")
    assert open_rgb(png, draft_size=448).size == (800, 600)  # factor 1200 // 448 = 2
    assert open_rgb(png, draft_size=100).size == (134, 100)  # factor 12, sides rounded up


# --------------------------------------------------------------------------
# Manifest


def _manifest(path: Path, lines: list[str]) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_manifest_rows_and_refusals(tmp_path):
    root = tmp_path / "images"
    save(smooth_photo(1), root / "x/one.jpg")
    save(smooth_photo(2), root / "x/two.png")
    save(smooth_photo(3), tmp_path / "secret.jpg")  # outside the root
    (root / "x/link.jpg").symlink_to(tmp_path / "secret.jpg")
    manifest = _manifest(
        root / "list.csv",
        [
            "path,brand,source,category,posted_at",
            "x/one.jpg,Alpha,Consumer,snacks,2024-05-01",
            "x/two.png,Beta,owned,,",
            "x/missing.jpg,Alpha,consumer,,",
            "../secret.jpg,Alpha,consumer,,",
            f"{tmp_path / 'secret.jpg'},Alpha,consumer,,",
            "x/link.jpg,Alpha,consumer,,",
            "x/one.jpg,Alpha,owned,,",
            "x/two.png,,owned,,",
            "x/two.png,Beta,press,,",
            "x/two.png,Beta",
            "",
            "x,Alpha,owned,,",
        ],
    )
    table = collect_images(manifest=manifest, categories={"Beta": "drinks"}, progress=False)
    assert len(table) == 11
    statuses = table["status"].tolist()
    assert statuses == [
        "ok",
        "ok",
        "missing",
        "outside_root",
        "outside_root",
        "outside_root",
        "bad_row",
        "bad_row",
        "bad_row",
        "bad_row",
        "bad_row",
    ]
    one, two = table.iloc[0], table.iloc[1]
    assert (one["brand"], one["source"], one["category"], one["posted_at"]) == (
        "Alpha",
        "consumer",
        "snacks",
        "2024-05-01",
    )
    assert two["category"] == "drinks"  # from the study's [brands] when the column is empty
    assert one["relpath"] == "x/one.jpg"
    reasons = table["reason"].tolist()
    assert "line 4" in reasons[2] and "does not exist" in reasons[2]
    assert all("outside the images root" in r for r in reasons[3:6])
    assert "already listed on line 2" in reasons[6]
    assert "brand is empty" in reasons[7]
    assert "'press'" in reasons[8]
    assert "2 fields" in reasons[9]
    assert "folder" in reasons[10]
    assert table["image_id"].is_unique
    assert table.loc[3:5, "sha256"].eq("").all()  # refused files are never read


def test_manifest_with_a_declared_root(tmp_path):
    root = tmp_path / "images"
    save(smooth_photo(1), root / "one.jpg")
    manifest = _manifest(tmp_path / "lists/m.csv", ["path,brand,source", "one.jpg,Alpha,owned"])
    table = collect_images(root=root, manifest=manifest, progress=False)
    assert table["status"].tolist() == ["ok"]
    # Without a declared root, paths are relative to the manifest's folder.
    table = collect_images(manifest=manifest, progress=False)
    assert table["status"].tolist() == ["missing"]


def test_manifest_columns_are_checked(tmp_path):
    bad = _manifest(tmp_path / "a.csv", ["path,brand", "a.jpg,Alpha"])
    with pytest.raises(CollectError, match=r"a\.csv.*lacks column\(s\) source"):
        collect_images(manifest=bad, progress=False)
    typo = _manifest(tmp_path / "b.csv", ["path,brand,source,catgory", "a.jpg,Alpha,owned,x"])
    with pytest.raises(CollectError, match="unknown column.*catgory"):
        collect_images(manifest=typo, progress=False)
    with pytest.raises(FileNotFoundError):
        collect_images(manifest=tmp_path / "none.csv", progress=False)
    # A spreadsheet's byte-order mark and capitalised header are fine.
    save(smooth_photo(1), tmp_path / "a.jpg")
    (tmp_path / "c.csv").write_text("\ufeffPath,Brand,Source\na.jpg,Alpha,owned\n", encoding="utf-8")
    assert collect_images(manifest=tmp_path / "c.csv", progress=False)["status"].tolist() == ["ok"]


def test_study_images_use_the_study_settings(tmp_path):
    from explore.study import study_from_dict

    save(smooth_photo(1), tmp_path / "photos/Alpha/owned/a.jpg")
    study = study_from_dict(
        {"images": {"root": "photos"}, "brands": {"Alpha": "snacks"}}, tmp_path / "s.toml"
    )
    table = collect.collect_study_images(study, progress=False)
    assert table[["brand", "category", "source", "status"]].values.tolist() == [
        ["Alpha", "snacks", "owned", "ok"]
    ]


def test_banded_near_duplicate_search_equals_all_pairs():
    # Reference: the definition, every earlier hash compared bit by bit.
    def first_close_earlier(values, max_bits):
        return [
            next((j for j in range(i) if bin(int(values[i]) ^ int(values[j])).count("1") <= max_bits), -1)
            for i in range(len(values))
        ]

    rng = np.random.default_rng(1)
    base = rng.integers(0, 2**63, 200, dtype=np.int64).astype(np.uint64)
    values = np.concatenate(
        [
            base,
            base[:60] ^ np.uint64(0b10110),  # 3 bits apart
            base[:30] ^ np.uint64((1 << 63) | (1 << 31) | (1 << 9) | (1 << 2) | 1),  # 5 bits apart
            np.zeros(100, np.uint64),  # a large group of equal hashes (flat images)
            np.uint64(1) << np.arange(60, dtype=np.uint64),  # one bit from zero
        ]
    )
    rng.shuffle(values)
    for max_bits in (0, 3, 4, 5):
        got = collect.near_duplicate_partners(values, max_bits)
        assert got.tolist() == first_close_earlier(values, max_bits), max_bits


def test_nearest_owned_hash_search_equals_its_definition():
    # Reference: for each query, every target compared bit by bit; the smallest
    # distance within max_bits wins, ties to the lowest target index.
    def nearest(queries, targets, max_bits):
        out = []
        for q in queries:
            dist = [bin(int(q) ^ int(t)).count("1") for t in targets]
            best = min(((d, j) for j, d in enumerate(dist) if d <= max_bits), default=None)
            out.append(best[::-1] if best else (-1, -1))
        return out

    rng = np.random.default_rng(2)
    targets = rng.integers(0, 2**63, 120, dtype=np.int64).astype(np.uint64)
    targets = np.concatenate([targets, targets[:10] ^ np.uint64(0b11), np.zeros(5, np.uint64)])  # ties
    queries = np.concatenate(
        [
            targets[:40] ^ np.uint64(0b10110),  # 3 bits from a target (and 1 or 5 from its copy)
            rng.integers(0, 2**63, 40, dtype=np.int64).astype(np.uint64),  # mostly far from all
            np.uint64(1) << np.arange(20, dtype=np.uint64),  # one bit from the zeros
        ]
    )
    for max_bits in (0, 2, 3, 14):
        index, bits = collect.nearest_partners(queries, targets, max_bits)
        assert list(zip(index.tolist(), bits.tolist())) == nearest(queries, targets, max_bits), max_bits
    assert [a.tolist() for a in collect.nearest_partners(queries[:3], targets[:0], 14)] == [[-1] * 3, [-1] * 3]


def outside_photo(name: str) -> Image.Image:
    """A scikit-image sample photo (skimage.data; outside data, not generated here)."""
    data = pytest.importorskip("skimage.data")
    return Image.fromarray(getattr(data, name)()).convert("RGB")


def reshared(image: Image.Image, path: Path, scale: float = 0.75, quality: int = 60) -> Path:
    """What a platform does to a re-shared photo: resized and recompressed at a lower JPEG quality."""
    w, h = image.size
    return save(image.resize((round(w * scale), round(h * scale)), Image.Resampling.LANCZOS), path, quality=quality)


def test_near_copies_of_owned_photos_are_proposed_within_the_brand_only(tmp_path):
    """Originals: scikit-image's astronaut and chelsea photos. Alpha owns the
    astronaut, Beta the cat. A resized, recompressed astronaut in Alpha's consumer
    set is proposed as a near-copy of Alpha's photo (a repost only once the image
    vectors confirm it, tests/test_duplicates.py); the same kind of copy of Beta's
    cat is proposed in Beta's consumer set and not in Alpha's."""
    root = tmp_path / "photos"
    launch = save(outside_photo("astronaut"), root / "Alpha/owned/launch.jpg", quality=92)
    reshared(outside_photo("astronaut"), root / "Alpha/consumer/fan_copy.jpg")
    shutil.copy(launch, root / "Alpha/consumer/fan_same_file.jpg")
    save(outside_photo("chelsea"), root / "Beta/owned/cat.jpg", quality=92)
    reshared(outside_photo("chelsea"), root / "Alpha/consumer/beta_cat.jpg")
    reshared(outside_photo("chelsea"), root / "Beta/consumer/cat_copy.jpg")
    for reposts in ("exclude", "keep"):
        table = collect_images(root, progress=False, reposts=reposts)
        launch_id = row(table, "Alpha/owned/launch.jpg")["image_id"]
        copy = row(table, "Alpha/consumer/fan_copy.jpg")
        assert copy["status"] == "ok" and copy["repost_of"] == ""  # not yet: the vectors decide
        assert copy["near_repost_of"] == launch_id and 0 <= copy["near_repost_bits"] <= collect.NEAR_DUPLICATE_BITS
        same = row(table, "Alpha/consumer/fan_same_file.jpg")  # exact reposts stay as they were
        assert same["status"] == ("repost" if reposts == "exclude" else "ok") and same["repost_of"] == launch_id
        assert same["near_repost_of"] == "" and same["near_repost_bits"] == -1
        assert row(table, "Alpha/consumer/beta_cat.jpg")["near_repost_of"] == ""  # Beta's photo, not Alpha's
        cat = row(table, "Beta/consumer/cat_copy.jpg")
        assert cat["near_repost_of"] == row(table, "Beta/owned/cat.jpg")["image_id"]
        assert (table.loc[table["source"] == "owned", "near_repost_of"] == "").all()
    text = summarise(table)
    assert "1 consumer photo(s) of 1 brand(s) are reposts of the brand's own photos (1 same file, 0 near-copies" in text
    assert "2 consumer photo(s) proposed by the content hash as near-copies" in text
    # Before the vectors confirm anything, the per-brand summary holds the exact repost only.
    report = collect.repost_summary(table)
    assert report[["brand", "reposts", "same_file", "near_copies"]].to_dict("records") == [
        dict(brand="Alpha", reposts=1, same_file=1, near_copies=0)
    ]


def test_documents_beside_the_brand_folders_are_not_images(tmp_path):
    # `explore init photos/` writes photos/study.toml; a manifest or notes may sit
    # there too. Those are not listed; a document deeper in the tree still is.
    root = tmp_path / "photos"
    save(smooth_photo(1), root / "Alpha/consumer/a.jpg")
    (root / "study.toml").write_text('name = "x"\n', encoding="utf-8")
    (root / "notes.txt").write_text("shot in spring\n", encoding="utf-8")
    (root / "Alpha/consumer/caption.txt").write_text("hello\n", encoding="utf-8")
    table = collect_images(root, progress=False)
    assert dict(zip(table["relpath"], table["status"])) == {
        "Alpha/consumer/a.jpg": "ok",
        "Alpha/consumer/caption.txt": "not_image",
    }


# --------------------------------------------------------------------------
# Posters and extra columns


def test_manifest_keeps_poster_and_extra_columns_and_parses_posted_at(tmp_path):
    for i in range(3):
        save(smooth_photo(i + 1), tmp_path / f"p{i}.jpg")
    manifest = _manifest(
        tmp_path / "m.csv",
        [
            "path,brand,source,poster,posted_at,Likes,campaign",
            "p0.jpg,Alpha,consumer,@ann,2024-05-01T14:30:00+02:00,12,spring",
            "p1.jpg,Alpha,consumer,,2024-05-02,,",
            "p2.jpg,Alpha,owned,alpha_official,,7,",
        ],
    )
    table = collect_images(manifest=manifest, progress=False)
    assert table["poster"].tolist() == ["@ann", "", "alpha_official"]
    assert table["posted_at"].tolist() == ["2024-05-01T14:30:00+02:00", "2024-05-02", ""]
    assert table["likes"].tolist() == ["12", "", "7"] and table["campaign"].tolist() == ["spring", "", ""]
    assert list(table.columns[-2:]) == ["likes", "campaign"]  # extras after the standard columns


def test_bad_posted_at_and_clashing_columns_are_named(tmp_path):
    save(smooth_photo(1), tmp_path / "a.jpg")
    bad = _manifest(tmp_path / "d.csv", ["path,brand,source,posted_at", "a.jpg,A,owned,03/04/2024", "a.jpg,A,owned,"])
    with pytest.raises(CollectError, match=r"d\.csv.*ISO 8601.*line 2 \('03/04/2024'\)"):
        collect_images(manifest=bad, progress=False)
    clash = _manifest(tmp_path / "e.csv", ["path,brand,source,status", "a.jpg,A,owned,x"])
    with pytest.raises(CollectError, match="'status' would overwrite"):
        collect_images(manifest=clash, progress=False)
    typo = _manifest(tmp_path / "f.csv", ["path,brand,source,postr", "a.jpg,A,owned,x"])
    with pytest.raises(CollectError, match="postr.*did you mean 'poster'"):
        collect_images(manifest=typo, progress=False)


def test_folder_sidecar_adds_posters_and_refuses_unknown_paths(tmp_path):
    root = tmp_path / "photos"
    save(smooth_photo(1), root / "Alpha/consumer/a.jpg")
    save(smooth_photo(2), root / "Alpha/consumer/b.jpg")
    save(smooth_photo(3), root / "Alpha/owned/c.jpg")
    side = _manifest(tmp_path / "posters.csv", ["path,poster,posted_at,region", "Alpha/consumer/a.jpg,@ann,2024-01-02,north"])
    table = collect_images(root=root, metadata=side, progress=False)
    assert table["poster"].tolist() == ["@ann", "", ""]
    assert table["region"].tolist() == ["north", "", ""] and table["posted_at"].tolist()[0] == "2024-01-02"
    wrong = _manifest(tmp_path / "w.csv", ["path,poster", "Alpha/consumer/zz.jpg,@bob"])
    with pytest.raises(CollectError, match=r"w\.csv.*line 2 \('Alpha/consumer/zz.jpg'\)"):
        collect_images(root=root, metadata=wrong, progress=False)
    brand = _manifest(tmp_path / "b.csv", ["path,brand", "Alpha/consumer/a.jpg,Beta"])
    with pytest.raises(CollectError, match="'brand' is not allowed"):
        collect_images(root=root, metadata=brand, progress=False)


def test_photos_per_poster_cap_is_seeded_and_keeps_rows(tmp_path):
    root = tmp_path / "photos"
    lines = ["path,poster"]
    for i in range(6):
        save(smooth_photo(10 + i), root / f"Alpha/consumer/{i}.jpg")
        lines.append(f"Alpha/consumer/{i}.jpg,{'@ann' if i < 5 else '@bob'}")
    side = _manifest(tmp_path / "posters.csv", lines)
    first = collect_images(root=root, metadata=side, max_per_poster=2, seed=4, progress=False)
    again = collect_images(root=root, metadata=side, max_per_poster=2, seed=4, progress=False)
    assert len(first) == 6  # nothing dropped from the table
    assert (first["status"] == "over_poster_cap").sum() == 3
    assert first.loc[first["poster"] == "@ann", "status"].eq("ok").sum() == 2
    assert first.loc[first["poster"] == "@bob", "status"].tolist() == ["ok"]
    assert first["status"].tolist() == again["status"].tolist()  # seeded
    assert "max_per_poster = 2" in first.loc[first["status"] == "over_poster_cap", "reason"].iloc[0]


def test_study_keys_for_posters_reach_collect(tmp_path):
    from explore.collect import collect_study_images
    from explore.study import StudyError, study_from_dict

    root = tmp_path / "photos"
    lines = ["path,poster"]
    for i in range(4):
        save(smooth_photo(30 + i), root / f"Alpha/consumer/{i}.jpg")
        lines.append(f"Alpha/consumer/{i}.jpg,@ann")
    _manifest(tmp_path / "posters.csv", lines)
    raw = {"images": {"root": "photos", "metadata": "posters.csv", "max_per_poster": 3}, "seed": 2}
    study = study_from_dict(raw, tmp_path / "study.toml")
    table = collect_study_images(study, progress=False)
    assert table["poster"].eq("@ann").all() and (table["status"] == "over_poster_cap").sum() == 1
    with pytest.raises(StudyError, match="max_per_poster"):
        study_from_dict({"images": {"root": "photos", "max_per_poster": -1}}, tmp_path / "study.toml")
    with pytest.raises(StudyError, match="exclude each other"):
        study_from_dict({"images": {"manifest": "m.csv", "metadata": "posters.csv"}}, tmp_path / "study.toml")


def test_headers_of_manifest_sidecar_and_survey_are_case_insensitive(tmp_path):
    # One rule for every CSV a user writes by hand (as the labels file): header names are
    # matched whatever their case and surrounding spaces.
    from PIL import Image

    from explore.compare import read_survey

    for rel in ("Alba/consumer/a.jpg", "Alba/owned/b.jpg"):
        (tmp_path / rel).parent.mkdir(parents=True, exist_ok=True)
        Image.new("RGB", (40, 30), (200, 30, 30) if "a.jpg" in rel else (30, 30, 200)).save(tmp_path / rel)
    manifest = tmp_path / "manifest.csv"
    manifest.write_text(" PATH ,Brand,SOURCE,Poster,Posted_At\nAlba/consumer/a.jpg,Alba,consumer,p1,2024-05-01\n"
                        "Alba/owned/b.jpg,Alba,owned,p2,2024-05-02\n", encoding="utf-8")
    table = collect_images(manifest=manifest, progress=False).set_index("relpath")
    assert (table["status"] == "ok").all() and table.loc["Alba/consumer/a.jpg", "poster"] == "p1"
    assert table.loc["Alba/owned/b.jpg", "posted_at"].startswith("2024-05-02")

    side = tmp_path / "posters.csv"
    side.write_text("Path,POSTER\nAlba/consumer/a.jpg,p9\n", encoding="utf-8")
    tree = collect_images(root=tmp_path, metadata=side, progress=False, exclude=(manifest, side)).set_index("relpath")
    assert tree.loc["Alba/consumer/a.jpg", "poster"] == "p9"

    survey = tmp_path / "survey.csv"
    survey.write_text("Brand , ATTRIBUTE,Score\nAlba,rugged,4.5\n", encoding="utf-8")
    read = read_survey(survey)
    assert read.loc[0, "brand"] == "Alba" and read.loc[0, "attribute"] == "rugged" and read.loc[0, "score"] == 4.5

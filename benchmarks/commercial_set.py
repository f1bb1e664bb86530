"""The outside labelled set for the commercial-post flag (never the demo).

Name: "outside-commercial-v1". Built on the fly, seeded, from images on this
machine that are not ours:

positives (label 1)
- product shots: Debian ``openclipart-png`` clip art (food/beverages,
  food/fruit, recreation/sports, household) composited, centred, on a plain
  white or light colour;
- screenshots: text from Debian documentation files (``/usr/share/doc/*/copyright``)
  rendered by PIL in DejaVu Sans on white, like a page of a text window;
- adverts: an openclipart object plus a large headline and lines of copy
  from the same documentation text on a plain colour.

negatives (label 0)
- photo crops: random crops (45-100 % of the shorter side) of scikit-image's
  colour sample photos (``PHOTOS``);
- objects in photos: openclipart objects pasted onto such photo crops.

``build(n_per_kind)`` returns (PIL images, labels, kinds).
"""

from __future__ import annotations

import random
from pathlib import Path

import numpy as np

NAME = "outside-commercial-v1"
CLIPART = Path("/usr/share/openclipart/png")
CLIP_FOLDERS = ("food/beverages", "food/fruit", "recreation/sports", "household")
DOCS = Path("/usr/share/doc")
FONT = "/usr/share/fonts/truetype/dejavu/DejaVuSans.ttf"
PHOTOS = ("astronaut.png", "chelsea.png", "coffee.png", "rocket.jpg", "motorcycle_left.png", "hubble_deep_field.jpg")
SIZE = (320, 320)


def _clipart(rng: random.Random, n: int) -> list[Path]:
    files = []
    for folder in CLIP_FOLDERS:
        files += sorted((CLIPART / folder).rglob("*.png"))
    rng.shuffle(files)
    return files[:n]


def _doc_lines(rng: random.Random, n_files: int) -> list[list[str]]:
    files = sorted(DOCS.glob("*/copyright"))
    rng.shuffle(files)
    out = []
    for f in files:
        try:
            lines = [l.rstrip()[:60] for l in f.read_text(errors="replace").splitlines() if l.strip()]
        except OSError:
            continue
        if len(lines) >= 12:
            out.append(lines)
        if len(out) == n_files:
            break
    return out


def _photos():
    import skimage.data as data
    from PIL import Image

    out = []
    for name in PHOTOS:  # the files shipped inside scikit-image's data folder
        with Image.open(Path(data.__file__).parent / name) as im:
            a = np.asarray(im.convert("RGB"))
        if a.ndim == 3 and a.shape[2] >= 3:
            out.append(a[..., :3].astype(np.uint8))
    return out


def _crop(rng: random.Random, photos):
    from PIL import Image

    a = photos[rng.randrange(len(photos))]
    h, w = a.shape[:2]
    side = rng.randint(int(0.45 * min(h, w)), min(h, w))
    y, x = rng.randint(0, h - side), rng.randint(0, w - side)
    return Image.fromarray(a[y:y + side, x:x + side]).resize(SIZE)


def _paste(base, clip_path: Path, scale: float):
    from PIL import Image

    with Image.open(clip_path) as im:
        art = im.convert("RGBA")
    art.thumbnail((int(SIZE[0] * scale), int(SIZE[1] * scale)))
    x, y = (SIZE[0] - art.width) // 2, (SIZE[1] - art.height) // 2
    base = base.convert("RGBA")
    base.alpha_composite(art, (x, y))
    return base.convert("RGB")


def build(n_per_kind: int = 24, seed: int = 16):
    """(images, labels, kinds): ``n_per_kind`` of each of the five kinds, seeded."""
    from PIL import Image, ImageDraw, ImageFont

    rng = random.Random(seed)
    clips = _clipart(rng, 3 * n_per_kind)
    docs = _doc_lines(rng, 2 * n_per_kind)
    photos = _photos()
    font = ImageFont.truetype(FONT, 13)
    big = ImageFont.truetype(FONT, 34)
    images, labels, kinds = [], [], []

    def add(im, label, kind):
        images.append(im)
        labels.append(label)
        kinds.append(kind)

    for k in range(n_per_kind):
        colour = rng.choice([(255, 255, 255), (245, 245, 245), (236, 240, 246), (250, 244, 232)])
        add(_paste(Image.new("RGB", SIZE, colour), clips[k], 0.8), 1, "product on plain background")
    for k in range(n_per_kind):
        im = Image.new("RGB", SIZE, (255, 255, 255))
        d = ImageDraw.Draw(im)
        d.rectangle([0, 0, SIZE[0], 22], fill=(222, 224, 228))
        for j, line in enumerate(docs[k][:18]):
            d.text((8, 28 + 16 * j), line, fill=(20, 20, 20), font=font)
        add(im, 1, "screenshot of text")
    for k in range(n_per_kind):
        colour = rng.choice([(250, 214, 60), (220, 50, 60), (40, 90, 200), (30, 160, 110)])
        im = _paste(Image.new("RGB", SIZE, colour), clips[n_per_kind + k], 0.45)
        d = ImageDraw.Draw(im)
        words = " ".join(docs[n_per_kind + k][0].split()[:2])[:14].upper()
        d.text((12, 10), words, fill=(255, 255, 255), font=big)
        for j, line in enumerate(docs[n_per_kind + k][1:5]):
            d.text((12, 250 + 16 * j), line[:44], fill=(255, 255, 255), font=font)
        add(im, 1, "text-heavy advert")
    for _ in range(n_per_kind):
        add(_crop(rng, photos), 0, "photo crop")
    for k in range(n_per_kind):
        add(_paste(_crop(rng, photos), clips[2 * n_per_kind + k], 0.5), 0, "object in a photo")
    return images, np.asarray(labels), kinds


def halves(kinds, seed: int = 16) -> tuple[np.ndarray, np.ndarray]:
    """A seeded split into a fit half and a check half, stratified by kind."""
    kinds = np.asarray(kinds)
    rng = np.random.default_rng(seed)
    fit = np.zeros(len(kinds), bool)
    for value in dict.fromkeys(kinds):
        idx = np.flatnonzero(kinds == value)
        rng.shuffle(idx)
        fit[idx[: len(idx) // 2]] = True
    return fit, ~fit

"""The outside labelled set for the commercial-post flag (never the demo).

Name: "outside-commercial-v2". Built on the fly from pinned sources only: every
file it reads is named below (a missing one is an error, never a silent
change), every list is sorted, every choice comes from one seeded
``random.Random``. Nothing depends on which other packages a machine has
(v1 drew its text from ``/usr/share/doc/*/copyright``, so installing an
unrelated package changed the set).

Sources (all openly licensed; read at build time, nothing is copied into the repo)
- text: the licence texts in ``/usr/share/common-licenses`` (Debian
  ``base-files``, on every Debian system): the 14 regular files in
  ``LICENCE_FILES``. A text item is a run of consecutive words at a seeded
  offset of a seeded file, so each file gives many chunks. Words naming an
  organisation or a web address (``BANNED``) are removed first.
- product objects: Debian ``openclipart-png`` (public domain): the PNGs under
  ``CLIP_FOLDERS`` (food/beverages, food/fruit, food/desserts,
  food/breads_and_carbs), sorted, without the ones over ``CLIP_MAX_PIXELS``
  or with an opaque area under ``CLIP_MIN_SIDE`` px (237 remain); shuffled
  once and consumed in order, so no object appears twice (up to
  ``n_per_kind`` = 45; beyond that they are reused from the start).
- photos: scikit-image's shipped colour samples (``SKIMAGE_PHOTOS``, the
  astronaut is the only person); Debian ``mate-backgrounds`` (GPL-2+), the 12
  nature photographs of ``MATE_PHOTOS``; Debian ``lomiri-wallpapers-16.04``
  (CC-BY-4.0, CC-BY-SA-4.0, CC0-1.0), the 13 photographs of
  ``LOMIRI_PHOTOS`` (its two abstract renders left out). Generic scenery,
  plants, food, objects, animals; no people, no logos.
- fonts: Debian ``fonts-dejavu-core`` (DejaVu Sans, Sans Bold, Serif, Sans Mono).
- words that are not licence text (``ADJECTIVES``, ``NOUNS``, ``HEADLINES``,
  ``BUTTONS``) are generic and listed here; no brand names.

Kinds (``n_per_kind`` of each, 320 px on the long side)
positives (label 1)
- "product on plain background": an object centred (jittered) on a plain
  light colour, sometimes with a soft shadow;
- "shop listing": a shop page on white: a single listing (object on a light
  tile, title, price, star rating, button, licence words as description), a
  2 x 2 grid of listings, or a row listing (object left, text right);
- "screenshot of text": licence text in a light or dark text window, a phone
  page with a coloured header, or a phone chat of licence sentences;
- "text-heavy advert": an object, a headline (``HEADLINES``) and licence copy
  on a saturated colour or two-colour gradient, sometimes a price badge;
- "meme": a photo crop with an outlined upper-case caption top and bottom,
  or a white caption band above a photo.
negatives (label 0)
- "photo crop": a crop (45-100 % of the largest crop of a 1:1, 4:3 or 3:4 shape);
- "object in a photo": an object pasted at a seeded place into a photo crop;
- "photo with a small caption": a photo crop with a camera date stamp or a
  small sticker of two to four licence words;
- "photo padded to square": a landscape or portrait crop on a square of
  white, black, or a blurred copy of itself (how apps post non-square photos).

``build(n_per_kind, seed)`` returns (PIL images, labels, kinds, recipes); a
recipe names every choice and a digest of every source file behind an item, and
``fingerprint(recipes)`` digests them all (tests compare it with a recorded
value). ``halves(kinds)`` is the seeded fit/check split, stratified by kind.
The same photos appear in both halves (as different crops); the objects do not.
"""

from __future__ import annotations

import hashlib
import random
import warnings
from functools import lru_cache
from pathlib import Path

import numpy as np

NAME = "outside-commercial-v2"
SIZE = 320

LICENCES = Path("/usr/share/common-licenses")
LICENCE_FILES = ("Apache-2.0", "Artistic", "BSD", "CC0-1.0", "GFDL-1.2", "GFDL-1.3", "GPL-1", "GPL-2", "GPL-3",
                 "LGPL-2", "LGPL-2.1", "LGPL-3", "MPL-1.1", "MPL-2.0")
#: Substrings (lower case) whose words are dropped from the licence texts: organisations, addresses.
BANNED = ("apache", "mozilla", "netscape", "perl", "gnu", "foundation", "fsf", "http", "www", "@", ".org", ".com",
          "stallman")

CLIPART = Path("/usr/share/openclipart/png")
CLIP_FOLDERS = ("food/beverages", "food/breads_and_carbs", "food/desserts", "food/fruit")
CLIP_MAX_PIXELS = 4_000_000
CLIP_MIN_SIDE = 48

FONTS = Path("/usr/share/fonts/truetype/dejavu")
SANS, BOLD, SERIF, MONO = "DejaVuSans.ttf", "DejaVuSans-Bold.ttf", "DejaVuSerif.ttf", "DejaVuSansMono.ttf"

SKIMAGE_PHOTOS = ("astronaut.png", "chelsea.png", "coffee.png", "rocket.jpg", "motorcycle_left.png",
                  "hubble_deep_field.jpg")
MATE = Path("/usr/share/backgrounds/mate/nature")
MATE_PHOTOS = ("Aqua.jpg", "Blinds.jpg", "Dune.jpg", "FreshFlower.jpg", "Garden.jpg", "GreenMeadow.jpg",
               "LadyBird.jpg", "RainDrops.jpg", "Storm.jpg", "TwoWings.jpg", "Wood.jpg", "YellowFlower.jpg")
LOMIRI = Path("/usr/share/backgrounds")
LOMIRI_PHOTOS = ("Bridge_by_Sander_Klootwijk.jpg", "Dragonfly_by_Bolly.jpg", "Picture_0B_by_freespace.jpg",
                 "Picture_1A_by_freespace.jpg", "Wine_by_Jakkub_Mede.jpg", "aitzgorri_by_Aitzol_Berasategi.jpg",
                 "free_by_Peter_Nerlich.jpg", "friends_by_Aitzol_Berasategi.jpg", "greentock_by_Peter_Nerlich.jpg",
                 "life_by_Aitzol_Berasategi.jpg", "picosdeeuropa_by_Aitzol_Berasategi.jpg",
                 "seeding_by_Clements_Engelhardt.jpg", "sunset_by_Aitzol_Berasategi.jpg")
#: Debian packages the set needs beyond the project's Python environment (CI installs them).
DEBIAN_PACKAGES = {"base-files": LICENCES, "openclipart-png": CLIPART, "fonts-dejavu-core": FONTS,
                   "mate-backgrounds": MATE, "lomiri-wallpapers-16.04": LOMIRI / LOMIRI_PHOTOS[0]}

ADJECTIVES = ("Classic", "Fresh", "Organic", "Everyday", "Homemade", "Mini", "Family size", "Seasonal", "Light",
              "Large", "Set of 2", "Handmade")
NOUNS = {"food/beverages": ("drink", "cup", "bottle", "mug", "juice"),
         "food/breads_and_carbs": ("bread", "pastry", "bakery box", "snack"),
         "food/desserts": ("treat", "dessert", "sweets", "cake"),
         "food/fruit": ("fruit", "fruit box", "snack pack", "fruit bag")}
HEADLINES = ("SALE", "NEW", "-30 %", "FREE DELIVERY", "SUMMER OFFER", "LIMITED EDITION", "2 FOR 1", "BEST PRICE",
             "ONLY TODAY", "TRY IT NOW", "HALF PRICE", "JUST IN")
BUTTONS = ("Add to cart", "Buy now", "Add to basket", "Order")

POSITIVE_KINDS = ("product on plain background", "shop listing", "screenshot of text", "text-heavy advert", "meme")
NEGATIVE_KINDS = ("photo crop", "object in a photo", "photo with a small caption", "photo padded to square")
KINDS = POSITIVE_KINDS + NEGATIVE_KINDS


class SetUnavailable(RuntimeError):
    """A pinned source of the set is missing on this machine."""


def missing_sources() -> list[str]:
    """Debian packages (and scikit-image) whose files the set needs but that are not here."""
    out = [f"{pkg} ({path})" for pkg, path in DEBIAN_PACKAGES.items() if not Path(path).exists()]
    try:
        import skimage.data  # noqa: F401
    except ImportError:
        out.append("scikit-image")
    return out


@lru_cache(maxsize=None)
def _digest(path: str) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()[:10]


def _need(path: Path) -> Path:
    if not path.is_file():
        raise SetUnavailable(f"{NAME}: {path} is missing (needs: {', '.join(DEBIAN_PACKAGES)}, scikit-image)")
    return path


@lru_cache(maxsize=None)
def _font(name: str, size: int):
    from PIL import ImageFont

    return ImageFont.truetype(str(_need(FONTS / name)), size)


class _Text:
    """Licence words: runs of consecutive words at seeded offsets of seeded files."""

    def __init__(self):
        self.words = {}
        for name in LICENCE_FILES:
            text = _need(LICENCES / name).read_text(encoding="utf-8", errors="replace")
            words = [w for w in text.split() if not any(b in w.lower() for b in BANNED)]
            self.words[name] = [w for w in words if any(c.isalpha() for c in w) or w.isdigit()]

    def run(self, rng: random.Random, n: int) -> tuple[str, str]:
        name = rng.choice(LICENCE_FILES)
        words = self.words[name]
        start = rng.randrange(len(words) - n)
        text = " ".join(words[start:start + n])
        return text, f"{name}@{start}+{n}:{_digest(str(LICENCES / name))}"


@lru_cache(maxsize=1)
def _clips() -> tuple[tuple[str, Path], ...]:
    from PIL import Image

    out = []
    for folder in CLIP_FOLDERS:
        for path in sorted((CLIPART / folder).rglob("*.png")):
            with warnings.catch_warnings():  # a few are huge: only their header is read, then they are skipped
                warnings.simplefilter("ignore", Image.DecompressionBombWarning)
                with Image.open(path) as im:
                    if im.size[0] * im.size[1] > CLIP_MAX_PIXELS:
                        continue
                    box = im.convert("RGBA").getchannel("A").getbbox()
            if box and min(box[2] - box[0], box[3] - box[1]) >= CLIP_MIN_SIDE:
                out.append((folder, path))
    if not out:
        raise SetUnavailable(f"{NAME}: no clip art under {CLIPART} (Debian openclipart-png)")
    return tuple(out)


@lru_cache(maxsize=None)
def _clip_image(path: str):
    from PIL import Image

    with Image.open(path) as im:
        art = im.convert("RGBA")
    return art.crop(art.getchannel("A").getbbox())


@lru_cache(maxsize=1)
def _photos() -> tuple[tuple[str, object], ...]:
    """(label, RGB image at most 1024 px on the long side) of every pinned photo, in order (read-only)."""
    import skimage.data as data
    from PIL import Image

    files = [("scikit-image", Path(data.__file__).parent / n) for n in SKIMAGE_PHOTOS]
    files += [("mate-backgrounds", MATE / n) for n in MATE_PHOTOS]
    files += [("lomiri-wallpapers-16.04", LOMIRI / n) for n in LOMIRI_PHOTOS]
    out = []
    for source, path in files:
        with Image.open(_need(path)) as im:
            im.draft("RGB", (1024, 1024))
            rgb = im.convert("RGB")
        rgb.thumbnail((1024, 1024))
        out.append((f"{source}/{path.name}:{_digest(str(path))}", rgb))
    return tuple(out)


class _Builder:
    def __init__(self, seed: int):
        self.rng = random.Random(seed)
        self.text = _Text()
        clips = list(_clips())
        self.rng.shuffle(clips)
        self.clips = clips
        self.next_clip = 0
        self.photos = _photos()

    # sources ------------------------------------------------------------
    def clip(self):
        folder, path = self.clips[self.next_clip % len(self.clips)]
        self.next_clip += 1
        rel = path.relative_to(CLIPART)
        return folder, _clip_image(str(path)), f"clip={rel}:{_digest(str(path))}"

    def words(self, n: int):
        return self.text.run(self.rng, n)

    def crop(self, aspect=(1, 1), long_side=SIZE):
        """A seeded crop of a seeded photo with width:height ``aspect``, resized to ``long_side``."""
        rng = self.rng
        k = rng.randrange(len(self.photos))
        label, photo = self.photos[k]
        w, h = photo.size
        ax, ay = aspect
        scale = min(w / ax, h / ay)
        frac = rng.uniform(0.45, 1.0)
        cw, ch = max(8, int(ax * scale * frac)), max(8, int(ay * scale * frac))
        x, y = rng.randint(0, w - cw), rng.randint(0, h - ch)
        out = (long_side, round(long_side * ay / ax)) if ax >= ay else (round(long_side * ax / ay), long_side)
        im = photo.crop((x, y, x + cw, y + ch)).resize(out)
        return im, f"photo={label}[{x},{y},{cw},{ch}]"

    # drawing helpers ----------------------------------------------------
    @staticmethod
    def paste(base, art, box_w, box_h, cx, cy):
        """Paste ``art`` scaled to fit ``box_w`` x ``box_h``, centred at (cx, cy)."""
        art = art.copy()
        art.thumbnail((max(1, int(box_w)), max(1, int(box_h))))
        base = base.convert("RGBA")
        base.alpha_composite(art, (int(cx - art.width / 2), int(cy - art.height / 2)))
        return base.convert("RGB"), art.size

    @staticmethod
    def wrap(draw, text, font, width):
        lines, line = [], ""
        for word in text.split():
            trial = f"{line} {word}".strip()
            if line and draw.textlength(trial, font=font) > width:
                lines.append(line)
                line = word
            else:
                line = trial
        return lines + ([line] if line else [])

    # positives ----------------------------------------------------------
    def product(self):
        from PIL import Image, ImageDraw, ImageFilter

        rng = self.rng
        size = rng.choice([(SIZE, SIZE), (256, SIZE)])
        colour = rng.choice([(255, 255, 255), (246, 246, 246), (236, 240, 246), (250, 244, 232), (252, 236, 238),
                             (232, 244, 236)])
        scale = rng.uniform(0.55, 0.85)
        cx = size[0] * (0.5 + rng.uniform(-0.05, 0.05))
        cy = size[1] * (0.5 + rng.uniform(-0.05, 0.05))
        shadow = rng.random() < 0.5
        _, art, rec = self.clip()
        im = Image.new("RGB", size, colour)
        if shadow:
            d = ImageDraw.Draw(im)
            half = scale * min(size) / 2
            d.ellipse([cx - half * 0.8, cy + half * 0.8, cx + half * 0.8, cy + half * 1.0],
                      fill=tuple(int(c * 0.82) for c in colour))
            im = im.filter(ImageFilter.GaussianBlur(6))
        im, _ = self.paste(im, art, scale * size[0], scale * size[1], cx, cy)
        return im, f"{rec}|bg={colour}|scale={scale:.3f}|shadow={shadow}"

    def _title_price(self, folder):
        rng = self.rng
        title = f"{rng.choice(ADJECTIVES)} {rng.choice(NOUNS[folder])}"
        whole, cents = rng.randint(1, 89), rng.choice(["99", "49", "95", "00", "50"])
        currency = rng.choice(["$", "€", "£"])
        price = f"{currency}{whole}.{cents}" if currency != "€" else f"{whole},{cents} €"
        return title, price

    def shop_listing(self):
        from PIL import Image, ImageDraw

        rng = self.rng
        layout = rng.choice(["single", "grid", "row"])
        accent = rng.choice([(230, 120, 30), (40, 110, 200), (30, 150, 100), (200, 50, 80), (40, 40, 40)])
        recs = [f"layout={layout}", f"accent={accent}"]
        if layout == "single":
            w, h = 256, SIZE
            im = Image.new("RGB", (w, h), "white")
            d = ImageDraw.Draw(im)
            d.rectangle([0, 0, w, 26], fill=(244, 244, 246))
            d.rounded_rectangle([34, 5, w - 10, 21], radius=7, outline=(200, 200, 204), fill="white")
            for j in range(3):
                d.line([8, 8 + 5 * j, 24, 8 + 5 * j], fill=(90, 90, 90), width=2)
            d.rectangle([10, 34, w - 10, 184], fill=rng.choice([(246, 246, 246), (255, 255, 255), (240, 242, 245)]))
            folder, art, rec = self.clip()
            recs.append(rec)
            im, _ = self.paste(im, art, w - 50, 130, w / 2, 109)
            d = ImageDraw.Draw(im)
            title, price = self._title_price(folder)
            d.text((12, 190), title, fill=(20, 20, 20), font=_font(BOLD, 15))
            stars = rng.randint(3, 5)
            d.text((12, 210), "★" * stars + "☆" * (5 - stars) + f"  ({rng.randint(3, 480)})", fill=(240, 160, 20),
                   font=_font(SANS, 12))
            d.text((12, 228), price, fill=(20, 20, 20), font=_font(BOLD, 18))
            text, trec = self.words(rng.randint(8, 14))
            recs.append(trec)
            for j, line in enumerate(self.wrap(d, text, _font(SANS, 10), w - 24)[:2]):
                d.text((12, 252 + 13 * j), line, fill=(110, 110, 110), font=_font(SANS, 10))
            d.rounded_rectangle([12, 284, w - 12, 310], radius=6, fill=accent)
            label = rng.choice(BUTTONS)
            tw = d.textlength(label, font=_font(BOLD, 13))
            d.text(((w - tw) / 2, 290), label, fill="white", font=_font(BOLD, 13))
        elif layout == "grid":
            w, h = SIZE, SIZE
            im = Image.new("RGB", (w, h), "white")
            d = ImageDraw.Draw(im)
            d.rectangle([0, 0, w, 24], fill=accent)
            text, trec = self.words(rng.randint(2, 3))
            recs.append(trec)
            d.text((10, 5), text[:30], fill="white", font=_font(BOLD, 12))
            for j in range(4):
                x0, y0 = 8 + (j % 2) * 156, 32 + (j // 2) * 144
                d.rectangle([x0, y0, x0 + 148, y0 + 96], fill=(245, 245, 245))
                folder, art, rec = self.clip()
                recs.append(rec)
                im, _ = self.paste(im, art, 120, 82, x0 + 74, y0 + 48)
                d = ImageDraw.Draw(im)
                title, price = self._title_price(folder)
                d.text((x0 + 2, y0 + 100), title, fill=(30, 30, 30), font=_font(SANS, 11))
                d.text((x0 + 2, y0 + 116), price, fill=(20, 20, 20), font=_font(BOLD, 13))
        else:
            w, h = SIZE, 240
            im = Image.new("RGB", (w, h), "white")
            d = ImageDraw.Draw(im)
            d.rectangle([10, 20, 150, 200], fill=(246, 246, 246))
            folder, art, rec = self.clip()
            recs.append(rec)
            im, _ = self.paste(im, art, 120, 150, 80, 110)
            d = ImageDraw.Draw(im)
            title, price = self._title_price(folder)
            for j, line in enumerate(self.wrap(d, title, _font(BOLD, 15), 150)[:2]):
                d.text((162, 22 + 19 * j), line, fill=(20, 20, 20), font=_font(BOLD, 15))
            d.text((162, 66), price, fill=accent, font=_font(BOLD, 20))
            text, trec = self.words(rng.randint(12, 20))
            recs.append(trec)
            for j, line in enumerate(self.wrap(d, text, _font(SANS, 10), 150)[:5]):
                d.text((162, 96 + 13 * j), line, fill=(100, 100, 100), font=_font(SANS, 10))
            d.rounded_rectangle([162, 172, 306, 198], radius=5, fill=accent)
            d.text((172, 178), rng.choice(BUTTONS), fill="white", font=_font(BOLD, 12))
        return im, "|".join(recs)

    def screenshot(self):
        from PIL import Image, ImageDraw

        rng = self.rng
        variant = rng.choice(["light window", "dark window", "phone page", "phone chat"])
        recs = [f"variant={variant}"]
        if variant in ("light window", "dark window"):
            bg, fg, bar = (((255, 255, 255), (20, 20, 20), (222, 224, 228)) if variant == "light window"
                           else ((30, 30, 34), (222, 222, 222), (52, 52, 58)))
            face = rng.choice([SANS, SERIF, MONO])
            size = rng.randint(11, 14)
            recs.append(f"font={face}/{size}")
            im = Image.new("RGB", (SIZE, SIZE), bg)
            d = ImageDraw.Draw(im)
            d.rectangle([0, 0, SIZE, 22], fill=bar)
            for j, c in enumerate([(236, 95, 90), (245, 190, 60), (98, 196, 84)]):
                d.ellipse([8 + 16 * j, 6, 18 + 16 * j, 16], fill=c)
            text, trec = self.words(rng.randint(110, 160))
            recs.append(trec)
            y = 30
            for line in self.wrap(d, text, _font(face, size), SIZE - 20):
                if y > SIZE - size - 4:
                    break
                d.text((10, y), line, fill=fg, font=_font(face, size))
                y += size + 4
        else:
            w, h = 180, SIZE
            im = Image.new("RGB", (w, h), "white")
            d = ImageDraw.Draw(im)
            header = rng.choice([(40, 110, 200), (30, 150, 100), (120, 60, 170), (245, 245, 247)])
            fg = "white" if header != (245, 245, 247) else (20, 20, 20)
            d.rectangle([0, 0, w, 14], fill=(0, 0, 0) if header != (245, 245, 247) else header)
            d.text((6, 1), f"{rng.randint(7, 22)}:{rng.randint(0, 59):02d}", fill="white" if fg == "white" else fg,
                   font=_font(BOLD, 10))
            d.rectangle([0, 14, w, 40], fill=header)
            title, trec = self.words(rng.randint(2, 3))
            recs.append(trec)
            d.text((10, 20), title[:24], fill=fg, font=_font(BOLD, 12))
            y = 48
            if variant == "phone page":
                text, trec = self.words(rng.randint(70, 100))
                recs.append(trec)
                for line in self.wrap(d, text, _font(SANS, 10), w - 16):
                    if y > h - 14:
                        break
                    d.text((8, y), line, fill=(30, 30, 30), font=_font(SANS, 10))
                    y += 13
            else:
                left = True
                while y < h - 40:
                    text, trec = self.words(rng.randint(4, 12))
                    recs.append(trec)
                    lines = self.wrap(d, text, _font(SANS, 10), 110)[:4]
                    bh = 13 * len(lines) + 8
                    x0 = 6 if left else w - 124
                    d.rounded_rectangle([x0, y, x0 + 118, y + bh], radius=7,
                                        fill=(233, 233, 235) if left else (0, 122, 255))
                    for j, line in enumerate(lines):
                        d.text((x0 + 5, y + 4 + 13 * j), line, fill=(20, 20, 20) if left else "white",
                               font=_font(SANS, 10))
                    y += bh + 8
                    left = not left if rng.random() < 0.8 else left
        return im, "|".join(recs)

    def advert(self):
        from PIL import Image, ImageDraw

        rng = self.rng
        size = rng.choice([(SIZE, SIZE), (256, SIZE)])
        c1 = rng.choice([(250, 214, 60), (220, 50, 60), (40, 90, 200), (30, 160, 110), (240, 120, 40), (120, 60, 170)])
        c2 = rng.choice([c1, (30, 30, 40), (250, 250, 250), (255, 170, 190)])
        im = Image.new("RGB", size, c1)
        if c2 != c1:
            a = np.linspace(0, 1, size[1])[:, None, None]
            grad = (1 - a) * np.asarray(c1, float) + a * np.asarray(c2, float)
            im = Image.fromarray(np.repeat(grad, size[0], axis=1).astype(np.uint8))
        light = sum(c1) > 560
        ink = (25, 25, 25) if light else (255, 255, 255)
        copy_ink = (25, 25, 25) if sum(c2) > 560 else (255, 255, 255)
        _, art, rec = self.clip()
        scale = rng.uniform(0.38, 0.55)
        cx = size[0] * rng.choice([0.5, 0.62, 0.38])
        im, _ = self.paste(im, art, scale * size[0], scale * size[1], cx, size[1] * 0.52)
        d = ImageDraw.Draw(im)
        headline = rng.choice(HEADLINES)
        fs = 40
        while fs > 16 and d.textlength(headline, font=_font(BOLD, fs)) > size[0] - 24:
            fs -= 2
        d.text((12, 10), headline, fill=ink, font=_font(BOLD, fs))
        text, trec = self.words(rng.randint(12, 24))
        y = size[1] - 74
        for line in self.wrap(d, text, _font(SANS, 12), size[0] - 24)[:4]:
            d.text((12, y), line, fill=copy_ink, font=_font(SANS, 12))
            y += 16
        badge = rng.random() < 0.5
        if badge:
            r = 30
            bx, by = size[0] - r - 10, 10 + fs + r
            d.ellipse([bx - r, by - r, bx + r, by + r], fill=(255, 255, 255) if not light else (220, 40, 50))
            label = f"-{rng.choice([10, 20, 25, 30, 50])}%"
            tw = d.textlength(label, font=_font(BOLD, 16))
            d.text((bx - tw / 2, by - 10), label, fill=(220, 40, 50) if not light else "white", font=_font(BOLD, 16))
        return im, f"{rec}|bg={c1}->{c2}|scale={scale:.3f}|headline={headline}|{trec}|badge={badge}"

    def meme(self):
        from PIL import Image, ImageDraw

        rng = self.rng
        variant = rng.choice(["outlined", "band"])
        if variant == "outlined":
            im, prec = self.crop(rng.choice([(1, 1), (4, 5)]))
            d = ImageDraw.Draw(im)
            recs = [prec]
            for where in ("top", "bottom"):
                text, trec = self.words(rng.randint(3, 7))
                recs.append(trec)
                text = text.upper()
                fs = 30
                while fs > 14 and len(self.wrap(d, text, _font(BOLD, fs), im.width - 16)) > 2:
                    fs -= 2
                lines = self.wrap(d, text, _font(BOLD, fs), im.width - 16)[:2]
                y = 6 if where == "top" else im.height - 8 - (fs + 4) * len(lines)
                for line in lines:
                    tw = d.textlength(line, font=_font(BOLD, fs))
                    d.text(((im.width - tw) / 2, y), line, fill="white", font=_font(BOLD, fs),
                           stroke_width=2, stroke_fill="black")
                    y += fs + 4
            return im, f"variant={variant}|" + "|".join(recs)
        photo, prec = self.crop(rng.choice([(1, 1), (4, 3)]))
        text, trec = self.words(rng.randint(6, 16))
        probe = ImageDraw.Draw(photo)
        lines = self.wrap(probe, text, _font(SANS, 16), SIZE - 20)[:3]
        band = 14 + 21 * len(lines)
        im = Image.new("RGB", (SIZE, photo.height + band), "white")
        im.paste(photo, (0, band))
        d = ImageDraw.Draw(im)
        for j, line in enumerate(lines):
            d.text((10, 8 + 21 * j), line, fill=(10, 10, 10), font=_font(SANS, 16))
        return im, f"variant={variant}|{prec}|{trec}"

    # negatives ----------------------------------------------------------
    def photo_crop(self):
        im, rec = self.crop(self.rng.choice([(1, 1), (4, 3), (3, 4)]))
        return im, rec

    def object_in_photo(self):
        rng = self.rng
        im, prec = self.crop()
        _, art, rec = self.clip()
        scale = rng.uniform(0.3, 0.55)
        half = scale * SIZE / 2
        cx, cy = rng.uniform(half, SIZE - half), rng.uniform(half, SIZE - half)
        im, _ = self.paste(im, art, 2 * half, 2 * half, cx, cy)
        return im, f"{prec}|{rec}|scale={scale:.3f}|at=({cx:.0f},{cy:.0f})"

    def small_caption(self):
        from PIL import ImageDraw

        rng = self.rng
        im, prec = self.crop(rng.choice([(1, 1), (4, 3), (3, 4)]))
        d = ImageDraw.Draw(im)
        if rng.random() < 0.5:
            stamp = f"'{rng.randint(5, 24):02d} {rng.randint(1, 12):2d} {rng.randint(1, 28):2d}"
            fs = rng.randint(12, 15)
            tw = d.textlength(stamp, font=_font(MONO, fs))
            d.text((im.width - tw - 10, im.height - fs - 10), stamp, fill=(255, 150, 40), font=_font(MONO, fs))
            return im, f"{prec}|stamp={stamp}"
        text, trec = self.words(rng.randint(2, 4))
        fs = 12
        tw = d.textlength(text, font=_font(BOLD, fs))
        if tw > im.width - 30:
            text = text[: max(4, int(len(text) * (im.width - 30) / tw))]
            tw = d.textlength(text, font=_font(BOLD, fs))
        x = rng.uniform(8, max(9, im.width - tw - 20))
        y = rng.uniform(8, im.height - 30)
        d.rounded_rectangle([x, y, x + tw + 12, y + fs + 10], radius=6, fill=(255, 255, 255))
        d.text((x + 6, y + 4), text, fill=(20, 20, 20), font=_font(BOLD, fs))
        return im, f"{prec}|sticker={trec}@({x:.0f},{y:.0f})"

    def padded(self):
        from PIL import Image, ImageFilter

        rng = self.rng
        aspect = rng.choice([(3, 2), (16, 9), (2, 3), (9, 16)])
        fill = rng.choice(["white", "black", "blurred"])
        photo, prec = self.crop(aspect)
        if fill == "blurred":
            side = max(photo.size)
            im = photo.resize((side, side)).filter(ImageFilter.GaussianBlur(14))
        else:
            im = Image.new("RGB", (SIZE, SIZE), (255, 255, 255) if fill == "white" else (0, 0, 0))
        im.paste(photo, ((SIZE - photo.width) // 2, (SIZE - photo.height) // 2))
        return im, f"{prec}|aspect={aspect}|fill={fill}"


def build(n_per_kind: int = 40, seed: int = 16):
    """(images, labels, kinds, recipes): ``n_per_kind`` of each kind in ``KINDS``, seeded.

    Raises ``SetUnavailable`` naming the missing source when a pinned file is not here.
    """
    missing = missing_sources()
    if missing:
        raise SetUnavailable(f"{NAME} needs {', '.join(missing)}")
    b = _Builder(seed)
    makers = {"product on plain background": b.product, "shop listing": b.shop_listing,
              "screenshot of text": b.screenshot, "text-heavy advert": b.advert, "meme": b.meme,
              "photo crop": b.photo_crop, "object in a photo": b.object_in_photo,
              "photo with a small caption": b.small_caption, "photo padded to square": b.padded}
    images, labels, kinds, recipes = [], [], [], []
    for kind in KINDS:
        for _ in range(n_per_kind):
            im, recipe = makers[kind]()
            images.append(im)
            labels.append(int(kind in POSITIVE_KINDS))
            kinds.append(kind)
            recipes.append(f"{kind}|{recipe}")
    return images, np.asarray(labels), kinds, recipes


def fingerprint(recipes) -> str:
    """A short digest of the recipes (every choice and every source file's digest)."""
    return hashlib.sha256("\n".join(recipes).encode()).hexdigest()[:16]


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

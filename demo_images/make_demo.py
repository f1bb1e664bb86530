"""Generate the demo scenario: six invented brands photographed in seven usage contexts.

Every picture is a composite made here: a procedurally drawn scene (beach,
mountain camp, night party, breakfast table, gym, office desk, candlelit
dinner), public-domain clip art props from Debian's ``openclipart-png`` package
chosen per context, and the brand's product (a drink can or a jacket) drawn by
this script in the brand's invented colours with its invented name.

The structure the tool should find is planted on purpose and written next to
the images:

- ``manifest.csv``       path, brand, source, category, posted_at
- ``truth_images.csv``   per image: the planted context and attribute levels
- ``truth_brands.csv``   per brand: signature contexts, the unexpected context,
                         the consumer-vs-owned difference, attribute directions
- ``survey.csv``         invented survey scores (agree for all brands but one)

Regenerate (needs ``apt-get install -y openclipart-png`` and Pillow + numpy)::

    python demo_images/make_demo.py            # writes into demo_images/

The run is seeded (``SEED``) and deterministic: the same packages give the same
bytes.
"""

from __future__ import annotations

import argparse
import csv
import math
import shutil
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter, ImageFont

SEED = 20261201
CLIPART = Path("/usr/share/openclipart/png")
HERE = Path(__file__).resolve().parent
WIDTH, HEIGHT = 256, 192  # landscape; portrait images swap these
SUPER = 2  # draw at twice the size, then downsample (anti-aliasing)

CONTEXTS = ["beach", "mountain_camp", "night_party", "breakfast", "gym", "office_desk", "candlelit_dinner"]

# --------------------------------------------------------------------------
# Brands: invented names, colours and product shapes.

BRANDS = {
    # drinks (cans)
    "Fizzwick": dict(category="drinks", kind="can", shape="standard",
                     body=(246, 214, 48), accent=(96, 190, 60), text=(40, 90, 30)),
    "Orvella": dict(category="drinks", kind="can", shape="slim",
                    body=(92, 34, 86), accent=(214, 176, 92), text=(240, 220, 170)),
    "Kraggo": dict(category="drinks", kind="can", shape="stubby",
                   body=(44, 46, 50), accent=(240, 120, 30), text=(250, 250, 245)),
    # apparel (jackets)
    "Tundrel": dict(category="apparel", kind="jacket", shape="parka",
                    body=(104, 112, 58), accent=(196, 160, 110), text=(245, 240, 220)),
    "Velmire": dict(category="apparel", kind="jacket", shape="coat",
                    body=(34, 44, 88), accent=(232, 222, 200), text=(232, 222, 200)),
    "Saltrun": dict(category="apparel", kind="jacket", shape="shell",
                    body=(30, 160, 160), accent=(250, 110, 90), text=(255, 255, 255)),
}

# Planted number of images per brand, source and context (45 per brand x source).
# Order of each list follows CONTEXTS.
COUNTS = {
    ("Fizzwick", "consumer"): [13, 1, 15, 5, 4, 5, 2],
    ("Fizzwick", "owned"):    [14, 1, 14, 5, 4, 5, 2],
    ("Orvella", "consumer"):  [3, 1, 6, 13, 2, 5, 15],
    ("Orvella", "owned"):     [2, 0, 5, 13, 1, 5, 19],
    ("Kraggo", "consumer"):   [3, 20, 5, 1, 6, 8, 2],
    ("Kraggo", "owned"):      [3, 4, 7, 2, 22, 5, 2],
    ("Tundrel", "consumer"):  [5, 24, 1, 2, 6, 5, 2],
    ("Tundrel", "owned"):     [4, 26, 1, 1, 6, 5, 2],
    ("Velmire", "consumer"):  [5, 6, 4, 4, 3, 20, 3],
    ("Velmire", "owned"):     [4, 5, 4, 3, 3, 23, 3],
    ("Saltrun", "consumer"):  [16, 7, 2, 2, 14, 3, 1],
    ("Saltrun", "owned"):     [15, 6, 2, 1, 17, 3, 1],
}

# --------------------------------------------------------------------------
# Scenes: procedural backgrounds. Palettes are shared between scenes (walls,
# tables, skies) and every image gets its own lighting, so that colour alone
# does not tell the context.

WALLS = [(214, 206, 190), (170, 186, 196), (120, 132, 120), (196, 160, 140), (90, 96, 118),
         (236, 232, 222), (150, 120, 110), (128, 150, 170), (60, 64, 72), (200, 190, 150)]
TABLES = [(150, 106, 70), (196, 160, 118), (110, 74, 50), (226, 222, 214), (128, 130, 134),
          (176, 60, 60), (52, 60, 92), (236, 236, 236), (92, 70, 56)]
SKIES_DAY = [((92, 150, 220), (190, 220, 245)), ((120, 170, 230), (220, 232, 240)),
             ((150, 160, 175), (210, 212, 215))]
SKIES_DUSK = [((60, 60, 120), (240, 150, 90)), ((40, 50, 100), (220, 120, 120)),
              ((30, 30, 60), (120, 90, 140))]


def _lerp(a, b, t):
    a = np.asarray(a, np.float32)
    b = np.asarray(b, np.float32)
    return a + (b - a) * np.asarray(t, np.float32)[..., None]


def _jitter(rng, colour, amount=18):
    return tuple(int(np.clip(c + rng.integers(-amount, amount + 1), 0, 255)) for c in colour)


def _vertical_gradient(h, w, top, bottom):
    t = np.linspace(0, 1, h, dtype=np.float32)[:, None].repeat(w, 1)
    return _lerp(top, bottom, t)


def _noise(rng, h, w, scale, amount):
    """Smooth value noise: random grid upsampled, for textures of sand, floor, wood."""
    gh, gw = max(2, h // scale), max(2, w // scale)
    grid = rng.normal(0, 1, (gh, gw)).astype(np.float32)
    img = Image.fromarray(grid).resize((w, h), Image.BICUBIC)
    return np.asarray(img, np.float32)[..., None] * amount


def _sky(rng, h, w):
    top, bottom = (SKIES_DAY + SKIES_DUSK)[rng.integers(0, len(SKIES_DAY) + len(SKIES_DUSK))]
    arr = _vertical_gradient(h, w, _jitter(rng, top), _jitter(rng, bottom))
    # a few soft clouds
    img = Image.fromarray(arr.clip(0, 255).astype(np.uint8))
    d = ImageDraw.Draw(img, "RGBA")
    for _ in range(rng.integers(0, 5)):
        cx, cy = rng.integers(0, w), rng.integers(0, h // 2 + 1)
        for _ in range(4):
            r = rng.integers(w // 30, w // 12)
            ox, oy = rng.integers(-r, r + 1), rng.integers(-r // 2, r // 2 + 1)
            d.ellipse([cx + ox - r * 2, cy + oy - r, cx + ox + r * 2, cy + oy + r], fill=(255, 255, 255, 70))
    img = img.filter(ImageFilter.GaussianBlur(w / 120))
    return np.asarray(img, np.float32)


def scene_beach(rng, h, w):
    horizon = int(h * rng.uniform(0.3, 0.5))
    shore = horizon + int(h * rng.uniform(0.12, 0.25))
    arr = _sky(rng, h, w)
    sea_top = _jitter(rng, rng.choice([(40, 110, 160), (30, 130, 150), (60, 100, 130)]), 20)
    sea = _vertical_gradient(shore - horizon, w, sea_top, _jitter(rng, (90, 170, 180), 20))
    yy = np.arange(shore - horizon)[:, None]
    xx = np.arange(w)[None, :]
    waves = np.sin(xx / w * rng.uniform(20, 50) + yy * rng.uniform(0.4, 0.9)) * 10
    arr[horizon:shore] = sea + waves[..., None]
    sand = _jitter(rng, rng.choice([(222, 200, 150), (210, 186, 140), (236, 220, 180)]), 15)
    arr[shore:] = _vertical_gradient(h - shore, w, sand, _jitter(rng, sand, 25)) + _noise(rng, h - shore, w, 6, 10)
    # foam line
    foam = (np.sin(np.arange(w) / w * rng.uniform(10, 25)) * h * 0.01 + shore).astype(int)
    for x in range(w):
        arr[max(0, foam[x] - 2):foam[x] + 3, x] = (245, 245, 240)
    return arr, shore


def scene_mountain(rng, h, w):
    ground = int(h * rng.uniform(0.55, 0.72))
    arr = _sky(rng, h, w)
    img = Image.fromarray(arr.clip(0, 255).astype(np.uint8))
    d = ImageDraw.Draw(img)
    for layer in range(3):
        base = ground - int(h * 0.05 * (2 - layer))
        peak = int(h * rng.uniform(0.12, 0.35) + layer * h * 0.08)
        tone = _jitter(rng, [(120, 130, 150), (100, 100, 110), (90, 84, 78)][layer], 15)
        pts = [(0, base)]
        x = 0
        while x < w:
            x += rng.integers(w // 14, w // 5)
            hi = base - h // 12
            y = rng.integers(min(peak, hi - 1), hi)
            pts.append((x, y))
            if layer == 0 and rng.random() < 0.6:
                # snow caps on the far range
                d.polygon([(x - w // 30, y + h // 25), (x, y), (x + w // 30, y + h // 25)], fill=(240, 240, 245))
        pts += [(w, base), (w, h), (0, h)]
        d.polygon(pts, fill=tone)
    arr = np.asarray(img, np.float32).copy()
    grass = _jitter(rng, rng.choice([(96, 120, 60), (120, 110, 70), (80, 100, 70), (140, 130, 100)]), 15)
    arr[ground:] = _vertical_gradient(h - ground, w, grass, _jitter(rng, grass, 30)) + _noise(rng, h - ground, w, 5, 14)
    # scattered stones on the ground
    img = Image.fromarray(arr.clip(0, 255).astype(np.uint8))
    d = ImageDraw.Draw(img)
    for _ in range(rng.integers(3, 9)):
        cx, cy = rng.integers(0, w), rng.integers(ground, h)
        r = rng.integers(w // 60, w // 25)
        g = int(rng.integers(90, 160))
        d.ellipse([cx - r, cy - r // 2, cx + r, cy + r // 2], fill=(g, g - 4, g - 10))
    return np.asarray(img, np.float32), ground


def _room(rng, h, w, wall, floor_y, table):
    arr = _vertical_gradient(h, w, _jitter(rng, wall), _jitter(rng, wall, 30))
    arr[floor_y:] = _vertical_gradient(h - floor_y, w, _jitter(rng, table), _jitter(rng, table, 25))
    return arr


def _wood(rng, arr, top):
    h, w = arr.shape[:2]
    yy = np.arange(h - top)[:, None]
    xx = np.arange(w)[None, :]
    grain = np.sin(xx / w * rng.uniform(30, 60) + np.sin(yy / 9.0) * 2) * 7
    arr[top:] += grain[..., None]
    return arr


def scene_party(rng, h, w):
    wall = _jitter(rng, (rng.integers(20, 70), rng.integers(20, 60), rng.integers(30, 90)), 10)
    floor_y = int(h * rng.uniform(0.68, 0.8))
    arr = _room(rng, h, w, wall, floor_y, _jitter(rng, (50, 40, 40), 15))
    img = Image.fromarray(arr.clip(0, 255).astype(np.uint8))
    d = ImageDraw.Draw(img, "RGBA")
    for _ in range(rng.integers(15, 40)):  # bokeh lights
        cx, cy = rng.integers(0, w), rng.integers(0, floor_y)
        r = rng.integers(w // 60, w // 18)
        col = tuple(int(c) for c in rng.integers(80, 256, 3)) + (int(rng.integers(60, 140)),)
        d.ellipse([cx - r, cy - r, cx + r, cy + r], fill=col)
    for _ in range(rng.integers(2, 5)):  # streamers
        y0 = rng.integers(0, h // 4)
        col = tuple(int(c) for c in rng.integers(100, 256, 3))
        pts = [(x, y0 + int(math.sin(x / w * 12) * h * 0.03)) for x in range(0, w + 1, w // 32)]
        d.line(pts, fill=col, width=max(2, w // 120))
    img = img.filter(ImageFilter.GaussianBlur(w / 400))
    return np.asarray(img, np.float32), floor_y


def scene_breakfast(rng, h, w):
    table_y = int(h * rng.uniform(0.35, 0.55))
    arr = _room(rng, h, w, WALLS[rng.integers(0, len(WALLS))], table_y, TABLES[rng.integers(0, len(TABLES))])
    if rng.random() < 0.5:
        arr = _wood(rng, arr, table_y)
    else:  # checked tablecloth
        yy, xx = np.mgrid[table_y:h, 0:w]
        cell = int(w / rng.uniform(10, 18))
        chk = ((yy // cell + xx // cell) % 2).astype(np.float32)
        arr[table_y:] = arr[table_y:] * (1 - 0.25 * chk[..., None]) + 40 * chk[..., None]
    img = Image.fromarray(arr.clip(0, 255).astype(np.uint8))
    d = ImageDraw.Draw(img, "RGBA")
    if rng.random() < 0.7:  # a bright window: morning light
        x0 = rng.integers(0, w // 2)
        d.rectangle([x0, h // 20, x0 + w // 3, table_y - h // 12], fill=(250, 245, 220, 200), outline=(255, 255, 255), width=4)
        d.line([x0 + w // 6, h // 20, x0 + w // 6, table_y - h // 12], fill=(255, 255, 255), width=4)
    return np.asarray(img, np.float32), table_y + (h - table_y) // 3


def scene_gym(rng, h, w):
    floor_y = int(h * rng.uniform(0.55, 0.7))
    arr = _room(rng, h, w, WALLS[rng.integers(0, len(WALLS))], floor_y, _jitter(rng, (60, 62, 66), 20))
    arr[floor_y:] += _noise(rng, h - floor_y, w, 2, 12)
    img = Image.fromarray(arr.clip(0, 255).astype(np.uint8))
    d = ImageDraw.Draw(img, "RGBA")
    # wall panels, a mirror strip and floor mat seams
    for x in range(0, w, int(w / rng.uniform(4, 7))):
        d.line([x, 0, x, floor_y], fill=(0, 0, 0, 40), width=3)
    if rng.random() < 0.6:
        y0 = int(h * rng.uniform(0.1, 0.2))
        d.rectangle([0, y0, w, floor_y - h // 10], fill=(200, 215, 225, 110))
    for x in range(0, w, w // 5):
        d.line([x, floor_y, x + (x - w // 2) // 2, h], fill=(30, 30, 30, 120), width=3)
    stripe = tuple(int(c) for c in rng.integers(60, 230, 3))
    d.rectangle([0, floor_y - h // 40, w, floor_y], fill=stripe)
    return np.asarray(img, np.float32), floor_y + (h - floor_y) // 3


def scene_office(rng, h, w):
    desk_y = int(h * rng.uniform(0.45, 0.62))
    arr = _room(rng, h, w, WALLS[rng.integers(0, len(WALLS))], desk_y, TABLES[rng.integers(0, len(TABLES))])
    if rng.random() < 0.4:
        arr = _wood(rng, arr, desk_y)
    img = Image.fromarray(arr.clip(0, 255).astype(np.uint8))
    d = ImageDraw.Draw(img, "RGBA")
    if rng.random() < 0.5:  # shelf with plain book spines
        y0 = int(h * rng.uniform(0.08, 0.2))
        x0 = rng.integers(0, w // 2)
        d.rectangle([x0, y0 + h // 8, x0 + w // 2, y0 + h // 8 + 5], fill=(90, 70, 50))
        x = x0
        while x < x0 + w // 2 - 8:
            bw = rng.integers(w // 60, w // 30)
            bh = rng.integers(h // 14, h // 8)
            col = tuple(int(c) for c in rng.integers(40, 220, 3))
            d.rectangle([x, y0 + h // 8 - bh, x + bw, y0 + h // 8], fill=col)
            x += bw + 1
    return np.asarray(img, np.float32), desk_y + (h - desk_y) // 3


def scene_dinner(rng, h, w):
    table_y = int(h * rng.uniform(0.45, 0.6))
    wall = _jitter(rng, (rng.integers(30, 90), rng.integers(20, 60), rng.integers(20, 60)), 10)
    cloth = TABLES[rng.integers(0, len(TABLES))]
    arr = _room(rng, h, w, wall, table_y, cloth)
    # warm candle glow
    cy, cx = rng.integers(int(h * 0.2), table_y), rng.integers(0, w)
    yy, xx = np.mgrid[0:h, 0:w]
    glow = np.exp(-(((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * (w * 0.25) ** 2)))
    arr = arr * (0.55 + 0.6 * glow[..., None]) + glow[..., None] * np.array([60, 35, 0], np.float32)
    return arr, table_y + (h - table_y) // 3


SCENES = {
    "beach": scene_beach,
    "mountain_camp": scene_mountain,
    "night_party": scene_party,
    "breakfast": scene_breakfast,
    "gym": scene_gym,
    "office_desk": scene_office,
    "candlelit_dinner": scene_dinner,
}


# --------------------------------------------------------------------------
# Products, drawn here in each brand's invented colours and shapes.

def _font(size):
    return ImageFont.load_default(size=max(6, int(size)))


def _cylinder_shading(w):
    """Brightness across a cylinder seen from the front (a highlight left of centre)."""
    x = np.linspace(-1, 1, w, dtype=np.float32)
    return 0.55 + 0.45 * np.sqrt(np.clip(1 - x ** 2, 0, 1)) + 0.25 * np.exp(-((x + 0.35) ** 2) / 0.02)


def draw_can(spec, name, height):
    ratio = {"standard": 0.52, "slim": 0.36, "stubby": 0.72}[spec["shape"]]
    h = int(height)
    w = max(8, int(h * ratio))
    body = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(body)
    rim = max(2, h // 14)
    d.rounded_rectangle([0, rim // 2, w - 1, h - 1], radius=max(2, w // 6), fill=spec["body"] + (255,))
    # brand band
    if spec["shape"] == "standard":  # a wave
        pts = [(x, int(h * 0.62 + math.sin(x / w * 2 * math.pi) * h * 0.06)) for x in range(0, w + 1)]
        d.polygon(pts + [(w, h), (0, h)], fill=spec["accent"] + (255,))
    elif spec["shape"] == "slim":  # thin gold rings
        for frac in (0.2, 0.24, 0.78, 0.82):
            y = int(h * frac)
            d.rectangle([0, y, w, y + max(1, h // 80)], fill=spec["accent"] + (255,))
    else:  # zigzag
        pts = []
        for i, x in enumerate(range(0, w + 1, max(2, w // 6))):
            pts.append((x, int(h * (0.55 if i % 2 else 0.68))))
        d.polygon(pts + [(w, h), (0, h)], fill=spec["accent"] + (255,))
    # name written along the can
    text = Image.new("RGBA", (h, w), (0, 0, 0, 0))
    td = ImageDraw.Draw(text)
    font = _font(min(w * 0.5, h * 0.8 / (0.62 * len(name))))
    td.text((h * 0.5, w * 0.5), name.upper(), font=font, fill=spec["text"] + (255,), anchor="mm")
    body.alpha_composite(text.rotate(90, expand=True).resize((w, h)))
    # cylinder shading
    arr = np.asarray(body, np.float32)
    arr[..., :3] *= _cylinder_shading(w)[None, :, None]
    body = Image.fromarray(arr.clip(0, 255).astype(np.uint8), "RGBA")
    d = ImageDraw.Draw(body)
    d.ellipse([0, 0, w - 1, rim * 2], fill=(196, 198, 202, 255), outline=(140, 142, 146, 255))
    d.ellipse([w // 3, rim // 2, w // 2, rim + rim // 2], fill=(120, 122, 126, 255))
    return body


def draw_jacket(spec, name, height):
    h = int(height)
    w = int(h * {"parka": 0.95, "coat": 0.8, "shell": 0.9}[spec["shape"]])
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    body, accent = spec["body"] + (255,), spec["accent"] + (255,)
    length = {"parka": 0.92, "coat": 1.0, "shell": 0.8}[spec["shape"]]
    sh = int(h * 0.16)  # shoulder line
    bottom = int(h * length) - 1
    cx = w // 2
    tw = int(w * 0.3)  # half torso width
    # sleeves (hanging down, slightly out)
    for side in (-1, 1):
        d.polygon([(cx + side * tw, sh), (cx + side * (w // 2 - 1), sh + h // 10),
                   (cx + side * (w // 2 - 1), int(bottom * 0.85)), (cx + side * (w // 2 - w // 7), int(bottom * 0.85)),
                   (cx + side * (tw - 2), sh + h // 4)], fill=body)
        d.rectangle([cx + side * (w // 2 - 1) - (side > 0) * (w // 7), int(bottom * 0.82),
                     cx + side * (w // 2 - 1) + (side < 0) * (w // 7), int(bottom * 0.87)], fill=accent)
    d.polygon([(cx - tw, sh), (cx + tw, sh), (cx + tw + w // 40, bottom), (cx - tw - w // 40, bottom)], fill=body)
    if spec["shape"] == "parka":  # hood and patch pockets
        d.ellipse([cx - tw // 1.4, 0, cx + tw // 1.4, sh * 2], fill=body, outline=accent, width=max(2, w // 40))
        for side in (-1, 1):
            x0 = cx + side * tw // 2
            d.rectangle([x0 - tw // 3, int(h * 0.58), x0 + tw // 3, int(h * 0.75)], outline=accent, width=max(2, w // 50))
    elif spec["shape"] == "coat":  # lapels and buttons
        d.polygon([(cx - tw // 2, sh - 2), (cx, int(h * 0.45)), (cx - tw // 2, int(h * 0.32))], fill=accent)
        d.polygon([(cx + tw // 2, sh - 2), (cx, int(h * 0.45)), (cx + tw // 2, int(h * 0.32))], fill=accent)
        for k in range(3):
            y = int(h * (0.52 + 0.12 * k))
            d.ellipse([cx - w // 50, y, cx + w // 50, y + w // 25], fill=accent)
    else:  # shell: chevron across the chest
        d.polygon([(cx - tw, int(h * 0.3)), (cx, int(h * 0.42)), (cx + tw, int(h * 0.3)),
                   (cx + tw, int(h * 0.38)), (cx, int(h * 0.5)), (cx - tw, int(h * 0.38))], fill=accent)
        d.rectangle([cx - tw // 1.6, sh - h // 20, cx + tw // 1.6, sh + 2], fill=accent)
    if spec["shape"] != "coat":  # zip
        d.line([cx, sh, cx, bottom], fill=(40, 40, 40, 255), width=max(1, w // 60))
    # name label on the chest
    font = _font(h * 0.075)
    d.text((cx - tw + 4, int(h * 0.2)), name.upper(), font=font, fill=spec["text"] + (255,))
    # soft shading: lighter left, darker right
    arr = np.asarray(img, np.float32)
    arr[..., :3] *= np.linspace(1.1, 0.75, w, dtype=np.float32)[None, :, None]
    return Image.fromarray(arr.clip(0, 255).astype(np.uint8), "RGBA")


def draw_product(brand, height):
    spec = BRANDS[brand]
    if spec["kind"] == "can":
        return draw_can(spec, brand, height)
    return draw_jacket(spec, brand, height)


# --------------------------------------------------------------------------
# Props drawn here (things the clip-art collection lacks). Each returns an
# RGBA image whose height is about ``size`` pixels.

def _shade(img, left=1.12, right=0.78):
    arr = np.asarray(img, np.float32).copy()
    arr[..., :3] *= np.linspace(left, right, arr.shape[1], dtype=np.float32)[None, :, None]
    return Image.fromarray(arr.clip(0, 255).astype(np.uint8), "RGBA")


def prop_tent(rng, size):
    w, h = int(size * 1.5), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    col = _jitter(rng, [(230, 120, 40), (60, 120, 70), (200, 60, 50), (60, 90, 160), (220, 190, 60)][rng.integers(0, 5)], 15)
    apex = (int(w * rng.uniform(0.4, 0.6)), int(h * 0.05))
    d.polygon([apex, (w - 2, h - 2), (2, h - 2)], fill=col + (255,))
    d.polygon([apex, (apex[0] + w // 10, h - 2), (apex[0] - w // 10, h - 2)], fill=(40, 30, 25, 255))
    d.line([apex, (2, h - 2)], fill=(30, 30, 30, 255), width=max(2, w // 60))
    d.line([apex, (w - 2, h - 2)], fill=(30, 30, 30, 255), width=max(2, w // 60))
    return _shade(img)


def prop_campfire(rng, size):
    w, h = int(size * 1.2), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    cx = w // 2
    for k in range(rng.integers(4, 8)):  # flames
        fw = rng.uniform(0.08, 0.2) * w
        fh = rng.uniform(0.4, 0.8) * h
        x = cx + rng.uniform(-0.2, 0.2) * w
        col = [(250, 200, 40), (245, 140, 30), (230, 80, 20)][k % 3]
        d.polygon([(x - fw, h * 0.8), (x + rng.uniform(-0.3, 0.3) * fw, h * 0.8 - fh), (x + fw, h * 0.8)], fill=col + (235,))
    for a in (-0.5, 0.5, 0.0):  # logs
        x0, x1 = cx - w * 0.4, cx + w * 0.4
        y0, y1 = h * (0.85 + a * 0.1), h * (0.85 - a * 0.1)
        d.line([(x0, y0), (x1, y1)], fill=(100, 64, 36, 255), width=max(3, h // 9))
        d.ellipse([x1 - h // 18, y1 - h // 18, x1 + h // 18, y1 + h // 18], fill=(190, 150, 100, 255))
    for _ in range(rng.integers(5, 9)):  # ring of stones
        x = rng.uniform(0.05, 0.95) * w
        r = rng.uniform(0.04, 0.07) * w
        g = int(rng.integers(100, 160))
        d.ellipse([x - r, h * 0.9 - r * 0.7, x + r, h * 0.9 + r * 0.7], fill=(g, g, g - 8, 255))
    return img


def prop_logs(rng, size):
    w, h = int(size * 1.6), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    r = h // 4
    rows = [(3, h - r), (2, h - 2 * r - r // 2), (1, h - 4 * r)]
    for n, y in rows:
        for i in range(n):
            x = w // 2 + int((i - (n - 1) / 2) * 2 * r * 1.05)
            d.ellipse([x - r, y - r, x + r, y + r], fill=(120, 80, 44, 255))
            d.ellipse([x - r * 0.75, y - r * 0.75, x + r * 0.75, y + r * 0.75], fill=(205, 165, 110, 255))
            d.ellipse([x - r * 0.3, y - r * 0.3, x + r * 0.3, y + r * 0.3], outline=(150, 110, 70, 255), width=2)
    return img


def prop_rock(rng, size):
    w, h = int(size * rng.uniform(1.2, 1.8)), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    n = 9
    pts = []
    for i in range(n):
        a = math.pi + i / (n - 1) * math.pi
        rx, ry = w / 2 * rng.uniform(0.8, 1.0), h * rng.uniform(0.75, 1.0)
        pts.append((w / 2 + math.cos(a) * rx, h - 1 + math.sin(a) * ry))
    g = int(rng.integers(95, 170))
    d.polygon(pts, fill=(g, g - 3, g - 10, 255))
    for _ in range(4):  # cracks and facets
        x = rng.uniform(0.2, 0.8) * w
        d.line([(x, h * rng.uniform(0.3, 0.6)), (x + rng.uniform(-0.2, 0.2) * w, h - 2)], fill=(g - 45, g - 45, g - 50, 255), width=2)
    return _shade(img, 1.25, 0.7)


def prop_dumbbell(rng, size):
    w, h = int(size * 2.2), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    col = [(40, 40, 44), (70, 70, 76), (150, 40, 40), (30, 70, 140)][rng.integers(0, 4)]
    d.rectangle([w * 0.1, h * 0.42, w * 0.9, h * 0.58], fill=(190, 190, 196, 255))
    for x0 in (0.04, 0.16, 0.74, 0.86):
        d.rounded_rectangle([w * x0, h * 0.05, w * (x0 + 0.1), h * 0.95], radius=h // 10, fill=col + (255,))
    return _shade(img, 1.3, 0.8)


def prop_barbell(rng, size):
    w, h = int(size * 3.6), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    d.rectangle([0, h * 0.46, w, h * 0.54], fill=(200, 200, 205, 255))
    for side in (0, 1):
        for k, frac in enumerate((1.0, 0.8, 0.6)):
            x = w * (0.08 + 0.05 * k) if side == 0 else w * (0.92 - 0.05 * k) - w * 0.04
            col = [(30, 30, 34), (170, 40, 40), (40, 90, 170)][rng.integers(0, 3)]
            d.rounded_rectangle([x, h * (0.5 - frac / 2), x + w * 0.04, h * (0.5 + frac / 2)], radius=4, fill=col + (255,))
    return _shade(img, 1.2, 0.85)


def prop_kettlebell(rng, size):
    w, h = int(size * 0.9), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    col = [(40, 40, 44), (200, 90, 30), (60, 130, 70), (90, 60, 140)][rng.integers(0, 4)]
    d.ellipse([w * 0.22, 0, w * 0.78, h * 0.55], outline=col + (255,), width=max(3, w // 9))
    d.ellipse([0, h * 0.3, w - 1, h - 1], fill=col + (255,))
    return _shade(img, 1.35, 0.7)


def prop_weight_plate(rng, size):
    s = int(size)
    img = Image.new("RGBA", (s, s), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    col = [(30, 30, 34), (170, 40, 40), (40, 90, 170), (220, 180, 40)][rng.integers(0, 4)]
    d.ellipse([0, 0, s - 1, s - 1], fill=col + (255,))
    d.ellipse([s * 0.12, s * 0.12, s * 0.88, s * 0.88], outline=(0, 0, 0, 90), width=max(2, s // 30))
    d.ellipse([s * 0.42, s * 0.42, s * 0.58, s * 0.58], fill=(210, 210, 215, 255))
    return _shade(img, 1.25, 0.75)


def prop_water_bottle(rng, size):
    w, h = int(size * 0.34), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    col = tuple(int(c) for c in rng.integers(40, 230, 3))
    d.rounded_rectangle([0, h * 0.18, w - 1, h - 1], radius=w // 4, fill=col + (255,))
    d.rectangle([w * 0.25, 0, w * 0.75, h * 0.2], fill=(40, 40, 40, 255))
    return _shade(img)


def prop_laptop(rng, size):
    w, h = int(size * 1.5), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    shell = [(190, 192, 196), (60, 62, 68), (150, 150, 156)][rng.integers(0, 3)]
    d.rounded_rectangle([w * 0.1, 0, w * 0.9, h * 0.68], radius=6, fill=shell + (255,))
    screen = [w * 0.13, h * 0.04, w * 0.87, h * 0.63]
    d.rectangle(screen, fill=_jitter(rng, (40, 90, 150), 40) + (255,))
    for _ in range(rng.integers(2, 5)):  # plain windows, no marks
        x0 = rng.uniform(screen[0], screen[2] - w * 0.2)
        y0 = rng.uniform(screen[1], screen[3] - h * 0.2)
        d.rectangle([x0, y0, x0 + w * rng.uniform(0.12, 0.3), y0 + h * rng.uniform(0.1, 0.25)], fill=(236, 236, 240, 255))
    d.polygon([(w * 0.06, h * 0.7), (w * 0.94, h * 0.7), (w, h - 1), (0, h - 1)], fill=shell + (255,))
    for r in range(4):  # keys
        y = h * (0.73 + r * 0.06)
        for c in range(12):
            x = w * (0.1 + c * 0.067) - r * w * 0.01
            d.rectangle([x, y, x + w * 0.05, y + h * 0.04], fill=(40, 40, 44, 255))
    return img


def prop_papers(rng, size):
    w, h = int(size * 1.3), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    for k in range(3):
        o = k * w * 0.04
        d.polygon([(o, h * 0.3 + o), (w * 0.75 + o, h * 0.2 + o), (w * 0.95, h * 0.8 + o * 0.2), (w * 0.2 + o, h * 0.95)],
                  fill=(248, 248, 244, 255), outline=(180, 180, 180, 255))
    for i in range(6):
        y = h * (0.4 + i * 0.07)
        d.line([(w * 0.3, y), (w * 0.75, y - h * 0.05)], fill=(120, 120, 130, 255), width=2)
    return img


def prop_candle(rng, size):
    w, h = int(size * 0.42), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    glow = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    gd = ImageDraw.Draw(glow)
    gd.ellipse([0, 0, w - 1, h * 0.45], fill=(255, 210, 120, 110))
    img.alpha_composite(glow.filter(ImageFilter.GaussianBlur(w / 6)))
    d = ImageDraw.Draw(img)
    col = [(245, 240, 225), (200, 40, 50), (240, 230, 200), (120, 30, 50)][rng.integers(0, 4)]
    d.rectangle([w * 0.32, h * 0.32, w * 0.68, h * 0.92], fill=col + (255,))
    d.rectangle([w * 0.15, h * 0.9, w * 0.85, h - 1], fill=(200, 170, 90, 255))  # holder
    d.polygon([(w * 0.42, h * 0.3), (w * 0.5, h * 0.08), (w * 0.58, h * 0.3)], fill=(255, 200, 60, 255))
    d.ellipse([w * 0.44, h * 0.2, w * 0.56, h * 0.31], fill=(255, 245, 200, 255))
    return _shade(img, 1.1, 0.85)


def prop_wine_glass(rng, size):
    w, h = int(size * 0.5), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    wine = [(120, 20, 40), (230, 210, 120), (200, 80, 90)][rng.integers(0, 3)]
    d.chord([0, -h * 0.1, w - 1, h * 0.55], 0, 180, fill=(230, 235, 240, 120), outline=(220, 225, 230, 255), width=2)
    d.chord([w * 0.06, h * 0.05, w * 0.94, h * 0.53], 0, 180, fill=wine + (235,))
    d.rectangle([w * 0.46, h * 0.52, w * 0.54, h * 0.92], fill=(225, 230, 235, 220))
    d.ellipse([w * 0.15, h * 0.9, w * 0.85, h - 1], fill=(225, 230, 235, 230))
    return img


def prop_cutlery(rng, size):
    w, h = int(size * 0.6), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    metal = (205, 208, 214, 255)
    d.rectangle([w * 0.18, h * 0.35, w * 0.26, h - 1], fill=metal)  # fork
    for k in range(4):
        x = w * (0.08 + k * 0.09)
        d.rectangle([x, 0, x + w * 0.04, h * 0.3], fill=metal)
    d.rectangle([w * 0.06, h * 0.28, w * 0.38, h * 0.36], fill=metal)
    d.rectangle([w * 0.7, h * 0.4, w * 0.78, h - 1], fill=metal)  # knife
    d.chord([w * 0.62, 0, w * 0.94, h * 0.8], 270, 90, fill=metal)
    return img


def prop_beach_umbrella(rng, size):
    w, h = int(size * 1.3), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    c1 = tuple(int(c) for c in rng.integers(120, 256, 3))
    c2 = (250, 250, 245)
    d.line([(w / 2, h * 0.2), (w / 2 + w * 0.05, h - 1)], fill=(120, 100, 80, 255), width=max(3, w // 40))
    n = 8
    for i in range(n):
        a0, a1 = 180 + i * 180 / n, 180 + (i + 1) * 180 / n
        d.pieslice([0, h * 0.02, w - 1, h * 0.6], a0, a1, fill=(c1 if i % 2 else c2) + (255,))
    return img


def prop_towel(rng, size):
    w, h = int(size * 1.8), int(size * 0.5)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    c1 = tuple(int(c) for c in rng.integers(60, 256, 3))
    d.polygon([(w * 0.1, 0), (w, h * 0.1), (w * 0.9, h - 1), (0, h * 0.85)], fill=c1 + (255,))
    for k in range(1, 5):
        d.line([(w * 0.1 + k * w * 0.16, h * 0.02 * k), (k * w * 0.17, h * 0.9)], fill=(255, 255, 255, 200), width=max(2, w // 40))
    return img


def prop_shell(rng, size):
    s = int(size)
    img = Image.new("RGBA", (s, s), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    col = _jitter(rng, (240, 200, 170), 20)
    if rng.random() < 0.5:  # starfish
        pts = []
        for i in range(10):
            r = s / 2 if i % 2 == 0 else s / 5
            a = -math.pi / 2 + i * math.pi / 5
            pts.append((s / 2 + math.cos(a) * r, s / 2 + math.sin(a) * r))
        d.polygon(pts, fill=_jitter(rng, (230, 120, 70), 20) + (255,))
    else:  # scallop
        d.pieslice([0, 0, s - 1, s * 1.6], 200, 340, fill=col + (255,))
        for k in range(6):
            a = math.radians(200 + k * 28)
            d.line([(s / 2, s * 0.8), (s / 2 + math.cos(a) * s / 2, s * 0.8 + math.sin(a) * s * 0.8)], fill=(200, 150, 120, 255), width=2)
    return img


def prop_pine(rng, size):
    w, h = int(size * 0.6), int(size)
    img = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(img)
    green = _jitter(rng, (40, 90, 50), 15)
    d.rectangle([w * 0.44, h * 0.8, w * 0.56, h - 1], fill=(90, 60, 40, 255))
    for k in range(4):
        top = h * (0.02 + k * 0.18)
        d.polygon([(w / 2, top), (w * (0.12 - k * 0.03) + w * 0.1, top + h * 0.32), (w * (0.88 + k * 0.03) - w * 0.1, top + h * 0.32)], fill=green + (255,))
    return _shade(img)


DRAWN = {
    "tent": prop_tent, "campfire": prop_campfire, "logs": prop_logs, "rock": prop_rock,
    "dumbbell": prop_dumbbell, "barbell": prop_barbell, "kettlebell": prop_kettlebell,
    "weight_plate": prop_weight_plate, "water_bottle": prop_water_bottle,
    "laptop": prop_laptop, "papers": prop_papers, "candle": prop_candle, "wine_glass": prop_wine_glass,
    "cutlery": prop_cutlery, "beach_umbrella": prop_beach_umbrella, "towel": prop_towel,
    "shell": prop_shell, "pine": prop_pine,
}


# --------------------------------------------------------------------------
# What each context holds: (kind, what, placement, height as a share of the
# image height). kind "clip" = openclipart-png file, "drawn" = DRAWN above.
# "ground" props stand on the floor/table/sand, "air" props float or hang.

PROPS = {
    "beach": [
        ("clip", "recreation/toys/beachball_v0.1.png", "ground", 0.28),
        ("clip", "recreation/toys/beach_ball_01.png", "ground", 0.28),
        ("clip", "recreation/toys/surfboard_davek_01.png", "ground", 0.7),
        ("clip", "plants/palmtree_b_r_kessels_.png", "ground", 0.8),
        ("clip", "buildings/furniture/sedia_e_ombrelloni_archi_01.png", "ground", 0.6),
        ("clip", "transportation/boating/boat_jarno_vasamaa_.png", "sea", 0.35),
        ("clip", "transportation/boating/sailboat_illustration.png", "sea", 0.4),
        ("clip", "tools/umbrella.png", "ground", 0.45),
        ("clip", "food/desserts/ice_cream_cone_linda_kim_01.png", "ground", 0.3),
        ("clip", "food/fruit/watermelon_james_kilfige_01.png", "ground", 0.22),
        ("clip", "food/fruit/pineapple.png", "ground", 0.32),
        ("clip", "transportation/anchor.png", "ground", 0.3),
        ("drawn", "beach_umbrella", "ground", 0.75),
        ("drawn", "beach_umbrella", "ground", 0.75),
        ("drawn", "towel", "ground", 0.25),
        ("drawn", "shell", "ground", 0.14),
    ],
    "mountain_camp": [
        ("clip", "unsorted/tenda_da_campeggio_archi_01.png", "ground", 0.5),
        ("clip", "unsorted/sacco_a_pelo_per_campeg_01.png", "ground", 0.4),
        ("clip", "unsorted/zaino_per_montagna.png", "ground", 0.42),
        ("clip", "tools/axe_peterm_.png", "ground", 0.35),
        ("clip", "food/meats_and_eggs/fuoco_da_campeggio_archi_01.png", "ground", 0.35),
        ("clip", "recreation/holiday/hiking_boot_jarno_vasama_.png", "ground", 0.25),
        ("clip", "tools/hurricane_lamp_ganson.png", "ground", 0.35),
        ("clip", "plants/trees/bowsaw_benji_park_01.png", "ground", 0.25),
        ("clip", "tools/bussola_architetto_franc_01.png", "ground", 0.2),
        ("clip", "recreation/sports/binoculars_vladimir_hern_01.png", "ground", 0.2),
        ("clip", "plants/mushroom.png", "ground", 0.18),
        ("drawn", "tent", "ground", 0.55),
        ("drawn", "tent", "ground", 0.55),
        ("drawn", "campfire", "ground", 0.4),
        ("drawn", "logs", "ground", 0.3),
        ("drawn", "rock", "ground", 0.3),
        ("drawn", "pine", "ground", 0.7),
    ],
    "night_party": [
        ("clip", "recreation/party/balloons_01.png", "air", 0.55),
        ("clip", "recreation/party/balloons-aj.png", "air", 0.55),
        ("clip", "recreation/party/balloon-red-aj.png", "air", 0.4),
        ("clip", "recreation/party/palloncini_architetto_fr_01.png", "air", 0.55),
        ("clip", "recreation/party/baloon1_01.png", "air", 0.4),
        ("clip", "recreation/party/birthday_cake.png", "ground", 0.35),
        ("clip", "recreation/party/pink_cake_gabrielle_now_r.png", "ground", 0.3),
        ("clip", "recreation/party/gateau_jean_victor_balin_.png", "ground", 0.32),
        ("clip", "recreation/party/pacco_regalo_architetto__01.png", "ground", 0.3),
        ("clip", "recreation/holiday/gift01.png", "ground", 0.28),
        ("clip", "recreation/holiday/gift03.png", "ground", 0.28),
        ("clip", "recreation/party/hat_01.png", "ground", 0.25),
        ("clip", "unsorted/festoni.png", "wall", 0.3),
        ("clip", "unsorted/ghirlande_festa.png", "wall", 0.35),
        ("clip", "recreation/music/boombox_linda_kim_01.png", "ground", 0.3),
        ("clip", "recreation/music/maracas_ganson.png", "ground", 0.28),
        ("clip", "recreation/music/electric_guitar_andrea__01r.png", "ground", 0.6),
    ],
    "breakfast": [
        ("clip", "food/breads_and_carbs/croissant_01.png", "ground", 0.2),
        ("clip", "food/breads_and_carbs/croissant_gerald_g._01.png", "ground", 0.22),
        ("clip", "food/breads_and_carbs/bread_01.png", "ground", 0.2),
        ("clip", "food/breads_and_carbs/muffin1.png", "ground", 0.25),
        ("clip", "food/breads_and_carbs/pancakes_berries.png", "ground", 0.3),
        ("clip", "food/breads_and_carbs/pancakes_ganson.png", "ground", 0.28),
        ("clip", "food/meats_and_eggs/fried_egg.png", "ground", 0.16),
        ("clip", "food/meats_and_eggs/fried_eggs.png", "ground", 0.16),
        ("clip", "food/meats_and_eggs/bacon_ganson.png", "ground", 0.15),
        ("clip", "food/beverages/coffee.png", "ground", 0.22),
        ("clip", "food/beverages/teacup_ganson.png", "ground", 0.24),
        ("clip", "food/beverages/a_teapot_01.png", "ground", 0.35),
        ("clip", "food/beverages/orange_juice_box.png", "ground", 0.35),
        ("clip", "food/beverages/milk_ganson.png", "ground", 0.35),
        ("clip", "food/juice_glass_andremarcel._01.png", "ground", 0.3),
        ("clip", "food/fruit/bananas_nicu_buculei_01.png", "ground", 0.2),
        ("clip", "food/fruit/orange.png", "ground", 0.18),
        ("clip", "food/fruit/apple.png", "ground", 0.18),
        ("clip", "food/dairy/cheese_01.png", "ground", 0.18),
        ("clip", "food/honey.png", "ground", 0.22),
        ("clip", "food/bowl_chaspo_.png", "ground", 0.22),
    ],
    "gym": [
        ("clip", "recreation/sports/tennis_shoes_jarno_vasam_.png", "ground", 0.22),
        ("clip", "recreation/sports/tennis_shoe_jarno_vasama_.png", "ground", 0.2),
        ("clip", "recreation/sports/soccer_ball_ganson.png", "ground", 0.22),
        ("clip", "recreation/sports/cronometro_mauro_olivo_01.png", "ground", 0.2),
        ("clip", "recreation/sports/tennis_racket_01.png", "ground", 0.4),
        ("clip", "recreation/sports/volley_ball_angelo_gelmi_01.png", "ground", 0.22),
        ("drawn", "dumbbell", "ground", 0.18),
        ("drawn", "dumbbell", "ground", 0.18),
        ("drawn", "barbell", "ground", 0.22),
        ("drawn", "barbell", "ground", 0.22),
        ("drawn", "kettlebell", "ground", 0.25),
        ("drawn", "kettlebell", "ground", 0.25),
        ("drawn", "weight_plate", "ground", 0.3),
        ("drawn", "water_bottle", "ground", 0.3),
        ("drawn", "towel", "ground", 0.2),
    ],
    "office_desk": [
        ("clip", "office/desk_lamp_gerald_g._01.png", "ground", 0.45),
        ("clip", "office/ballpoint_pen_jonathan_d_01.png", "ground", 0.08),
        ("clip", "office/calculator.png", "ground", 0.25),
        ("clip", "office/clipboard_01.png", "ground", 0.35),
        ("clip", "office/box_with_folders_nicu_bu_01.png", "ground", 0.3),
        ("clip", "office/cup_rollandin_francesco_.png", "ground", 0.2),
        ("clip", "office/clessidra_architetto_fra_01.png", "ground", 0.25),
        ("clip", "unsorted/pinzatrice_grigia.png", "ground", 0.2),
        ("clip", "unsorted/blocco_notes.png", "ground", 0.25),
        ("clip", "office/folder_01.png", "ground", 0.25),
        ("clip", "office/crayon.png", "ground", 0.2),
        ("clip", "office/calcolatrice_architetto__01.png", "ground", 0.25),
        ("clip", "buildings/furniture/poltrona_ufficio_archite_01.png", "ground", 0.6),
        ("drawn", "laptop", "ground", 0.4),
        ("drawn", "laptop", "ground", 0.4),
        ("drawn", "laptop", "ground", 0.4),
        ("drawn", "papers", "ground", 0.22),
    ],
    "candlelit_dinner": [
        ("clip", "food/beverages/alcohol/wine_glass_christian_h._.png", "ground", 0.35),
        ("clip", "food/beverages/alcohol/bottiglia_di_vino_pregi_01.png", "ground", 0.5),
        ("clip", "food/beverages/alcohol/cocktail_daniel_steele_r.png", "ground", 0.3),
        ("clip", "unsorted/candela.png", "ground", 0.45),
        ("clip", "food/large_plate.png", "ground", 0.18),
        ("clip", "food/small_plate.png", "ground", 0.15),
        ("clip", "plants/flowers/bouquet_of_flowers_01.png", "ground", 0.4),
        ("clip", "food/spaghetti_ganson.png", "ground", 0.2),
        ("clip", "food/meats_and_eggs/steak-v0.1.png", "ground", 0.2),
        ("clip", "food/bread_and_wine_mark_near_.png", "ground", 0.35),
        ("clip", "food/grapes_leif_lodahl_02.png", "ground", 0.25),
        ("clip", "food/soup_jarno_vasamaa_.png", "ground", 0.2),
        ("drawn", "candle", "ground", 0.45),
        ("drawn", "candle", "ground", 0.45),
        ("drawn", "wine_glass", "ground", 0.38),
        ("drawn", "wine_glass", "ground", 0.38),
        ("drawn", "cutlery", "ground", 0.25),
    ],
}

# Every picture of a context holds at least one of its anchor props, drawn
# large: the things a person (and an ImageNet classifier) would name first.
ANCHORS = {
    "beach": [("drawn", "beach_umbrella", "ground", 0.8), ("clip", "tools/umbrella.png", "ground", 0.55),
              ("clip", "transportation/boating/sailboat_illustration.png", "sea", 0.5)],
    "mountain_camp": [("clip", "unsorted/tenda_da_campeggio_archi_01.png", "ground", 0.6),
                      ("drawn", "tent", "ground", 0.6), ("drawn", "campfire", "ground", 0.45)],
    "night_party": [("clip", "recreation/party/balloons_01.png", "air", 0.6),
                    ("clip", "recreation/party/balloons-aj.png", "air", 0.6),
                    ("clip", "recreation/party/baloon1_01.png", "air", 0.5)],
    "breakfast": [("clip", "food/beverages/coffee.png", "ground", 0.3), ("clip", "food/beverages/teacup_ganson.png", "ground", 0.32),
                  ("clip", "food/breads_and_carbs/croissant_gerald_g._01.png", "ground", 0.3)],
    "gym": [("drawn", "barbell", "ground", 0.28), ("drawn", "dumbbell", "ground", 0.24), ("drawn", "kettlebell", "ground", 0.32)],
    "office_desk": [("drawn", "laptop", "ground", 0.5), ("clip", "office/desk_lamp_gerald_g._01.png", "ground", 0.55)],
    "candlelit_dinner": [("clip", "food/beverages/alcohol/wine_glass_christian_h._.png", "ground", 0.45),
                         ("clip", "food/beverages/alcohol/bottiglia_di_vino_pregi_01.png", "ground", 0.6),
                         ("drawn", "candle", "ground", 0.55)],
}

# Small extra props that carry a brand's planted attribute into any context
# (a rugged brand's pictures gain rocks and axes, a sophisticated brand's gain
# candles and wine glasses). Each also raises the image's planted level.
ACCENTS = {
    "ruggedness": [("clip", "tools/axe_peterm_.png", "ground", 0.38), ("clip", "unsorted/zaino_per_montagna.png", "ground", 0.36),
                   ("clip", "recreation/holiday/hiking_boot_jarno_vasama_.png", "ground", 0.26)],
    "sophistication": [("drawn", "candle", "ground", 0.38),
                       ("clip", "plants/flowers/bouquet_of_flowers_01.png", "ground", 0.36),
                       ("clip", "food/beverages/alcohol/wine_glass_christian_h._.png", "ground", 0.34)],
}
# Share of a brand's images (outside the attribute's own context) that get an accent.
BRAND_ACCENTS = {
    "Kraggo": ("ruggedness", 0.6),
    "Tundrel": ("ruggedness", 0.6),
    "Orvella": ("sophistication", 0.6),
    "Velmire": ("sophistication", 0.85),
}

ACCENT_PROPS = {"Velmire": 2}

# Planted attribute content of each context (1 = the scene itself carries it).
CONTEXT_LEVELS = {
    #                  rugged soph  excite sincere compet outdoors
    "beach":            (0, 0, 1, 0, 0, 1),
    "mountain_camp":    (1, 0, 0, 0, 0, 1),
    "night_party":      (0, 0, 1, 0, 0, 0),
    "breakfast":        (0, 0, 0, 1, 0, 0),
    "gym":              (0, 0, 0, 0, 0, 0),
    "office_desk":      (0, 0, 0, 0, 1, 0),
    "candlelit_dinner": (0, 1, 0, 0, 0, 0),
}
LEVEL_NAMES = ("ruggedness", "sophistication", "excitement", "sincerity", "competence", "outdoors")


# --------------------------------------------------------------------------
# Composition

_CLIP_CACHE: dict[str, Image.Image] = {}


def load_clipart(relpath):
    """One clip-art PNG as RGBA, cropped to its visible part, at most 600 px."""
    if relpath not in _CLIP_CACHE:
        path = CLIPART / relpath
        if not path.is_file():
            raise SystemExit(f"{path} is missing: apt-get install -y openclipart-png")
        img = Image.open(path).convert("RGBA")
        bbox = img.getchannel("A").point(lambda a: 255 if a > 16 else 0).getbbox()
        if bbox:
            img = img.crop(bbox)
        img.thumbnail((600, 600), Image.LANCZOS)
        _CLIP_CACHE[relpath] = img
    return _CLIP_CACHE[relpath]


def render_prop(rng, entry, H, scale=1.0):
    kind, what, placement, rel = entry
    height = max(6, rel * H * rng.uniform(0.75, 1.3) * scale)
    if kind == "drawn":
        img = DRAWN[what](rng, height)
    else:
        src = load_clipart(what)
        ratio = src.size[0] / src.size[1]
        w = max(4, int(height * ratio))
        if w > H * 1.1:  # very wide art: cap its width
            w = int(H * 1.1)
        img = src.resize((w, max(4, int(w / ratio))), Image.LANCZOS)
        if rng.random() < 0.5:
            img = img.transpose(Image.FLIP_LEFT_RIGHT)
    if placement == "ground" and rng.random() < 0.5:
        img = img.rotate(rng.uniform(-8, 8), resample=Image.BICUBIC, expand=True)
    # each prop gets its own small brightness change
    arr = np.asarray(img, np.float32).copy()
    arr[..., :3] *= rng.uniform(0.85, 1.1)
    return Image.fromarray(arr.clip(0, 255).astype(np.uint8), "RGBA"), placement


def _paste(canvas, img, x, y_bottom, shadow=True):
    x, y = int(x - img.size[0] / 2), int(y_bottom - img.size[1])
    if shadow:
        sh = Image.new("RGBA", canvas.size, (0, 0, 0, 0))
        d = ImageDraw.Draw(sh)
        w = img.size[0]
        d.ellipse([x + w * 0.05, y_bottom - w * 0.08, x + w * 0.95, y_bottom + w * 0.06], fill=(0, 0, 0, 70))
        canvas.alpha_composite(sh.filter(ImageFilter.GaussianBlur(max(1, w / 25))))
    canvas.alpha_composite(img, (x, y))


def compose(rng, context, brand, accent):
    """One picture: the context's scene and props, an optional accent, the product."""
    portrait = rng.random() < 0.2
    w, h = (HEIGHT, WIDTH) if portrait else (WIDTH, HEIGHT)
    W, H = w * SUPER, h * SUPER
    arr, surface = SCENES[context](rng, H, W)
    canvas = Image.fromarray(arr.clip(0, 255).astype(np.uint8)).convert("RGBA")
    pool = PROPS[context]
    picks = rng.choice(len(pool), size=int(rng.integers(3, 6)), replace=False)
    anchors = [ANCHORS[context][i] for i in rng.choice(len(ANCHORS[context]), size=2, replace=False)]
    entries = anchors + [pool[i] for i in picks]
    if accent:  # one accent prop; two for the brand whose photos carry no context of its attribute
        for i in rng.choice(len(ACCENTS[accent]), size=ACCENT_PROPS.get(brand, 1), replace=False):
            entries.append(ACCENTS[accent][i])
    ground = []
    for entry in entries:
        y = rng.uniform(surface, H * 0.97)
        depth = 0.7 + 0.45 * (y - surface) / max(1, H - surface)
        img, placement = render_prop(rng, entry, H, 1.15 * (depth if entry[2] == "ground" else 1.0))
        # keep props near the middle: encoders often centre-crop
        x = rng.uniform(0.2, 0.8) * W
        if placement == "ground":
            ground.append((y, img, x))
        elif placement == "sea":
            _paste(canvas, img, x, surface - rng.uniform(0.02, 0.12) * H, shadow=False)
        else:  # air / wall: hang from the top part
            top = rng.uniform(0, 0.18 if placement == "wall" else 0.25) * H
            _paste(canvas, img, x, top + img.size[1], shadow=False)
    for y, img, x in sorted(ground, key=lambda t: t[0]):
        _paste(canvas, img, x, y)
    # the product, in front
    kind = BRANDS[brand]["kind"]
    ph = H * (rng.uniform(0.2, 0.3) if kind == "can" else rng.uniform(0.28, 0.4))
    product = draw_product(brand, ph)
    if rng.random() < 0.4:
        product = product.rotate(rng.uniform(-10, 10), resample=Image.BICUBIC, expand=True)
    _paste(canvas, product, rng.uniform(0.15, 0.85) * W, rng.uniform(max(surface, H * 0.55), H * 0.98))
    # lighting: exposure, colour temperature, vignette, sensor noise
    out = np.asarray(canvas.convert("RGB"), np.float32)
    out *= rng.uniform(0.72, 1.18)
    out *= np.array([rng.uniform(0.88, 1.12), 1.0, rng.uniform(0.88, 1.12)], np.float32)
    yy, xx = np.mgrid[0:H, 0:W]
    r2 = ((yy - H / 2) / H) ** 2 + ((xx - W / 2) / W) ** 2
    out *= (1 - rng.uniform(0.1, 0.6) * r2)[..., None]
    img = Image.fromarray(out.clip(0, 255).astype(np.uint8)).resize((w, h), Image.LANCZOS)
    out = np.asarray(img, np.float32) + rng.normal(0, rng.uniform(1.5, 5), (h, w, 1))
    img = Image.fromarray(out.clip(0, 255).astype(np.uint8))
    if rng.random() < 0.3:
        img = img.filter(ImageFilter.GaussianBlur(rng.uniform(0.3, 0.8)))
    return img


# --------------------------------------------------------------------------
# The scenario tables

SOURCES = ("consumer", "owned")


def plan(rng):
    """One row per image: brand, source, context, accent (the planted truth)."""
    rows = []
    for brand in BRANDS:
        for source in SOURCES:
            contexts = [c for c, n in zip(CONTEXTS, COUNTS[(brand, source)]) if n for _ in range(n)]
            order = rng.permutation(len(contexts))
            accent_attr, accent_share = BRAND_ACCENTS.get(brand, (None, 0.0))
            for i, j in enumerate(order):
                context = contexts[j]
                own = accent_attr and CONTEXT_LEVELS[context][LEVEL_NAMES.index(accent_attr)]
                accent = accent_attr if accent_attr and not own and rng.random() < accent_share else ""
                rows.append(dict(brand=brand, source=source, context=context, accent=accent,
                                 path=f"images/{brand.lower()}/{source}/{brand.lower()}_{source}_{i + 1:03d}.jpg"))
    return rows


def levels(row):
    values = dict(zip(LEVEL_NAMES, CONTEXT_LEVELS[row["context"]]))
    if row["accent"]:
        values[row["accent"]] = 1
    return values


def write_csv(path, rows, columns):
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        for row in rows:
            writer.writerow({c: row[c] for c in columns})


# Planted directions, per category: the brand planted highest on each attribute
# (from the context mix and the accents above; ``truth_attributes.csv`` holds the
# measured planted levels).
TOP_BRAND = {
    ("drinks", "ruggedness"): "Kraggo", ("apparel", "ruggedness"): "Tundrel",
    ("drinks", "sophistication"): "Orvella", ("apparel", "sophistication"): "Velmire",
    ("drinks", "excitement"): "Fizzwick", ("drinks", "sincerity"): "Orvella",
    ("apparel", "competence"): "Velmire",
}
#: The brand whose invented survey contradicts its photos: people rate it as the
#: most rugged, outdoorsy and least sophisticated of its category (an old
#: workwear image), while its photos are the most sophisticated, office-bound and
#: least rugged. Wherever its photos rank it first or last, the survey ranks it
#: at the other end.
SURVEY_DISAGREES = "Velmire"
SURVEY_ATTRIBUTES = ("sincerity", "excitement", "competence", "sophistication", "ruggedness", "outdoors")

SIGNATURE = {
    "Fizzwick": ["night_party", "beach"],
    "Orvella": ["candlelit_dinner", "breakfast"],
    "Kraggo": ["gym", "mountain_camp"],
    "Tundrel": ["mountain_camp"],
    "Velmire": ["office_desk"],
    "Saltrun": ["beach", "gym"],
}
UNEXPECTED = {"Kraggo": "mountain_camp"}  # common for apparel, rare for the other drinks
SOURCE_DIFFERENCE = {"Kraggo": ("mountain_camp", "gym")}  # consumer favours, owned favours


def brand_tables(rows, rng):
    """Per-brand truth, per brand x attribute planted levels, and the invented survey."""
    frame = {}
    for row in rows:
        frame.setdefault(row["brand"], []).append(row)
    attr_rows, survey_rows = [], []
    for category in ("drinks", "apparel"):
        members = [b for b in BRANDS if BRANDS[b]["category"] == category]
        for attr in SURVEY_ATTRIBUTES:
            level = {b: float(np.mean([r[attr] for r in frame[b]])) for b in members}
            order = sorted(members, key=lambda b: -level[b])
            score = {b: 1.5 + 4.5 * level[b] for b in members}
            flipped = False
            if SURVEY_DISAGREES in members:
                # the disagreeing brand is rated at the opposite end wherever its
                # photos put it first or last in its category
                rank = order.index(SURVEY_DISAGREES)
                others = [score[b] for b in members if b != SURVEY_DISAGREES]
                if rank == 0:
                    score[SURVEY_DISAGREES], flipped = min(others) - 0.9, True
                elif rank == len(members) - 1:
                    score[SURVEY_DISAGREES], flipped = max(others) + 0.9, True
            for b in members:
                top = TOP_BRAND.get((category, attr))
                attr_rows.append(dict(
                    brand=b, category=category, attribute=attr, planted_level=f"{level[b]:.4f}",
                    planted_rank=order.index(b) + 1, planted_top=str(top == b).lower(),
                    direction_planted=str(top is not None).lower(),
                    survey_agrees=str(not (b == SURVEY_DISAGREES and flipped)).lower(),
                ))
                survey_rows.append(dict(
                    brand=b, attribute=attr, category=category,
                    score=f"{float(np.clip(score[b] + rng.normal(0, 0.08), 1.0, 7.0)):.2f}",
                    sample_size=int(rng.integers(180, 420)),
                ))
    brand_rows = []
    for b in BRANDS:
        consumer, owned = SOURCE_DIFFERENCE.get(b, ("", ""))
        brand_rows.append(dict(
            brand=b, category=BRANDS[b]["category"], product=BRANDS[b]["kind"],
            signature_contexts=" ".join(SIGNATURE[b]), unexpected_context=UNEXPECTED.get(b, ""),
            consumer_favours=consumer, owned_favours=owned,
            planted_high=" ".join(a for (c, a), top in TOP_BRAND.items() if top == b),
            accent=BRAND_ACCENTS.get(b, ("", 0))[0],
            survey_agrees=str(b != SURVEY_DISAGREES).lower(),
        ))
    return brand_rows, attr_rows, survey_rows


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE, help="folder to write into (default: demo_images/)")
    args = parser.parse_args(argv)
    out = args.out
    rng = np.random.default_rng(SEED)
    rows = plan(rng)
    if (out / "images").exists():
        shutil.rmtree(out / "images")
    start = datetime(2026, 1, 5, 8, 0)
    for row in rows:
        img = compose(rng, row["context"], row["brand"], row["accent"])
        path = out / row["path"]
        path.parent.mkdir(parents=True, exist_ok=True)
        img.save(path, "JPEG", quality=85, optimize=True)
        row["category"] = BRANDS[row["brand"]]["category"]
        stamp = start + timedelta(minutes=int(rng.integers(0, 300 * 24 * 60)))
        row["posted_at"] = stamp.strftime("%Y-%m-%dT%H:%M:00")
        row.update(levels(row))
    write_csv(out / "manifest.csv", rows, ["path", "brand", "source", "category", "posted_at"])
    write_csv(out / "truth_images.csv", rows, ["path", "brand", "source", "category", "context", "accent", *LEVEL_NAMES])
    brand_rows, attr_rows, survey_rows = brand_tables(rows, rng)
    write_csv(out / "truth_brands.csv", brand_rows, list(brand_rows[0]))
    write_csv(out / "truth_attributes.csv", attr_rows, list(attr_rows[0]))
    write_csv(out / "survey.csv", survey_rows, ["brand", "attribute", "score", "category", "sample_size"])
    print(f"wrote {len(rows)} images to {out / 'images'}")


if __name__ == "__main__":
    main()

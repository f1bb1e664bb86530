"""Face detector used for the report's blurring (explore/report/faces.py), measured on outside images.

Outside sets (all shipped inside the scikit-image wheel, nothing downloaded):

- ``skimage.data.lfw_subset()``: 100 face crops then 100 non-face crops
  (25 x 25 grey, from Labeled Faces in the Wild; scikit-image documents the
  split). Each face, padded by 30 % of its side (edge pixels repeated), is
  placed at a random spot of a larger scene (a scikit-image photo without
  people: coffee, chelsea, rocket, coins, hubble_deep_field, horse, grass,
  gravel, brick), the face about 1/8 or 1/16 of the scene width, so it is
  found the way a face in a consumer photo is. Detection rate = faces whose
  placed box overlaps a detected box (intersection over the smaller box >= 0.3).
- The same scenes with a non-face crop pasted instead: the share of scenes
  with any detection is the false-alarm rate.
- ``astronaut`` and ``camera`` (one face each), scikit-image sample photos.

Run: ``.venv/bin/python benchmarks/face_blur.py``. Prints the rates and the
time per 640-pixel image.
"""

from __future__ import annotations

import os
import time

import numpy as np
from PIL import Image

from explore.report import faces

SCENES = ["coffee", "chelsea", "rocket", "coins", "hubble_deep_field", "horse", "grass", "gravel", "brick"]


def scene(name: str) -> Image.Image:
    import skimage.data as data

    array = getattr(data, name)()
    if array.dtype != np.uint8:
        array = (array.astype(float) / array.max() * 255).astype(np.uint8)
    image = Image.fromarray(array).convert("RGB")
    scale = 640 / max(image.size)
    return image.resize((round(image.size[0] * scale), round(image.size[1] * scale)))


def placed(crop: np.ndarray, background: Image.Image, width: int, rng) -> tuple[Image.Image, faces.Box]:
    """Paste a padded grey crop of ``width`` pixels at a random spot; the box is the crop's face area."""
    pad = round(25 * 0.3)
    grey = np.pad((crop * 255).astype(np.uint8), pad, mode="edge")
    tile = Image.fromarray(grey).convert("RGB").resize((width, width), Image.Resampling.BICUBIC)
    out = background.copy()
    x = int(rng.integers(0, out.size[0] - width))
    y = int(rng.integers(0, out.size[1] - width))
    out.paste(tile, (x, y))
    inner = round(width * 25 / (25 + 2 * pad))
    offset = (width - inner) // 2
    return out, faces.Box(x + offset, y + offset, inner, inner)


def main() -> None:
    import skimage.data as data

    crops = data.lfw_subset()
    backgrounds = [scene(n) for n in SCENES]
    print(f"load average: {open('/proc/loadavg').read().split()[:3]}, cpus: {os.cpu_count()}")
    print(f"detector: {faces.DETECTOR}; shipped setting DETECT_SIDE={faces.DETECT_SIDE}")
    shipped = faces.DETECT_SIDE
    for side in sorted({shipped, 640, 400}, reverse=True):
        faces.DETECT_SIDE = side
        print(f"-- detection copy {side} px{' (shipped)' if side == shipped else ''}")
        rates(crops, backgrounds)
    faces.DETECT_SIDE = shipped
    print(f"-- shipped setting ({shipped} px)")
    bare = sum(bool(faces.detect_faces(b)) for b in backgrounds)
    print(f"scikit-image photos without people ({', '.join(SCENES)}): {bare}/{len(SCENES)} with a detection")
    for name in ("astronaut", "camera"):
        image = Image.fromarray(getattr(data, name)()).convert("RGB")
        boxes = faces.detect_faces(image)
        print(f"{name}: {len(faces._distinct(boxes))} face(s) detected, boxes {boxes}")


def rates(crops, backgrounds) -> None:
    rng = np.random.default_rng(0)
    for fraction in (8, 16):
        hits, alarms, seconds = 0, 0, 0.0
        for k in range(100):
            bg = backgrounds[k % len(backgrounds)]
            image, truth = placed(crops[k], bg, bg.size[0] // fraction, rng)
            start = time.perf_counter()
            boxes = faces.detect_faces(image)
            seconds += time.perf_counter() - start
            hits += any(faces._overlap(truth, b) >= 0.3 for b in boxes)
            non_face, _ = placed(crops[100 + k], bg, bg.size[0] // fraction, rng)
            alarms += bool(faces.detect_faces(non_face))
        print(
            f"LFW subset faces placed at 1/{fraction} of a 640-px scene: detected {hits}/100 "
            f"= {hits / 100:.2f}; scenes with a non-face crop and any detection: {alarms}/100 "
            f"= {alarms / 100:.2f}; {1000 * seconds / 100:.0f} ms per image"
        )


if __name__ == "__main__":
    main()

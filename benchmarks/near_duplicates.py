"""Near-duplicate rule measured on an outside set with known duplicates.

Outside set (nothing from the demo):
- originals: scikit-image's sample photos (astronaut, coffee, chelsea, rocket,
  camera, horse, immunohistochemistry, hubble_deep_field, coins,
  brick, grass, gravel) and Debian ``openclipart-png`` drawings composited on
  white (the first drawings by name of every topic folder), so unrelated
  objects on the same plain background are the hard negatives;
- derived copies of every original (the known duplicates): a 12 % crop, a
  resize to half, JPEG recompression at quality 35, and a small colour change
  (brightness x 1.08, saturation x 0.9).
Positives: every pair of an original with one of its copies or two copies of
one original. Negatives: every other pair.

Rules compared: the old plain difference hash (64 bits, <= 4 bits); the hash
of the content box (uniform background cropped: ``collect.content_hash``); the
cosine of the bundled encoder's ``cluster`` vectors; and the combination
shipped in ``explore/duplicates.py`` (content hash within ``CANDIDATE_BITS`` or
cosine >= ``MIN_COSINE`` alone, and the cosine confirming every pair).
Thresholds are chosen on the drawings of the first half of the topic folders
plus half the photos ("fit") and reported on the rest ("held out").

Run: ``.venv/bin/python benchmarks/near_duplicates.py`` (needs openclipart-png).
"""

from __future__ import annotations

import hashlib
import io
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageEnhance

from explore import collect, duplicates

CLIPART = Path("/usr/share/openclipart/png")
PHOTOS = [
    "astronaut", "coffee", "chelsea", "rocket", "camera", "horse",
    "immunohistochemistry", "hubble_deep_field", "coins", "brick", "grass", "gravel",
]
PER_FOLDER = 3


def originals() -> list[tuple[str, Image.Image, int]]:
    """(name, RGB image, fold) with fold 0 = fit, 1 = held out."""
    import skimage.data as data

    out = []
    for k, name in enumerate(PHOTOS):
        array = getattr(data, name)()
        if array.dtype != np.uint8:
            array = (array.astype(float) / array.max() * 255).astype(np.uint8)
        out.append((name, Image.fromarray(array).convert("RGB"), k % 2))
    folders = sorted(p for p in CLIPART.iterdir() if p.is_dir())
    seen = set()  # openclipart files one drawing under several folders: keep it once
    for k, folder in enumerate(folders):
        files = []
        for f in sorted(folder.rglob("*.png")):
            digest = hashlib.sha256(f.read_bytes()).hexdigest()
            if digest not in seen and f.name not in seen:
                seen.update((digest, f.name))
                files.append(f)
            if len(files) == PER_FOLDER:
                break
        for f in files:
            with Image.open(f) as im:
                im = im.convert("RGBA")
                im.thumbnail((400, 400))
                canvas = Image.new("RGBA", (440, 440), (255, 255, 255, 255))
                canvas.alpha_composite(im, ((440 - im.size[0]) // 2, (440 - im.size[1]) // 2))
                out.append((f"{folder.name}/{f.name}", canvas.convert("RGB"), int(k >= len(folders) // 2)))
    return out


def copies(image: Image.Image) -> dict[str, Image.Image]:
    w, h = image.size
    dx, dy = round(w * 0.06), round(h * 0.06)
    buf = io.BytesIO()
    image.save(buf, "JPEG", quality=35)
    return {
        "crop": image.crop((dx, dy, w - dx, h - dy)),
        "half": image.resize((w // 2, h // 2), Image.Resampling.LANCZOS),
        "jpeg35": Image.open(io.BytesIO(buf.getvalue())).convert("RGB"),
        "colour": ImageEnhance.Color(ImageEnhance.Brightness(image).enhance(1.08)).enhance(0.9),
    }


def main() -> None:
    from explore.embed import embed_batch
    from explore.encoders import load_encoder

    if not CLIPART.is_dir():
        sys.exit("openclipart-png is not installed (apt-get install openclipart-png)")
    print(f"load average: {open('/proc/loadavg').read().split()[:3]}, cpus: {os.cpu_count()}")
    items, group, fold, names = [], [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        for g, (name, image, f) in enumerate(originals()):
            for kind, picture in {"original": image, **copies(image)}.items():
                path = Path(tmp) / f"{g:04d}_{kind}.jpg"
                picture.save(path, "JPEG", quality=92)
                items.append(path)
                group.append(g)
                fold.append(f)
                names.append(f"{name}:{kind}")
        start = time.perf_counter()
        hashes_plain, hashes_content = [], []
        for path in items:
            image = collect.open_rgb(path, draft_size=64)
            hashes_plain.append(collect.difference_hash(image))
            hashes_content.append(collect.content_hash(image))
        encoder = load_encoder("bundled")
        encoder = encoder[0] if isinstance(encoder, tuple) else encoder
        vectors = []
        for k in range(0, len(items), 32):
            batch = [(hashlib.sha256(p.read_bytes()).hexdigest(), p) for p in items[k : k + 32]]
            vectors.append(embed_batch(encoder, batch)[0])
        cluster = np.concatenate(vectors)
        seconds = time.perf_counter() - start
    group, fold = np.array(group), np.array(fold)
    n = len(items)
    i, j = np.triu_indices(n, 1)
    same = group[i] == group[j]
    in_fold = [(fold[i] == f) & (fold[j] == f) for f in (0, 1)]
    plain = collect._popcount(np.array(hashes_plain, np.uint64)[i] ^ np.array(hashes_plain, np.uint64)[j])
    content = collect._popcount(np.array(hashes_content, np.uint64)[i] ^ np.array(hashes_content, np.uint64)[j])
    cosine = np.einsum("kd,kd->k", cluster[i], cluster[j])
    print(
        f"{n} images ({n // 5} originals x 5), {int(same.sum())} duplicate pairs, {int((~same).sum())} other pairs; "
        f"encoder {encoder.id}; hashing + embedding {seconds:.0f} s"
    )

    def show(label, predicted, mask=None):
        m = np.ones_like(same) if mask is None else mask
        tp = int((predicted & same & m).sum())
        fp = int((predicted & ~same & m).sum())
        fn = int((~predicted & same & m).sum())
        precision = tp / (tp + fp) if tp + fp else float("nan")
        recall = tp / (tp + fn) if tp + fn else float("nan")
        print(f"  {label:<58} precision {precision:.3f}  recall {recall:.3f}  (false pairs {fp}, missed {fn})")
        return precision, recall

    if os.environ.get("ND_DUMP"):
        np.savez(os.environ["ND_DUMP"], plain=plain, content=content, cosine=cosine, same=same, fold0=in_fold[0], fold1=in_fold[1], i=i, j=j, names=np.array(names))
    print("fit: thresholds with the highest recall at precision >= 0.97 on the fit half")
    best = None
    m = in_fold[0]
    for bits in (4, 8, 10, 12, 14, 16, 20, 24):
        for t in np.round(np.arange(0.80, 0.96, 0.01), 2):
            rule = duplicates.near_duplicate_rule(content, cosine, bits, t)
            tp = (rule & same & m).sum()
            p = tp / max(1, tp + (rule & ~same & m).sum())
            r = tp / max(1, (same & m).sum())
            if p >= 0.97 and (best is None or r > best[2]):
                best = (bits, t, r, p)
    if best:
        print(f"  fit half: {best[0]} bits, cosine {best[1]:.2f} (recall {best[2]:.3f}, precision {best[3]:.3f}); "
              f"shipped: {duplicates.CANDIDATE_BITS} bits, cosine {duplicates.MIN_COSINE}")
    for label, mask in (("held out", in_fold[1]), ("fit", in_fold[0]), ("all pairs", None)):
        print(f"{label}:")
        show("plain dHash <= 4 bits (the old rule)", plain <= 4, mask)
        show("content-box dHash <= 4 bits", content <= 4, mask)
        show(f"cosine >= {duplicates.MIN_COSINE}", cosine >= duplicates.MIN_COSINE, mask)
        show(
            f"shipped: content dHash <= {duplicates.CANDIDATE_BITS} bits and cosine >= {duplicates.MIN_COSINE}",
            duplicates.near_duplicate_rule(content, cosine, duplicates.CANDIDATE_BITS, duplicates.MIN_COSINE),
            mask,
        )
    clip = np.array([":" in s and "/" in s for s in names])
    white = clip[i] & clip[j] & ~same
    print(
        f"unrelated drawings on white, pairs: {int(white.sum())}; plain dHash <= 4 bits calls "
        f"{int((white & (plain <= 4)).sum())} of them duplicates, the shipped rule "
        f"{int((white & duplicates.near_duplicate_rule(content, cosine, duplicates.CANDIDATE_BITS, duplicates.MIN_COSINE)).sum())}"
    )


if __name__ == "__main__":
    main()

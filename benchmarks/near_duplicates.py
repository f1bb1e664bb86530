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

Cross-source reposts (``repost_check``), the shipped code end to end
(``collect.collect_images``, ``embed.embed_table``,
``duplicates.confirm_near_duplicates``) on a folder tree built from the same
outside originals, per half: brand ``<half>-A`` owns the originals of even
index, brand ``<half>-B`` those of odd index; A's consumer set holds the
derived copies of every original of the half (the four above plus two
re-shares resized and recompressed at once, as platforms do: ``reshare`` at
3/4 size and JPEG quality 60, ``reshare_half_q40`` at half size and quality
40). A copy of an
even original is a positive (its original is among A's owned photos, with
A's other owned photos as the unrelated negatives); a copy of an odd original
is a negative (its original belongs to brand B, so it is no repost of A, and
never of B across brands). Precision = copies made a repost of their own
original / copies made a repost of anything; recall = of the positives. No
threshold is fitted here.

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
    repost_check(encoder)


def reshares(image: Image.Image) -> dict[str, Image.Image]:
    """Platform re-shares, resized and recompressed at once: 3/4 size at JPEG quality 60, half size at 40."""
    w, h = image.size
    out = {}
    for kind, scale, quality in (("reshare", 0.75, 60), ("reshare_half_q40", 0.5, 40)):
        buf = io.BytesIO()
        image.resize((round(w * scale), round(h * scale)), Image.Resampling.LANCZOS).save(buf, "JPEG", quality=quality)
        out[kind] = Image.open(io.BytesIO(buf.getvalue())).convert("RGB")
    return out


def repost_check(encoder) -> None:
    """Precision and recall of cross-source repost detection (module docstring), per half."""
    from explore.embed import embed_table

    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "photos"
        truth = {}  # consumer relpath -> (half, group, kind, relpath of its original, owning brand)
        counters = {0: 0, 1: 0}
        for g, (name, image, f) in enumerate(originals()):
            half = ("fit", "held")[f]
            k = counters[f]
            counters[f] += 1
            owner = f"{half}-{'AB'[k % 2]}"
            original = f"{owner}/owned/{g:04d}_original.jpg"
            (root / original).parent.mkdir(parents=True, exist_ok=True)
            image.save(root / original, "JPEG", quality=92)
            for kind, picture in {**copies(image), **reshares(image)}.items():
                rel = f"{half}-A/consumer/{g:04d}_{kind}.jpg"
                (root / rel).parent.mkdir(parents=True, exist_ok=True)
                picture.save(root / rel, "JPEG", quality=92)
                truth[rel] = (half, g, kind, original, owner)
        start = time.perf_counter()
        table = collect.collect_images(root, progress=False)
        exact = int((table["repost_of"] != "").sum())
        emb, _ = embed_table(table, encoder, cache_dir=Path(tmp) / "cache", batch_size=32, progress=False)
        out, _, notes = duplicates.confirm_near_duplicates(table, emb)
        seconds = time.perf_counter() - start
    path_of = dict(zip(out["image_id"], out["relpath"]))
    rows = []
    for r in out[out["source"] == "consumer"].itertuples():
        half, g, kind, original, owner = truth[r.relpath]
        positive = owner == f"{half}-A"
        rows.append(dict(
            half=half, kind=kind, positive=positive,
            proposed=path_of.get(r.near_repost_of, ""), repost=path_of.get(r.repost_of, ""), original=original,
            cosine=r.near_repost_cosine, bits=r.near_repost_bits, status=r.status, relpath=r.relpath,
        ))
    import pandas as pd

    rows = pd.DataFrame(rows)
    print(
        f"cross-source reposts: {len(out)} files ({int((out['source'] == 'owned').sum())} owned originals, "
        f"{len(rows)} consumer copies of which {int(rows['positive'].sum())} of the owning brand's photos); "
        f"collect + embed + confirm {seconds:.0f} s; the exact sha256 rule alone finds {exact}"
    )
    print(f"  {notes[-1]}")

    def show(label, frame):
        right = frame["repost"] == frame["original"]
        flagged = frame["repost"] != ""
        tp, fp = int((right & flagged).sum()), int((flagged & ~right).sum())
        positives = int(frame["positive"].sum())
        negatives = frame[~frame["positive"]]
        precision = tp / (tp + fp) if tp + fp else float("nan")
        recall = tp / positives if positives else float("nan")
        hash_right = int(((frame["proposed"] == frame["original"]) & frame["positive"]).sum())
        print(
            f"  {label:<22} precision {precision:.3f}  recall {recall:.3f}  (reposts {tp + fp}, wrong {fp}, "
            f"missed {positives - tp} of {positives}; hash proposed the right original for {hash_right}; "
            f"negatives flagged {int((negatives['repost'] != '').sum())} of {len(negatives)}, "
            f"hash-proposed {int((negatives['proposed'] != '').sum())})"
        )

    for label, mask in (("held out", rows["half"] == "held"), ("fit", rows["half"] == "fit"),
                        ("all", rows["half"] != "")):
        show(label, rows[mask])
    wrong = rows[(rows["repost"] != "") & (rows["repost"] != rows["original"])]
    missed = rows[rows["positive"] & (rows["repost"] != rows["original"])]
    for label, frame in (("wrong", wrong), ("missed", missed)):
        for r in frame.itertuples():
            print(
                f"  {label}: {r.relpath} (copy of {r.original}): hash proposed {r.proposed or 'nothing'}"
                + (f" at {r.bits} bits, cosine {r.cosine:.3f}" if r.proposed else "")
            )
    print("  recall by kind of copy, all halves (positives only):")
    for kind, frame in rows[rows["positive"]].groupby("kind", sort=False):
        right = frame["repost"] == frame["original"]
        print(
            f"    {kind:<8} {int(right.sum())} of {len(frame)}  "
            f"(cosine with the original: median {frame['cosine'].median():.3f}, min {frame['cosine'].min():.3f})"
        )


if __name__ == "__main__":
    main()

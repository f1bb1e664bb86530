"""Images per second of every catalogue model (explore.encoders.catalogue), in one run.

Each model is built by open_clip with random weights (speed does not depend on
the weights), saved, and loaded back through our ``clip`` encoder with its
pretrained tag (the tag's preprocessing, MobileCLIP reparameterised), then
timed end to end with ``explore.embed.embed_table`` on generated phone-size
JPEGs (decoding, preprocessing, model; fresh cache each pass). The models are
timed in turn, twice round, keeping each model's best pass, since the load from
other processes drifts; the ratio to ViT-B-32 is what the default is chosen
by (catalogue.choose_default). Prints CPU flags and the load average before and
after, and the float32 weights size of each model.

Usage::

    .venv/bin/python benchmarks/clip_catalogue.py [--images 64] [--rounds 2] [--batch-size 16]
"""

from __future__ import annotations

import argparse
import os
import re
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


def cpu_flags() -> str:
    try:
        text = Path("/proc/cpuinfo").read_text()
    except OSError:
        return "unknown"
    return " ".join(sorted(set(re.findall(r"\bavx[^ \n]*", text))))


def loadavg() -> str:
    try:
        return " ".join(Path("/proc/loadavg").read_text().split()[:3])
    except OSError:
        return "unknown"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=64)
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--batch-size", type=int, default=16)
    parser.add_argument("--models", nargs="*", help="model/tag keys (default: the whole catalogue)")
    args = parser.parse_args()

    import open_clip
    import torch

    from benchmarks.embed_throughput import make_photos
    from explore.collect import collect_images
    from explore.embed import embed_table
    from explore.encoders.catalogue import CATALOGUE
    from explore.encoders.clip import ClipEncoder

    entries = [e for e in CATALOGUE if not args.models or e.key in args.models]
    print(f"CPU flags: {cpu_flags()}")
    print(f"cores: {os.cpu_count()}, torch threads: {torch.get_num_threads()}, load average before: {loadavg()}")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        make_photos(tmp / "photos", args.images)
        table = collect_images(tmp / "photos", progress=False)
        encoders, sizes = {}, {}
        for entry in entries:
            torch.manual_seed(0)
            model, _, _ = open_clip.create_model_and_transforms(entry.model, pretrained=None)
            path = tmp / f"{entry.model}.pt"
            torch.save(model.state_dict(), path)
            sizes[entry.key] = sum(t.numel() * 4 for t in model.state_dict().values()) / 1e6
            del model
            encoders[entry.key] = ClipEncoder(entry.model, entry.pretrained, weights=path, allow_download=False)
        best = {key: 0.0 for key in encoders}
        for rnd in range(args.rounds):
            for key, encoder in encoders.items():
                cache = tmp / f"cache-{rnd}-{key.replace('/', '_')}"
                start = time.perf_counter()
                embed_table(table, encoder, cache, batch_size=args.batch_size, progress=False)
                rate = args.images / (time.perf_counter() - start)
                best[key] = max(best[key], rate)
                print(f"  round {rnd + 1} {key:<40} {rate:6.1f} img/s (load {loadavg()})", flush=True)
    base = best.get("ViT-B-32/laion2b_s34b_b79k")
    print(f"\nload average after: {loadavg()}; {args.images} images 1600x1200 JPEG, batch {args.batch_size}, best of {args.rounds}")
    print(f"{'model / tag':<40} {'input':>5} {'img/s':>7} {'x ViT-B-32':>10} {'weights MB':>10}")
    for key, encoder in encoders.items():
        ratio = best[key] / base if base else float("nan")
        print(f"{key:<40} {encoder.input_size:>5} {best[key]:7.1f} {ratio:10.2f} {sizes[key]:10.0f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""How long scoring one new attribute takes on 100,000 cached image vectors.

Target: under one second, with no image re-embedded. The vectors are random
unit vectors of the two joint sizes we ship (512 for clip ViT-B-32, 384 for
bundled); scoring cost depends only on their shape. Prints, per size:

- the probability math alone (one matrix-vector product and a sigmoid);
- the whole ``score_attributes`` call for one attribute: text prompts encoded
  (by the bundled text encoder when it loads here, else a stand-in), side
  vectors ensembled, probabilities, positive calls and the long table;
- the brand tables (shares with Wilson intervals, bootstrap of the mean
  probability) for that attribute, for information.

Run: .venv/bin/python benchmarks/score_speed.py [--images 100000]
"""

from __future__ import annotations

import argparse
import os
import time
import zlib

import numpy as np
import pandas as pd

from explore import attributes as A
from explore.study import Attribute, ScoringSettings


class StandInText:
    """Fixed random unit vectors per text (used when the bundled encoder cannot load)."""

    def __init__(self, dim: int):
        self.dim, self.id, self.logit_scale, self.logit_bias = dim, f"stand-in-{dim}", 100.0, 0.0

    def encode_texts(self, texts):
        rows = [np.random.default_rng(zlib.crc32(t.encode())).normal(size=self.dim) for t in texts]
        rows = np.asarray(rows, dtype=np.float32)
        return rows / np.linalg.norm(rows, axis=1, keepdims=True)


def best_of(fn, repeats: int = 5) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=100_000)
    args = parser.parse_args()
    n = args.images
    rng = np.random.default_rng(0)
    attribute = Attribute(
        "outdoorsy",
        ["rugged and outdoorsy", "out in nature, on a trail"],
        ["indoors and polished", "in a tidy living room"],
    )
    scoring = ScoringSettings()  # three templates, as a study gets by default
    brand_number = np.arange(n) % 12
    brands = np.array([f"brand{i}" for i in brand_number])
    images = pd.DataFrame(
        {
            "image_id": [f"img{i:06d}" for i in range(n)],
            "brand": brands,
            "category": np.where(brand_number < 6, "cat1", "cat2"),
            "source": np.where(rng.random(n) < 0.6, "consumer", "owned"),
            "status": "ok",
        }
    )

    text_encoders = {}
    try:
        from explore.encoders import load_encoder

        start = time.perf_counter()
        bundled, _ = load_encoder("bundled")
        bundled.encode_texts(["warm-up"])
        text_encoders[384] = bundled
        print(f"bundled encoder loaded in {time.perf_counter() - start:.1f}s (once per run; not part of scoring)")
    except Exception as exc:  # the benchmark still runs on the stand-in
        print(f"bundled encoder not loaded ({exc}); 384-d uses a stand-in text encoder")

    print(f"{n:,} cached vectors, one attribute, {len(scoring.templates)} templates "
          f"x ({len(attribute.positive)} + {len(attribute.negative)}) descriptions; best of 5 runs")
    for dim in (512, 384):
        joint = rng.normal(size=(n, dim)).astype(np.float32)
        joint /= np.linalg.norm(joint, axis=1, keepdims=True)
        encoder = text_encoders.get(dim) or StandInText(dim)
        vec = A.attribute_vectors(attribute, scoring.templates, encoder.encode_texts)
        text = best_of(lambda: A.attribute_vectors(attribute, scoring.templates, encoder.encode_texts))
        math = best_of(lambda: A.pair_probabilities(joint, vec.positive, vec.negative, 100.0, 0.0) >= 0.5)
        ids = images["image_id"].tolist()
        whole = best_of(lambda: A.score_attributes(ids, joint, joint, [attribute], scoring, encoder))
        long, definitions, _ = A.score_attributes(ids, joint, joint, [attribute], scoring, encoder)
        start = time.perf_counter()
        A.attribute_shares(long, images, definitions, bootstrap_samples=scoring.bootstrap_samples, seed=0)
        shares = time.perf_counter() - start
        verdict = "under 1 s" if whole < 1.0 else "OVER 1 s"
        print(
            f"  d={dim} ({encoder.id[:40]}):\n"
            f"    encoding the {len(vec.positive_prompts) + len(vec.negative_prompts)} prompts "
            f"{text * 1000:.0f} ms (fixed, whatever the number of images)\n"
            f"    probability math on the vectors {math * 1000:.1f} ms\n"
            f"    score_attributes, all of it (prompts, probabilities, calls, long table) "
            f"{whole * 1000:.0f} ms: {verdict}\n"
            f"    brand tables with {scoring.bootstrap_samples} bootstrap resamples {shares:.2f} s"
        )
    print(f"load average while measuring: {' '.join(f'{x:.1f}' for x in os.getloadavg())} "
          f"on {os.cpu_count()} CPUs")


if __name__ == "__main__":
    main()

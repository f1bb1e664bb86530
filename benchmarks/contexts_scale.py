"""Time the whole contexts stage on random clustered vectors of 1,000, 10,000 and 100,000 images.

Each size runs in its own Python process so that peak memory (the process's
maximum resident set size, ``resource.getrusage``) belongs to that size alone.
The vectors are 512-d, L2-normalised, drawn around 24 random centres of
unequal size; brands, categories and sources are random labels; context names
come from the default vocabulary encoded as random vectors (the naming maths
runs, the names mean nothing). Besides time and memory it prints the adjusted
Rand index against the generating centres (sklearn) and the unassigned share.

    .venv/bin/python benchmarks/contexts_scale.py              # 1k, 10k, 100k
    .venv/bin/python benchmarks/contexts_scale.py --sizes 1000 10000

Every size pays umap's numba JIT compilation (its own process); the figures
include it, as a real run would. The 1-minute load average is printed too:
on a shared machine the wall times stretch with it.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time

SIZES = (1_000, 10_000, 100_000)


def make_data(n: int, d: int = 512, centres: int = 24, seed: int = 0):
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    c = rng.normal(size=(centres, d))
    c /= np.linalg.norm(c, axis=1, keepdims=True)
    weights = rng.dirichlet(np.full(centres, 2.0))
    truth = rng.choice(centres, size=n, p=weights)
    x = c[truth] + rng.normal(scale=0.035, size=(n, d))
    x = (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)
    brands = np.array([f"brand{i:02d}" for i in range(20)])
    pick = rng.integers(0, len(brands), n)
    brand = brands[pick]
    category = np.where(pick < 10, "one", "two")
    images = pd.DataFrame(
        {
            "image_id": [f"img{i:07d}" for i in range(n)],
            "brand": brand,
            "category": category,
            "source": np.where(rng.random(n) < 0.6, "consumer", "owned"),
        }
    )
    return images, x, truth


def one(n: int) -> dict:
    import numpy as np
    from sklearn.metrics import adjusted_rand_score

    from explore.contexts import run_contexts
    from explore.study import ContextSettings

    images, x, truth = make_data(n)

    def encode_texts(phrases):
        rng = np.random.default_rng(1)
        v = rng.normal(size=(len(phrases), x.shape[1]))
        return (v / np.linalg.norm(v, axis=1, keepdims=True)).astype(np.float32)

    steps: dict = {}
    start = time.perf_counter()
    tables = run_contexts(
        images, list(images["image_id"]), x, x, ContextSettings(), seed=0, encode_texts=encode_texts,
        seconds=steps,
    )
    seconds = time.perf_counter() - start
    labels = tables["image_contexts"]["context_id"].to_numpy()
    kept = labels >= 0
    contexts = tables["contexts"]
    return {
        "n": n,
        "seconds": round(seconds, 1),
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "contexts": int((contexts["context_id"] > 0).sum()),
        "true_centres": int(len(np.unique(truth))),
        "unassigned_share": round(float((~kept).mean()), 4),
        "ari_all": round(float(adjusted_rand_score(truth, labels)), 4),
        "ari_assigned": round(float(adjusted_rand_score(truth[kept], labels[kept])), 4),
        "neighbours": int(contexts["setting_neighbours"].iloc[0]),
        "min_cluster_size": int(contexts["setting_min_cluster_size"].iloc[0]),
        "brand_context_rows": len(tables["brand_contexts"]),
        "step_seconds": steps,
        "load_average_1min_at_end": round(os.getloadavg()[0], 2),
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=list(SIZES))
    parser.add_argument("--one", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.one:
        print(json.dumps(one(args.one)))
        return 0
    print(f"{'images':>8} {'seconds':>8} {'peak MB':>8} {'contexts':>8} {'ARI':>6} {'unassigned':>10}")
    for n in args.sizes:
        done = subprocess.run(
            [sys.executable, __file__, "--one", str(n)], capture_output=True, text=True, check=False
        )
        if done.returncode != 0:
            print(f"{n:>8} failed:\n{done.stderr[-2000:]}")
            return 1
        r = json.loads(done.stdout.strip().splitlines()[-1])
        print(
            f"{r['n']:>8} {r['seconds']:>8} {r['peak_rss_mb']:>8} {r['contexts']:>8} "
            f"{r['ari_all']:>6} {r['unassigned_share']:>10.2%}   {json.dumps(r)}",
            flush=True,
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())

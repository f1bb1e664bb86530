"""Time the whole contexts stage on random clustered vectors of 50,000, 100,000 and 200,000 images.

Each size runs in its own Python process so that peak memory (the process's
maximum resident set size, ``resource.getrusage``) belongs to that size alone.
The vectors are 512-d, L2-normalised, drawn around 24 random centres of
unequal size; brands, categories and sources are random labels; context names
come from the default vocabulary encoded as random vectors (the naming maths
runs, the names mean nothing). Besides time and memory it prints the adjusted
Rand index against the generating centres (sklearn) and the unassigned share.

    .venv/bin/python benchmarks/contexts_scale.py              # 50k, 100k, 200k
    .venv/bin/python benchmarks/contexts_scale.py --sizes 1000 10000
    .venv/bin/python benchmarks/contexts_scale.py --compare 40000

Above ``fit_sample`` (20,000) UMAP and HDBSCAN are fitted on a seeded sample
and the rest placed. ``--compare N`` runs N images twice, fitted on the
default sample and fitted on all N (``fit_sample = N``), and prints the
adjusted Rand index between the two labelings (sklearn) with both times.

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

SIZES = (50_000, 100_000, 200_000)


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


def one(n: int, fit_sample: int | None = None) -> dict:
    import numpy as np
    from sklearn.metrics import adjusted_rand_score

    from explore.contexts import run_contexts
    from explore.study import ContextSettings

    images, x, truth = make_data(n)
    settings = ContextSettings() if fit_sample is None else ContextSettings(fit_sample=fit_sample)

    def encode_texts(phrases):
        rng = np.random.default_rng(1)
        v = rng.normal(size=(len(phrases), x.shape[1]))
        return (v / np.linalg.norm(v, axis=1, keepdims=True)).astype(np.float32)

    steps: dict = {}
    start = time.perf_counter()
    tables = run_contexts(
        images, list(images["image_id"]), x, x, settings, seed=0, encode_texts=encode_texts,
        seconds=steps,
    )
    seconds = time.perf_counter() - start
    labels = tables["image_contexts"]["context_id"].to_numpy()
    kept = labels >= 0
    contexts = tables["contexts"]
    return {
        "n": n,
        "fit_sample": settings.fit_sample,
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
        "labels": labels.tolist() if n <= 100_000 else None,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=list(SIZES))
    parser.add_argument("--compare", type=int, metavar="N",
                        help="N images fitted on the default sample and on all of them: ARI between the two")
    parser.add_argument("--one", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--fit-sample", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.one:
        print(json.dumps(one(args.one, args.fit_sample)))
        return 0
    print(f"CPU flags: {' '.join(cpu_flags())}; load average at start: {os.getloadavg()}", flush=True)
    if args.compare:
        return compare(args.compare)
    print(f"{'images':>8} {'seconds':>8} {'peak MB':>8} {'contexts':>8} {'ARI':>6} {'unassigned':>10}")
    for n in args.sizes:
        done = subprocess.run(
            [sys.executable, __file__, "--one", str(n)], capture_output=True, text=True, check=False
        )
        if done.returncode != 0:
            print(f"{n:>8} failed:\n{done.stderr[-2000:]}")
            return 1
        r = json.loads(done.stdout.strip().splitlines()[-1])
        r.pop("labels", None)
        print(
            f"{r['n']:>8} {r['seconds']:>8} {r['peak_rss_mb']:>8} {r['contexts']:>8} "
            f"{r['ari_all']:>6} {r['unassigned_share']:>10.2%}   {json.dumps(r)}",
            flush=True,
        )
    return 0


def cpu_flags() -> list[str]:
    try:
        text = open("/proc/cpuinfo", encoding="ascii", errors="replace").read()
    except OSError:
        return []
    return sorted({w for w in text.split() if w.startswith("avx")})


def run_one(n: int, fit_sample: int | None = None) -> dict:
    cmd = [sys.executable, __file__, "--one", str(n)]
    if fit_sample:
        cmd += ["--fit-sample", str(fit_sample)]
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"{n} images failed:\n{done.stderr[-2000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def compare(n: int) -> int:
    """Sample fit (default fit_sample) against a full fit of the same n images."""
    import numpy as np
    from sklearn.metrics import adjusted_rand_score

    from explore.study import ContextSettings

    sampled = run_one(n)
    full = run_one(n, fit_sample=n)
    a, b = np.array(sampled.pop("labels")), np.array(full.pop("labels"))
    both = (a >= 0) & (b >= 0)
    print(f"{n} images: fitted on a sample of {ContextSettings().fit_sample}: {sampled['seconds']} s, "
          f"{sampled['peak_rss_mb']} MB, {sampled['contexts']} contexts, ARI vs truth {sampled['ari_all']}")
    print(f"{n} images: fitted on all: {full['seconds']} s, {full['peak_rss_mb']} MB, "
          f"{full['contexts']} contexts, ARI vs truth {full['ari_all']}")
    print(f"agreement sample fit vs full fit: ARI {adjusted_rand_score(b, a):.4f} (all images), "
          f"{adjusted_rand_score(b[both], a[both]):.4f} (images assigned in both, {both.mean():.1%}); "
          f"load average at end {os.getloadavg()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

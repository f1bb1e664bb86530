"""Embedding throughput on this machine: our pipeline vs a naive loop vs the model alone.

For each encoder family it prints images per second for

(a) ours: ``explore.embed.embed_table`` on a folder of generated phone-size
    JPEGs (1600 x 1200), fresh cache, decoding overlapped with the model;
(b) naive: the loop a newcomer writes from the upstream README (open_clip's
    for clip, timm's for the bundled image model) - open one image,
    preprocess it, encode it, next image;
(c) model: the encoder alone on pre-made tensors at our batch size (the upper
    bound for (a): no decoding at all), in the faster of two layouts: one
    batch at a time on all torch threads, or our streams (several batches at
    once, each on cpus // streams threads);

(a) and (c) alternate and keep the best of two passes each, as does (b),
since the load from other processes drifts; CPU time per image is printed as
well, which depends far less on that load;

and the ratios a/b and a/c. Targets: a/c >= 0.8 and a/b >= 2.

With ``--ray`` it adds (r): the same images through ``embed_table`` on a
private Ray instance on this machine (one node, every server on 127.0.0.1, one
worker per CPU), alternating with (a), best of two passes with the workers
already holding the model, plus the first pass that starts them (cold). The
ratio r/a is Ray's overhead against the local path; target r/a >= 0.8.

``clip`` is timed with a randomly initialised open_clip ViT-B-32 (its speed
does not depend on the weights), loaded through ``--weights`` like a real
checkpoint; ``bundled`` is the real bundled encoder.

Usage::

    .venv/bin/python benchmarks/embed_throughput.py [--images 200] [--naive 32]
        [--batch-size 32] [--families bundled clip] [--ray]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from PIL import Image


def make_photos(folder: Path, n: int, size=(1600, 1200), seed: int = 0) -> None:
    """Phone-size JPEGs with photo-like content: smooth shapes plus sensor-like grain."""
    rng = np.random.default_rng(seed)
    w, h = size
    for i in range(n):
        coarse = Image.fromarray((rng.random((9, 12, 3)) * 255).astype(np.uint8)).resize(size, Image.Resampling.BICUBIC)
        pixels = np.asarray(coarse, dtype=np.int16) + rng.integers(-12, 13, size=(h, w, 1), dtype=np.int16)
        brand = ("Alpha", "Beta")[i % 2]
        source = ("consumer", "owned")[(i // 2) % 2]
        path = folder / brand / source / f"photo{i:04d}.jpg"
        path.parent.mkdir(parents=True, exist_ok=True)
        Image.fromarray(np.clip(pixels, 0, 255).astype(np.uint8)).save(path, quality=90)


def load(family: str, workdir: Path):
    """-> (our encoder, {name: naive one-image loop}); the first loop is (b).

    (b) is what a newcomer writes from the upstream library's README, with no
    tuning of ours: open_clip's for ``clip``; for ``bundled``, timm's (the same
    EfficientNet-Lite0 weights as timm builds the model, timm's eval
    transform), plus the cheap ConSE step so it yields the same vectors. The
    second ``bundled`` loop runs our own encoder (folded batch norms,
    channels-last) one image at a time, for comparison.
    """
    import torch

    from explore.encoders import load_encoder

    if family == "clip":
        import open_clip

        model, _, preprocess = open_clip.create_model_and_transforms("ViT-B-32", pretrained=None)
        weights = workdir / "random-vit-b-32.pt"
        torch.save(model.state_dict(), weights)
        encoder, _ = load_encoder("clip", model="ViT-B-32", weights=weights)
        model.eval()

        def naive_one(path):  # open_clip README: preprocess(Image.open(...)).unsqueeze(0), encode_image
            image = preprocess(Image.open(path)).unsqueeze(0)
            with torch.no_grad():
                features = model.encode_image(image)
                features /= features.norm(dim=-1, keepdim=True)
            return features

        return encoder, {"open_clip README loop": naive_one}

    from explore.encoders.bundled import conse, imagenet_model

    encoder, _ = load_encoder("bundled")
    # timm.create_model("efficientnet_lite0") with the same weights, used as
    # timm's README shows (no folding, default memory layout).
    timm_model = imagenet_model()
    transform = encoder._transform  # timm.data.create_transform(**resolve_data_config({}, model=model))
    labels = encoder.label_embeddings()

    def timm_one(path):  # timm README: model(transform(img).unsqueeze(0)), then ConSE
        image = transform(Image.open(path).convert("RGB")).unsqueeze(0)
        with torch.no_grad():
            pooled = timm_model.forward_head(timm_model.forward_features(image), pre_logits=True)
            probabilities = timm_model.get_classifier()(pooled).softmax(dim=-1)
        return pooled / pooled.norm(dim=-1, keepdim=True), conse(probabilities.double().numpy(), labels, encoder.top_t)

    def encoder_one(path):  # the same loop through our encoder (folded, channels-last model)
        image = encoder.preprocess(Image.open(path).convert("RGB")).unsqueeze(0)
        with torch.no_grad():
            return encoder.encode_images(image)

    return encoder, {"timm README loop": timm_one, "our encoder, one at a time": encoder_one}


def bench_family(family: str, table, workdir: Path, batch_size: int, naive_n: int, default_threads: int,
                 use_ray: bool = False) -> dict:
    import torch

    from explore.embed import available_cpus, default_streams, embed_table

    encoder, naive_loops = load(family, workdir)
    paths = table.loc[table["status"] == "ok", "path"].tolist()
    n = len(paths)

    # (c) the model alone at our batch size, on pre-made tensors: the same
    # photos, decoded and preprocessed beforehand (random tensors can run at
    # another speed than real pixels). The first pass is a warm-up (the first
    # call at each batch shape sets up kernels; bundled embeds its label
    # phrases once).
    from explore.collect import open_rgb

    size = 2 * encoder.input_size
    tensors = [encoder.preprocess(open_rgb(p, draft_size=size)) for p in paths]
    batches = [torch.stack(tensors[i : i + batch_size]) for i in range(0, n, batch_size)]
    del tensors
    cpus = available_cpus()
    streams = default_streams(cpus)
    # (c) is the faster of two layouts, so a/c never flatters ours: one batch
    # at a time on all cores, or our layout (streams batches at once, each on
    # cpus // streams torch threads).
    layouts = {"one batch, all threads": (1, cpus), f"{streams} streams": (streams, max(1, cpus // streams))}

    def model_pass(layout) -> tuple[float, float]:
        n_streams, threads = layout

        def encode(batch):
            with torch.inference_mode():
                encoder.encode_images(batch)

        start, cpu = time.perf_counter(), time.process_time()
        with ThreadPoolExecutor(max_workers=n_streams, initializer=torch.set_num_threads, initargs=(threads,)) as pool:
            list(pool.map(encode, batches))
        return n / (time.perf_counter() - start), (time.process_time() - cpu) / n

    # (a) ours, on a fresh cache each time.
    def ours_pass(k: int) -> tuple[float, float]:
        start, cpu = time.perf_counter(), time.process_time()
        _, stats = embed_table(table, encoder, workdir / f"cache-{family}-{k}", batch_size=batch_size, progress=False)
        assert stats.embedded == n, stats.describe()
        return n / (time.perf_counter() - start), (time.process_time() - cpu) / n

    # (r) the same through Ray workers on this machine (ray.init done in main).
    def ray_pass(k) -> float:
        from explore.study import ClusterSettings

        start = time.perf_counter()
        _, stats = embed_table(table, encoder, workdir / f"cache-{family}-ray-{k}", batch_size=batch_size,
                               progress=False, cluster=ClusterSettings(address="auto"))
        assert stats.embedded == n, stats.describe()
        return n / (time.perf_counter() - start)

    ray_cold = ray_pass("cold") if use_ray else None  # starts the workers (each loads the model)

    # Other processes' load changes over minutes, so (c), (a) and (r) alternate
    # and each keeps its best of two passes.
    for layout in layouts.values():
        model_pass(layout)
    model_runs = {name: [] for name in layouts}
    ours_runs, ray_runs = [], []
    for k in range(2):
        for name, layout in layouts.items():
            model_runs[name].append(model_pass(layout))
        ours_runs.append(ours_pass(k))
        if use_ray:
            ray_runs.append(ray_pass(k))
    if use_ray:
        from explore.embed_ray import release_workers

        release_workers()
    model_best = {name: max(runs) for name, runs in model_runs.items()}
    model_layout = max(model_best, key=lambda name: model_best[name][0])
    model_rate, model_cpu = model_best[model_layout]
    ours_rate, ours_cpu = max(ours_runs)

    # (b) naive, one image at a time, torch's default thread count.
    torch.set_num_threads(default_threads)
    subset = paths[:naive_n]
    naive = {}
    for name, naive_one in naive_loops.items():
        naive_one(subset[0])  # warm-up at batch size 1
        runs = []
        for _ in range(2):  # best of two, like (a) and (c)
            start, cpu = time.perf_counter(), time.process_time()
            for path in subset:
                naive_one(path)
            runs.append((len(subset) / (time.perf_counter() - start), (time.process_time() - cpu) / len(subset)))
        naive[name] = max(runs)
    naive_rate, naive_cpu = next(iter(naive.values()))
    return {
        "family": family,
        "encoder": encoder.id,
        "ours": ours_rate,
        "naive": naive_rate,
        "model": model_rate,
        "ours_cpu": ours_cpu,
        "naive_cpu": naive_cpu,
        "model_cpu": model_cpu,
        "model_layouts": {name: rate for name, (rate, _) in model_best.items()},
        "model_layout": model_layout,
        "naive_loops": {name: rate for name, (rate, _) in naive.items()},
        "ray": max(ray_runs) if ray_runs else None,
        "ray_cold": ray_cold,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--images", type=int, default=200, help="generated 1600x1200 JPEGs (default 200)")
    parser.add_argument("--naive", type=int, default=32, help="images timed in the naive loop (default 32)")
    parser.add_argument("--batch-size", type=int, default=32)
    parser.add_argument("--families", nargs="+", default=["bundled", "clip"], choices=["bundled", "clip"])
    parser.add_argument("--ray", action="store_true", help="add (r): the same on a private local Ray instance")
    args = parser.parse_args(argv)

    import torch

    from explore import collect
    from explore.embed import available_cpus

    default_threads = torch.get_num_threads()
    load_avg = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"cpus available: {available_cpus()}, torch default threads: {default_threads}, "
          f"load average (1 min) at start: {load_avg:.2f}")
    if args.ray:
        import ray

        os.environ["RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER"] = "0"  # every Ray server on 127.0.0.1
        os.environ["PYTHONPATH"] = os.pathsep.join([str(Path(__file__).resolve().parent.parent)]
                                                   + [p for p in [os.environ.get("PYTHONPATH")] if p])
        ray.init(num_cpus=available_cpus(), include_dashboard=False, _node_ip_address="127.0.0.1",
                 log_to_driver=False, configure_logging=False, _temp_dir=f"/tmp/explore-bench-ray-{os.getpid()}")
    with tempfile.TemporaryDirectory(prefix="explore-bench-") as tmp:
        workdir = Path(tmp)
        photos = workdir / "photos"
        start = time.perf_counter()
        make_photos(photos, args.images)
        sizes = [p.stat().st_size for p in photos.rglob("*.jpg")]
        print(f"generated {len(sizes)} JPEGs of 1600x1200, {np.mean(sizes) / 1e3:.0f} kB on average, "
              f"in {time.perf_counter() - start:.1f} s")
        start = time.perf_counter()
        table = collect.collect_images(photos, progress=False)
        seconds = time.perf_counter() - start
        print(f"collect (hash, check, dHash): {len(table) / seconds:.1f} images/s")

        rows = [
            bench_family(f, table, workdir, args.batch_size, args.naive, default_threads, args.ray)
            for f in args.families
        ]
    if args.ray:
        ray.shutdown()

    print()
    print(f"{'family':<8} {'(a) ours':>10} {'(b) naive':>10} {'(c) model':>10} {'a/b':>6} {'a/c':>6}   images/s, batch {args.batch_size}")
    for r in rows:
        print(f"{r['family']:<8} {r['ours']:>10.1f} {r['naive']:>10.1f} {r['model']:>10.1f} "
              f"{r['ours'] / r['naive']:>6.2f} {r['ours'] / r['model']:>6.2f}   {r['encoder']}")
    print()
    print("(b) naive loops (the first one is (b) above) and (c) by layout of the model alone (the faster is (c)):")
    for r in rows:
        loops = ", ".join(f"{name} {rate:.1f} (a/b {r['ours'] / rate:.2f})" for name, rate in r["naive_loops"].items())
        layouts = ", ".join(f"{name} {rate:.1f} (a/c {r['ours'] / rate:.2f})" for name, rate in r["model_layouts"].items())
        print(f"{r['family']:<8} (b) {loops}")
        print(f"{'':<8} (c) {layouts}")
    if args.ray:
        print()
        print(f"{'family':<8} {'(a) ours':>10} {'(r) ray':>10} {'r/a':>6} {'ray cold':>10}   images/s; (r) on a local "
              f"Ray instance, {available_cpus()} workers; cold = first pass, workers loading the model")
        for r in rows:
            print(f"{r['family']:<8} {r['ours']:>10.1f} {r['ray']:>10.1f} {r['ray'] / r['ours']:>6.2f} "
                  f"{r['ray_cold']:>10.1f}   target r/a >= 0.8")
    print()
    print("CPU time per image (all threads of this process; does not depend on other load):")
    print(f"{'family':<8} {'(a) ours':>10} {'(b) naive':>10} {'(c) model':>10} {'c/a':>6}   ms of CPU per image")
    for r in rows:
        print(f"{r['family']:<8} {1e3 * r['ours_cpu']:>10.1f} {1e3 * r['naive_cpu']:>10.1f} "
              f"{1e3 * r['model_cpu']:>10.1f} {r['model_cpu'] / r['ours_cpu']:>6.2f}")
    load_avg = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"targets: a/c >= 0.8, a/b >= 2; load average (1 min) at end: {load_avg:.2f}")
    print("On a busy machine the wall-clock figures mostly reflect how many threads each variant")
    print("runs; c/a of CPU time is the a/c to expect when both keep all cores busy.")
    return 0


if __name__ == "__main__":
    sys.exit(main())

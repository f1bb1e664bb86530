"""Re-run of a fully cached 10,000-image study: seconds until the first analysis stage.

A study whose vectors are all cached should cost nothing before the analysis:
collect finds every file unchanged in its read index (``collect_index``) and
embed finds every vector in the cache. This script

1. generates N small JPEGs (default 10,000, 480 x 360, seeded) once, in
   ``--folder`` (kept between runs);
2. fills the study's cache: collect once, then one vector pair per image
   under the bundled encoder's id (random unit vectors of the right shapes:
   a re-run only reads them, so their values do not matter, and embedding
   10,000 images first would take most of an hour here);
3. runs ``explore.run.run_study`` in a fresh Python process, as ``explore run``
   would, and stops it when the first analysis stage (attributes) starts,
   printing the seconds from process start (imports included) to there;
   first without the read index (deleted: every file is hashed and decoded
   again, as before the index existed), then with it.

    .venv/bin/python benchmarks/rerun_cached.py [--images 10000] [--folder /tmp/explore-rerun-bench]

Target: under 5 s with the index on this machine. The load average is printed
beside the figures (other processes share the cores).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

START = time.perf_counter()
REPO = Path(__file__).resolve().parent.parent


def make_images(root: Path, n: int) -> None:
    import numpy as np
    from PIL import Image

    done = root.parent / f".images-complete-{n}"  # outside the images root: collect would list it
    if done.exists():
        return
    rng = np.random.default_rng(0)
    for i in range(n):
        brand = f"Brand{i % 20:02d}"
        source = ("consumer", "owned")[(i // 20) % 2]
        path = root / brand / source / f"img{i:05d}.jpg"
        path.parent.mkdir(parents=True, exist_ok=True)
        coarse = rng.integers(0, 256, size=(6, 8, 3), dtype=np.uint8)
        Image.fromarray(coarse).resize((480, 360), Image.Resampling.BICUBIC).save(path, quality=85)
    done.touch()


def study_file(folder: Path) -> Path:
    path = folder / "study.toml"
    path.write_text(
        f'name = "rerun benchmark"\noutput = "{folder / "out"}"\n'
        f'[images]\nroot = "{folder / "images"}"\n[encoder]\nname = "bundled"\n'
        '[[attribute]]\nname = "sunny"\npositive = ["bright sunshine"]\nnegative = ["grey overcast weather"]\n',
        encoding="utf-8",
    )
    return path


def fill_cache(study_path: Path) -> int:
    import numpy as np

    from explore import collect
    from explore.cache import EmbeddingCache
    from explore.embed import embed_batch
    from explore.encoders import load_encoder
    from explore.study import load_study

    study = load_study(study_path)
    table = collect.collect_study_images(study, progress=False)
    ok = table[table["status"] == "ok"]
    encoder, _ = load_encoder("bundled")
    cluster, joint = embed_batch(encoder, [(ok["sha256"].iloc[0], ok["path"].iloc[0])])
    shas = list(dict.fromkeys(ok["sha256"]))
    rng = np.random.default_rng(0)
    with EmbeddingCache(study.output / "cache", encoder.id) as cache:
        todo = cache.missing(shas)
        if todo:
            c = rng.normal(size=(len(todo), cluster.shape[1])).astype(np.float32)
            j = rng.normal(size=(len(todo), joint.shape[1])).astype(np.float32)
            cache.put(todo, c / np.linalg.norm(c, axis=1, keepdims=True), j / np.linalg.norm(j, axis=1, keepdims=True))
        cache.compact()
    return len(ok)


class _Reached(Exception):
    pass


def rerun(study_path: Path) -> None:
    """(child process) run_study until attributes start; print the seconds since process start."""
    import explore.attributes as attributes
    import explore.collect as collect
    import explore.run as run
    from explore.study import load_study

    steps: dict = {}

    def timed(name, function):
        def wrapper(*args, **kwargs):
            start = time.perf_counter()
            try:
                return function(*args, **kwargs)
            finally:
                steps[name] = round(time.perf_counter() - start, 2)
        return wrapper

    def stop(*args, **kwargs):
        raise _Reached(time.perf_counter() - START)

    collect.collect_study_images = timed("collect", collect.collect_study_images)
    run.study_encoder = timed("encoder load", run.study_encoder)
    import explore.embed as embed

    embed.embed_table = timed("embed (cache)", embed.embed_table)
    import explore.commercial as commercial
    import explore.duplicates as duplicates

    duplicates.confirm_near_duplicates = timed("near-duplicates", duplicates.confirm_near_duplicates)
    commercial.flag_commercial = timed("commercial posts", commercial.flag_commercial)
    attributes.attribute_tables = stop
    lines = []
    try:
        run.run_study(load_study(study_path), progress=False, log=lines.append)
    except _Reached as reached:
        print(json.dumps({"seconds": round(reached.args[0], 2), "steps": steps, "log": lines}))
        return
    raise SystemExit("the attributes stage was never reached")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=10_000)
    parser.add_argument("--folder", type=Path, default=Path("/tmp/explore-rerun-bench"))
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        rerun(args.child)
        return 0
    folder = args.folder
    start = time.perf_counter()
    make_images(folder / "images", args.images)
    print(f"{args.images} JPEGs (480x360) ready in {folder / 'images'} ({time.perf_counter() - start:.0f} s)")
    study = study_file(folder)
    start = time.perf_counter()
    n = fill_cache(study)
    print(f"cache filled for {n} images ({time.perf_counter() - start:.0f} s, collect included)")
    from explore.collect_index import INDEX_NAME

    index = folder / "out" / "cache" / INDEX_NAME
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO)] + [p for p in [os.environ.get("PYTHONPATH")] if p]))
    results = {}
    for label, drop_index in (("without the read index", True), ("with the read index", False),
                              ("with the read index, again", False)):
        if drop_index:
            index.unlink(missing_ok=True)
        load = os.getloadavg()[0]
        wall = time.perf_counter()
        done = subprocess.run([sys.executable, __file__, "--child", str(study)], env=env,
                              capture_output=True, text=True)
        wall = time.perf_counter() - wall
        if done.returncode != 0:
            print(done.stderr[-3000:])
            return 1
        r = json.loads(done.stdout.strip().splitlines()[-1])
        results[label] = r["seconds"]
        print(f"re-run {label}: {r['seconds']:.2f} s to the first analysis stage "
              f"(process wall {wall:.2f} s; load average at start {load:.2f}); steps {r['steps']}; "
              f"log: {' | '.join(r['log'])}")
    print(f"target: under 5 s with the index; load average at end {os.getloadavg()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

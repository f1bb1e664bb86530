"""How long a study mistake takes to be refused: `explore run` in a new process, to its exit.

A wrong setting, a missing file or a labels file of another study must be
refused before any photo is read or any model loaded (pre-flight), within
2 s (the aim). This script writes a small study (24 generated JPEGs), breaks it
one way at a time, and times `explore run STUDY` from process start to exit
(Python start-up and imports included), best and median of ``--repeat``
runs, with the exit status and the error line. The load average and the
CPU flags are printed beside the figures, since they move them.

    .venv/bin/python benchmarks/preflight.py [--repeat 5]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

STUDY = """name = "preflight benchmark"
output = "out"
[images]
root = "photos"
[encoder]
name = "bundled"
[[attribute]]
name = "sunny"
positive = ["bright sunshine"]
negative = ["grey overcast weather"]
"""

CASES = {
    "report.thumbnail_px = 5": ("[report]\nthumbnail_px = 5\n", None),
    "contexts.vocabulary missing": ('[contexts]\nvocabulary = "nope.txt"\n', None),
    "images.root missing": (None, ('root = "photos"', 'root = "no-such-folder"')),
    "labels of another study": ('[labels]\nfile = "labels.csv"\n', None),
    "unknown key": ("[scoring]\ntreshold = 0.6\n", None),
}


def make_photos(root: Path, n: int = 24) -> None:
    import numpy as np
    from PIL import Image

    rng = np.random.default_rng(0)
    for i in range(n):
        path = root / ("Alpha", "Beta")[i % 2] / ("consumer", "owned")[(i // 2) % 2] / f"{i}.jpg"
        path.parent.mkdir(parents=True, exist_ok=True)
        Image.fromarray(rng.integers(0, 256, (60, 80, 3), dtype=np.uint8)).save(path)


def cpu_flags() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("flags"):
                return " ".join(sorted(f for f in line.split(":", 1)[1].split() if f.startswith(("avx", "sse4", "fma"))))
    except OSError:
        pass
    return "unknown"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args(argv)
    env = dict(os.environ, PYTHONPATH=str(REPO), HF_HUB_OFFLINE="1")
    print(f"{os.cpu_count()} CPUs; flags: {cpu_flags()}; load average at start {os.getloadavg()[0]:.2f}")
    print(f"{'mistake':<30} {'exit':>4} {'best s':>7} {'median s':>9}  error line")
    worst = 0.0
    with tempfile.TemporaryDirectory() as tmp:
        base = Path(tmp)
        make_photos(base / "photos")
        (base / "labels.csv").write_text("image,attribute,label\nAlpha/consumer/0.jpg,sunnny,1\n", encoding="utf-8")
        for name, (extra, replace) in CASES.items():
            text = STUDY.replace(*replace) if replace else STUDY
            study = base / "study.toml"
            study.write_text(text + (extra or ""), encoding="utf-8")
            times, done = [], None
            for _ in range(args.repeat):
                start = time.perf_counter()
                done = subprocess.run([sys.executable, "-m", "explore.cli", "--quiet", "run", str(study)], cwd=base,
                                      env=env, capture_output=True, text=True)
                times.append(time.perf_counter() - start)
            line = next((l for l in done.stderr.splitlines() if l.startswith("explore: error:")), done.stderr[-200:])
            line = line.replace(str(base), "WORK")
            worst = max(worst, statistics.median(times))
            print(f"{name:<30} {done.returncode:>4} {min(times):>7.2f} {statistics.median(times):>9.2f}  {line[:150]}")
    print(f"aim: refused within 2 s; slowest median {worst:.2f} s; load average at end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

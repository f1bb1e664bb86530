"""Simulated hand labels for the demo: a random labelling sample answered by the planted truth.

A real study gets its labels from an analyst with ``explore label`` (a seeded
random sample within brand x source, answered yes / no per attribute). The
demo has no analyst, so this script draws that same sample with explore's own
sampler and answers every question from ``truth_images.csv``: a perfect rater.
It writes ``labels.csv`` in the format the labelling sheet exports, which the
demo study reads (``[labels] file``), so the demo report shows hand-label
corrected shares beside the model's yes-rates.

Regenerate (after make_demo.py; deterministic for a given seed)::

    .venv/bin/python demo_images/make_labels.py
"""

from __future__ import annotations

import argparse
import csv
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

#: Images labelled (each for every attribute), as an analyst might in an afternoon.
LABELLED = 120
SEED = 7
SHEET = "demo-planted-truth"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=LABELLED)
    parser.add_argument("--seed", type=int, default=SEED)
    parser.add_argument("--out", type=Path, default=HERE / "labels.csv")
    args = parser.parse_args(argv)

    import pandas as pd

    from explore.attributes.sampling import random_sample
    from explore.collect import collect_study_images
    from explore.study import load_study

    study = load_study(HERE / "study.toml")
    images = collect_study_images(study, progress=False)
    truth = pd.read_csv(HERE / "truth_images.csv").set_index("path")
    attributes = [a.name for a in study.attributes]
    missing = [a for a in attributes if a not in truth.columns]
    if missing:
        raise SystemExit(f"truth_images.csv has no planted level for {', '.join(missing)}")
    sample = random_sample(images, args.size, seed=args.seed)
    relpath = dict(zip(images["image_id"].astype(str), images["relpath"].astype(str)))
    columns = ["image", "attribute", "label", "sample", "stratum", "stratum_size", "drawn", "seed", "sheet"]
    with args.out.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(columns)
        for row in sample.itertuples(index=False):
            rel = relpath[str(row.image_id)]
            for attribute in attributes:
                answer = "yes" if int(truth.loc[rel, attribute]) == 1 else "no"
                writer.writerow([rel, attribute, answer, row.sample, row.stratum, row.stratum_size, row.drawn,
                                 row.seed, SHEET])
    print(f"{args.out}: {len(sample)} images x {len(attributes)} attributes, random within "
          f"{sample['stratum'].nunique()} brand x source strata (seed {args.seed}), answered by the planted truth")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

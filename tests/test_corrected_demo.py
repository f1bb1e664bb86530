"""Corrected shares on the demo, with the planted truth answering the labelling sheet.

The tool's own random sampler (explore/attributes/sampling.py) draws 100 images
(labelled for every attribute) within brand x source; demo_images/truth_images.csv
answers for each drawn image, as a careful rater would; corrected shares
(stratified PPI++) are computed from the demo run's zero-shot probabilities.
Averaged over 20 independent draws. The planted prevalence of each brand x
attribute is demo_images/truth_attributes.csv ``planted_level``. Nothing here is
tuned on the demo: the estimator's constants are standard (95 % normal quantile,
Agresti-Coull pseudo-counts) and its coverage is shown by simulation in
tests/test_correction.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from explore.attributes.correction import corrected_shares
from explore.attributes.sampling import random_sample

DEMO = Path(__file__).resolve().parent.parent / "demo_images"
DRAWS, LABELS = 20, 100


@pytest.mark.slow
def test_corrected_shares_cover_the_planted_prevalence(demo_run):
    out = Path(demo_run)
    images = pd.read_parquet(out / "images.parquet")
    images = images[images["status"] == "ok"]
    scored = pd.read_parquet(out / "image_attributes.parquet")
    column = "zero_shot_probability" if "zero_shot_probability" in scored else "probability"
    probs = scored[["image_id", "attribute", column]].rename(columns={column: "probability"})
    truth = pd.read_csv(DEMO / "truth_images.csv")
    planted = pd.read_csv(DEMO / "truth_attributes.csv").set_index(["brand", "attribute"])["planted_level"]
    attributes = sorted(set(probs["attribute"]) & set(truth.columns))
    oracle = images[["image_id", "relpath"]].merge(truth, left_on="relpath", right_on="path")
    oracle = oracle.melt(id_vars=["image_id"], value_vars=attributes, var_name="attribute", value_name="label")

    covered, errors, yes_covered = [], [], []
    widths = {a: [] for a in attributes}
    widths_alone = {a: [] for a in attributes}
    aucs = {a: [] for a in attributes}
    narrower_without_skill = 0
    for draw in range(DRAWS):
        sample = random_sample(images, LABELS, seed=1000 + draw)
        assert len(sample) == LABELS and sample["image_id"].is_unique
        labels = oracle[oracle["image_id"].isin(set(sample["image_id"]))].assign(sample="random")
        got = corrected_shares(probs, images, labels)
        brand = got[(got["level"] == "brand") & (got["source"] == "all")].copy()
        brand["truth"] = [planted[(b, a)] for b, a in zip(brand["brand"], brand["attribute"])]
        assert len(brand) == 36
        covered.append(int(((brand["share_low"] <= brand["truth"]) & (brand["truth"] <= brand["share_high"])).sum()))
        errors.append(float((brand["share"] - brand["truth"]).abs().mean()))
        for a, g in brand.groupby("attribute"):
            widths[a].append(float((g["share_high"] - g["share_low"]).mean()))
            widths_alone[a].append(float((g["labels_only_high"] - g["labels_only_low"]).mean()))
            aucs[a].append(float(g["label_auc"].iloc[0]))
            if g["share_lambda"].iloc[0] == 0:  # not shown to beat chance in this draw
                narrower_without_skill += int(((g["share_high"] - g["share_low"])
                                               < (g["labels_only_high"] - g["labels_only_low"]) - 1e-12).sum())

    print()
    print(f"demo, {DRAWS} draws of {LABELS} random labels per attribute (planted truth as the rater):")
    print(f"  cells covered by the corrected 95 % interval: {np.mean(covered):.2f} of 36 (min {min(covered)})")
    print(f"  mean absolute error over the 36 cells: {np.mean(errors):.3f}")
    for a in attributes:
        print(f"  {a:<15} check AUC {np.mean(aucs[a]):.3f}  mean width corrected {np.mean(widths[a]):.3f}"
              f"  labels alone {np.mean(widths_alone[a]):.3f}")
    assert np.mean(covered) >= 30
    assert np.mean(errors) <= 0.08
    for a in attributes:
        if np.mean(aucs[a]) >= 0.75:
            assert np.mean(widths[a]) < np.mean(widths_alone[a]), a
    assert narrower_without_skill == 0

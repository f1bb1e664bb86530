"""Drawing images to label: a random sample within brand x source, and a boundary sample.

The random sample is stratified by brand x source (the strata the corrected
shares use), allocated proportionally to the strata's image counts (largest
remainder rounding) with at least two per stratum (so each stratum's variance
can be estimated; common practice). It is
seeded, so the same seed draws the same images. The optional boundary sample
takes, per attribute, the images whose probability is closest to the
threshold among those not drawn at random: useful for fitting thresholds and
probes, never for prevalence.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

#: Fewest images drawn from a stratum (when it has that many).
MIN_PER_STRATUM = 2


def stratum_name(brand: str, source: str) -> str:
    """The stratum id written in the labels file."""
    return f"{brand} | {source}"


def allocate(sizes: list[int], total: int, minimum: int = MIN_PER_STRATUM) -> list[int]:
    """Proportional allocation of ``total`` draws over strata of ``sizes`` (largest remainder).

    A stratum then gets at least ``minimum`` (or all its images, when fewer),
    taken from the stratum with the most draws; never more than a stratum holds.
    """
    sizes = np.asarray([int(s) for s in sizes], dtype=np.int64)
    total = int(min(total, sizes.sum()))
    if total <= 0 or sizes.sum() == 0:
        return [0] * len(sizes)
    quota = total * sizes / sizes.sum()
    counts = np.floor(quota).astype(np.int64)
    for k in np.argsort(-(quota - counts), kind="mergesort")[: total - int(counts.sum())]:
        counts[k] += 1
    floor = np.minimum(sizes, minimum)
    for k in np.flatnonzero(counts < floor):
        while counts[k] < floor[k]:
            spare = np.flatnonzero(counts > floor)
            if not len(spare):
                break
            donor = spare[np.argmax(counts[spare])]
            counts[donor] -= 1
            counts[k] += 1
    return [int(c) for c in counts]


def random_sample(images: pd.DataFrame, size: int, seed: int) -> pd.DataFrame:
    """A seeded random sample of ``size`` usable images, stratified by brand x source.

    Returns image_id, brand, category, source, sample ("random"), stratum,
    stratum_size, drawn, seed; sorted in a seeded random order (so a rater
    does not label one brand after another).
    """
    usable = images[images["status"] == "ok"] if "status" in images else images
    groups = sorted(usable.groupby(["brand", "source"], sort=True), key=lambda kv: kv[0])
    if not groups:
        return pd.DataFrame(columns=["image_id", "brand", "category", "source", "sample", "stratum",
                                     "stratum_size", "drawn", "seed"])
    counts = allocate([len(g) for _, g in groups], size)
    rng = np.random.default_rng(seed)
    parts = []
    for ((brand, source), g), k in zip(groups, counts):
        ids = g["image_id"].astype(str).to_numpy()
        pick = np.sort(rng.choice(len(ids), size=k, replace=False)) if k else np.array([], int)
        part = g.iloc[pick][["image_id", "brand", "category", "source"]].copy()
        part["sample"] = "random"
        part["stratum"] = stratum_name(brand, source)
        part["stratum_size"] = len(g)
        part["drawn"] = k
        part["seed"] = seed
        parts.append(part)
    sample = pd.concat(parts, ignore_index=True)
    return sample.iloc[rng.permutation(len(sample))].reset_index(drop=True)


def boundary_sample(
    images: pd.DataFrame, image_attributes: pd.DataFrame, thresholds: dict[str, float], per_attribute: int,
    exclude: set[str] = frozenset(),
) -> pd.DataFrame:
    """Per attribute, the ``per_attribute`` images whose probability is closest to its threshold.

    Images in ``exclude`` (the random sample) are skipped. Returns image_id,
    brand, category, source, sample ("boundary"), stratum, attribute.
    """
    usable = images[images["status"] == "ok"] if "status" in images else images
    meta = usable.set_index("image_id")[["brand", "category", "source"]]
    parts = []
    for attribute, t in thresholds.items():
        rows = image_attributes[(image_attributes["attribute"] == attribute)
                                & image_attributes["image_id"].isin(meta.index)
                                & ~image_attributes["image_id"].isin(exclude)]
        near = rows.assign(distance=(rows["probability"] - t).abs()).sort_values(["distance", "image_id"])
        near = near.head(per_attribute)
        part = meta.loc[near["image_id"]].reset_index()
        part["sample"] = "boundary"
        part["stratum"] = [stratum_name(b, s) for b, s in zip(part["brand"], part["source"])]
        part["attribute"] = attribute
        parts.append(part)
    if not parts:
        return pd.DataFrame(columns=["image_id", "brand", "category", "source", "sample", "stratum", "attribute"])
    return pd.concat(parts, ignore_index=True)

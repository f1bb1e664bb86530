"""Brand metrics: the model's yes-rate per brand x source x attribute, and gaps.

The yes-rate is the fraction of photos the model calls positive (probability at
or above the threshold). It is *not* the share of photos showing the attribute:
it carries the classifier's errors, and its Wilson interval covers sampling
noise only. Mean probabilities get seeded bootstrap percentile intervals
(resampling within each brand x source cell), and consumer-vs-owned differences
of yes-rates Newcombe's hybrid score interval.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from explore.attributes.intervals import _group_rng, _percentiles, bootstrap_sums, newcombe_interval, wilson_interval
from explore.attributes.scoring import score_attributes
from explore.study import Attribute, ScoringSettings

SOURCES = ("consumer", "owned")


def attribute_shares(
    image_attributes: pd.DataFrame,
    images: pd.DataFrame,
    definitions: pd.DataFrame,
    *,
    bootstrap_samples: int = 1000,
    seed: int = 0,
) -> pd.DataFrame:
    """Yes-rates and mean probabilities per brand x source x attribute and per category.

    Parameters
    ----------
    image_attributes : long table from :func:`score_attributes`.
    images : the images table (image_id, brand, category, source).
    definitions : attribute_definitions (threshold, encoder_id per attribute).
    bootstrap_samples : resamples for the mean-probability interval.
    seed : the study seed.

    Returns
    -------
    attribute_shares table: level (brand/category), brand ("" on category rows),
    category, source (consumer/owned/all), attribute, n, positives, yes_rate
    (positives / n: the model's yes-rate, not a share of photos showing the
    attribute), yes_rate_low, yes_rate_high (95 % Wilson, sampling only),
    yes_rate_index (100 x yes_rate / the category's yes-rate for the same
    source and attribute; NaN when that is 0),
    mean_probability, mean_low, mean_high (95 % percentile bootstrap,
    resampling within each brand x source cell), threshold, encoder_id.
    """
    columns = [
        "level", "brand", "category", "source", "attribute", "n", "positives", "yes_rate",
        "yes_rate_low", "yes_rate_high", "mean_probability", "mean_low", "mean_high",
        "threshold", "encoder_id",
    ]
    if image_attributes.empty:
        return pd.DataFrame(columns=columns)
    names = list(definitions["attribute"])
    prob = image_attributes.pivot(index="image_id", columns="attribute", values="probability")[names]
    pos = image_attributes.pivot(index="image_id", columns="attribute", values="positive")[names]
    meta = images.set_index("image_id").loc[prob.index, ["brand", "category", "source"]].astype(str)
    prob_v = prob.to_numpy(np.float64)
    pos_v = pos.to_numpy(bool)

    # Bootstrap within each brand x source cell; a wider group (source "all", a
    # category) adds up its cells' resampled sums, so its resamples keep the
    # numbers of photos per cell as collected (a stratified bootstrap).
    cells = {}
    for key, frame in meta.groupby(["brand", "category", "source"], sort=True):
        index = meta.index.get_indexer(frame.index)
        sums = bootstrap_sums(prob_v[index], bootstrap_samples, _group_rng(seed, key))
        cells[key] = (index, sums)

    groups = []  # (level, brand, category, source, cell keys)
    for level in ("brand", "category"):
        owners = sorted({(k[0], k[1]) if level == "brand" else ("", k[1]) for k in cells})
        for brand, category in owners:
            mine = [k for k in cells if k[1] == category and (level == "category" or k[0] == brand)]
            groups.append((level, brand, category, "all", mine))
            for source in SOURCES:
                sub = [k for k in mine if k[2] == source]
                if sub:
                    groups.append((level, brand, category, source, sub))

    threshold = definitions.set_index("attribute")["threshold"]
    encoder_id = definitions.set_index("attribute")["encoder_id"]
    rows = []
    for level, brand, category, source, keys in groups:
        index = np.concatenate([cells[k][0] for k in keys])
        n = len(index)
        positives = pos_v[index].sum(axis=0)
        low, high = wilson_interval(positives, n)
        means = prob_v[index].mean(axis=0)
        if bootstrap_samples > 0:
            mean_low, mean_high = _percentiles(sum(cells[k][1] for k in keys) / n)
        else:
            mean_low = mean_high = np.full(len(names), np.nan)
        for j, name in enumerate(names):
            rows.append(
                (level, brand, category, source, name, n, int(positives[j]), positives[j] / n,
                 low[j], high[j], means[j], mean_low[j], mean_high[j],
                 float(threshold[name]), encoder_id[name])
            )
    table = pd.DataFrame(rows, columns=columns)
    # index = 100 x brand yes-rate / category yes-rate, same source (common marketing practice).
    category = table[table["level"] == "category"].set_index(["category", "source", "attribute"])["yes_rate"]
    base = category.reindex(pd.MultiIndex.from_frame(table[["category", "source", "attribute"]])).to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        table.insert(table.columns.get_loc("yes_rate_high") + 1, "yes_rate_index", np.where(base > 0, 100 * table["yes_rate"] / base, np.nan))
    return table


def attribute_gaps(shares: pd.DataFrame) -> pd.DataFrame:
    """Consumer-minus-owned difference of yes-rates per brand and attribute.

    The interval is Newcombe's hybrid score interval (95 %); ``significant`` is
    true when it excludes zero. Brands lacking either source get a row with
    NaN numbers and ``significant`` false, so nothing disappears silently.
    """
    columns = [
        "brand", "category", "attribute", "consumer_n", "owned_n", "consumer_yes_rate",
        "owned_yes_rate", "yes_rate_gap", "yes_rate_gap_low", "yes_rate_gap_high", "significant", "threshold", "encoder_id",
    ]
    brand_rows = shares[shares["level"] == "brand"]
    if brand_rows.empty:
        return pd.DataFrame(columns=columns)
    keys = ["brand", "category", "attribute"]
    base = brand_rows[brand_rows["source"] == "all"][keys + ["threshold", "encoder_id"]]
    table = base
    for source in SOURCES:
        part = brand_rows[brand_rows["source"] == source][keys + ["n", "positives", "yes_rate"]]
        part = part.rename(columns={c: f"{source}_{c}" for c in ("n", "positives", "yes_rate")})
        table = table.merge(part, on=keys, how="left")
    cn = table["consumer_n"].fillna(0).to_numpy()
    on = table["owned_n"].fillna(0).to_numpy()
    ok = (cn > 0) & (on > 0)
    low = np.full(len(table), np.nan)
    high = np.full(len(table), np.nan)
    if ok.any():
        low[ok], high[ok] = newcombe_interval(
            table["consumer_positives"].to_numpy()[ok], cn[ok],
            table["owned_positives"].to_numpy()[ok], on[ok],
        )
    table["consumer_n"] = cn.astype(int)
    table["owned_n"] = on.astype(int)
    table["yes_rate_gap"] = np.where(ok, table["consumer_yes_rate"] - table["owned_yes_rate"], np.nan)
    table["yes_rate_gap_low"] = low
    table["yes_rate_gap_high"] = high
    table["significant"] = ok & ((low > 0) | (high < 0))
    return table[columns].reset_index(drop=True)


def attribute_tables(
    images: pd.DataFrame,
    image_ids: Sequence[str],
    joint: np.ndarray,
    cluster: np.ndarray,
    attributes: Sequence[Attribute],
    scoring: ScoringSettings,
    encoder,
    *,
    seed: int = 0,
    saved_checks: dict | None = None,
) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """The attributes stage: every table it writes, and notes for the run log.

    Returns
    -------
    ({"image_attributes", "attribute_definitions", "attribute_shares", "attribute_gaps"}, notes)
    """
    image_attributes, definitions, notes = score_attributes(
        image_ids, joint, cluster, attributes, scoring, encoder, saved_checks
    )
    shares = attribute_shares(
        image_attributes, images, definitions, bootstrap_samples=scoring.bootstrap_samples, seed=seed
    )
    return (
        {
            "image_attributes": image_attributes,
            "attribute_definitions": definitions,
            "attribute_shares": shares,
            "attribute_gaps": attribute_gaps(shares),
        },
        notes,
    )

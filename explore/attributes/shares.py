"""Brand metrics: the model's yes-rate per brand x source x attribute, and gaps.

The yes-rate is the fraction of photos the model calls positive (probability at
or above the threshold). It is *not* the share of photos showing the attribute:
it carries the classifier's errors, and its Wilson interval covers sampling
noise only. Mean probabilities get seeded bootstrap percentile intervals
(resampling within each brand x source cell, posters as clusters), and consumer-vs-owned differences
of yes-rates Newcombe's hybrid score interval.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from explore.attributes.clustering import clustering_note, yes_rate_interval, gap_interval, gap_test, interval_n
from explore.attributes.intervals import _group_rng, _percentiles, bootstrap_sums
from explore.attributes.testing import benjamini_hochberg, minimum_detectable_gap, power_warning
from explore.attributes.scoring import score_attributes
from explore.study import Attribute, ScoringSettings

SOURCES = ("consumer", "owned")

#: False-discovery level for the attribute-gap family (Benjamini-Hochberg).
GAP_FDR = 0.05


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
    images : the images table (image_id, brand, category, source; optional
        ``poster``: photos of one poster are a cluster, "" = unknown).
    definitions : attribute_definitions (threshold, encoder_id per attribute).
    bootstrap_samples : resamples for the mean-probability interval.
    seed : the study seed.

    Returns
    -------
    attribute_shares table: level (brand/category), brand ("" on category rows),
    category, source (consumer/owned/all), attribute, n, effective_n (n /
    design effect), positives, yes_rate (positives / n: the model's yes-rate,
    not a share of photos showing the attribute), yes_rate_low, yes_rate_high
    (95 %, sampling only: Wilson on the Korn-Graubard adjusted effective n,
    see :mod:`explore.attributes.clustering`; plain Wilson without posters),
    yes_rate_index (100 x yes_rate / the category's yes-rate for the same
    source and attribute; NaN when that is 0),
    mean_probability, mean_low, mean_high (95 % percentile bootstrap,
    resampling within each brand x source cell, whole posters at a time
    when posters are known), posters (distinct posters,
    an unknown poster counting one per photo), design_effect, clustering
    (how photos were treated), threshold, encoder_id.
    """
    columns = [
        "level", "brand", "category", "source", "attribute", "n", "effective_n", "positives", "yes_rate",
        "yes_rate_low", "yes_rate_high", "mean_probability", "mean_low", "mean_high",
        "posters", "design_effect", "clustering", "threshold", "encoder_id",
    ]
    if image_attributes.empty:
        return pd.DataFrame(columns=columns)
    names = list(definitions["attribute"])
    prob = image_attributes.pivot(index="image_id", columns="attribute", values="probability")[names]
    pos = image_attributes.pivot(index="image_id", columns="attribute", values="positive")[names]
    indexed = images.set_index("image_id")
    meta = indexed.loc[prob.index, ["brand", "category", "source"]].astype(str)
    if "poster" in indexed.columns:
        posters = indexed.loc[prob.index, "poster"].fillna("").astype(str).to_numpy()
    else:
        posters = np.full(len(prob.index), "", dtype=object)
    prob_v = prob.to_numpy(np.float64)
    pos_v = pos.to_numpy(bool)

    # Bootstrap within each brand x source cell; a wider group (source "all", a
    # category) adds up its cells' resampled sums, so its resamples keep the
    # numbers of photos per cell as collected (a stratified bootstrap).
    cells = {}
    for key, frame in meta.groupby(["brand", "category", "source"], sort=True):
        index = meta.index.get_indexer(frame.index)
        cells[key] = (index, poster_bootstrap_sums(prob_v[index], posters[index], bootstrap_samples,
                                                   _group_rng(seed, key)))

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
        low, high, design = yes_rate_interval(pos_v[index], posters[index])
        note = clustering_note(design)
        means = prob_v[index].mean(axis=0)
        if bootstrap_samples > 0:
            resampled = sum(cells[k][1] for k in keys)  # (samples, attributes + 1): sums, then photos
            mean_low, mean_high = _percentiles(resampled[:, :-1] / resampled[:, -1:])
        else:
            mean_low = mean_high = np.full(len(names), np.nan)
        for j, name in enumerate(names):
            rows.append(
                (level, brand, category, source, name, n, float(design.effective_n[j]), int(positives[j]),
                 positives[j] / n, low[j], high[j], means[j], mean_low[j], mean_high[j],
                 design.posters, float(design.design_effect[j]), note,
                 float(threshold[name]), encoder_id[name])
            )
    table = pd.DataFrame(rows, columns=columns)
    # index = 100 x brand yes-rate / category yes-rate, same source (common marketing practice).
    category = table[table["level"] == "category"].set_index(["category", "source", "attribute"])["yes_rate"]
    base = category.reindex(pd.MultiIndex.from_frame(table[["category", "source", "attribute"]])).to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        table.insert(table.columns.get_loc("yes_rate_high") + 1, "yes_rate_index", np.where(base > 0, 100 * table["yes_rate"] / base, np.nan))
    return table


def poster_bootstrap_sums(values: np.ndarray, posters: np.ndarray, samples: int, rng) -> np.ndarray:
    """Bootstrap resamples of one cell, drawing posters (clusters) rather than photos.

    Photos of one poster are not independent, so a resample draws whole posters
    with replacement (the cluster bootstrap, Davison & Hinkley 1997, section 3.8);
    a photo whose poster is unknown ("") is its own cluster, so without posters
    this is the ordinary bootstrap of photos with the same draws. Returns
    (samples, k + 1): the resampled column sums, then the resampled number of
    photos (it varies when posters post different numbers of photos), so a
    group's resampled mean is the ratio of its cells' summed sums and counts.
    """
    v = np.asarray(values, dtype=np.float64)
    posters = np.asarray(posters, dtype=object).astype(str)
    known = posters != ""
    if known.any():
        names = np.where(known, posters, np.array([f"\0{i}" for i in range(len(posters))], dtype=object))
        _, cluster = np.unique(names.astype(str), return_inverse=True)
        g = int(cluster.max()) + 1
        totals = np.zeros((g, v.shape[1] + 1))
        np.add.at(totals, cluster, np.column_stack([v, np.ones(len(v))]))
    else:
        totals = np.column_stack([v, np.ones(len(v))])
    return bootstrap_sums(totals, samples, rng)


def attribute_gaps(shares: pd.DataFrame, fdr: float = GAP_FDR) -> pd.DataFrame:
    """Consumer-minus-owned difference of yes-rates per brand and attribute.

    Interval: Newcombe's hybrid score interval (95 %) on the poster-aware
    (Korn-Graubard adjusted) effective n's; p_value: two-sided pooled z-test
    on the same n's (Pearson's chi-square without posters); q_value:
    Benjamini-Hochberg over the family of every brand x attribute gap with
    both sources (named in ``family``); ``significant`` when q_value <= fdr.
    The minimum detectable gap (80 % power, 5 % two-sided) is given for the
    photo counts and for the effective n's, with a plain warning when the
    effective n's cannot detect a 10-point gap. Brands lacking either source
    get a row with NaN numbers and ``significant`` false, so nothing
    disappears silently.
    """
    columns = [
        "brand", "category", "attribute", "consumer_n", "consumer_effective_n", "owned_n",
        "owned_effective_n", "consumer_yes_rate", "owned_yes_rate", "yes_rate_gap",
        "yes_rate_gap_low", "yes_rate_gap_high", "p_value", "q_value", "family", "significant",
        "min_detectable_gap", "min_detectable_gap_effective", "power_warning", "clustering",
        "threshold", "encoder_id",
    ]
    brand_rows = shares[shares["level"] == "brand"]
    if brand_rows.empty:
        return pd.DataFrame(columns=columns)
    keys = ["brand", "category", "attribute"]
    base = brand_rows[brand_rows["source"] == "all"][keys + ["threshold", "encoder_id"]]
    table = base
    carried = ("n", "effective_n", "posters", "positives", "yes_rate", "clustering")
    for source in SOURCES:
        part = brand_rows[brand_rows["source"] == source][keys + [c for c in carried if c in brand_rows]]
        part = part.rename(columns={c: f"{source}_{c}" for c in carried})
        table = table.merge(part, on=keys, how="left")
    cn = table["consumer_n"].fillna(0).to_numpy(np.float64)
    on = table["owned_n"].fillna(0).to_numpy(np.float64)
    ok = (cn > 0) & (on > 0)
    ce = table.get("consumer_effective_n", table["consumer_n"]).to_numpy(np.float64)
    oe = table.get("owned_effective_n", table["owned_n"]).to_numpy(np.float64)
    cp = table.get("consumer_posters", table["consumer_n"]).to_numpy(np.float64)
    op = table.get("owned_posters", table["owned_n"]).to_numpy(np.float64)
    c_adj, o_adj = interval_n(cn, ce, cp), interval_n(on, oe, op)
    cr = table["consumer_yes_rate"].to_numpy(np.float64)
    orate = table["owned_yes_rate"].to_numpy(np.float64)
    nan = np.full(len(table), np.nan)
    low, high, p = nan.copy(), nan.copy(), nan.copy()
    if ok.any():
        low[ok], high[ok] = gap_interval(cr[ok], c_adj[ok], orate[ok], o_adj[ok])
        p[ok] = gap_test(cr[ok], c_adj[ok], orate[ok], o_adj[ok])
    q = benjamini_hochberg(p)
    pooled = np.where(ok, (cr * cn + orate * on) / np.where(ok, cn + on, 1), np.nan)
    table["consumer_n"] = cn.astype(int)
    table["owned_n"] = on.astype(int)
    table["consumer_effective_n"] = np.where(ok, ce, np.nan)
    table["owned_effective_n"] = np.where(ok, oe, np.nan)
    table["yes_rate_gap"] = np.where(ok, cr - orate, np.nan)
    table["yes_rate_gap_low"] = low
    table["yes_rate_gap_high"] = high
    table["p_value"] = p
    table["q_value"] = q
    tested = int(ok.sum())
    table["family"] = np.where(
        ok, f"attribute gaps: every brand x attribute with both sources ({tested} tests), "
        f"Benjamini-Hochberg at {fdr:g}", "not tested (a source is missing)",
    )
    table["significant"] = ok & (q <= fdr)
    table["min_detectable_gap"] = np.where(ok, minimum_detectable_gap(cn, on, pooled), np.nan)
    effective_gap = np.where(ok, minimum_detectable_gap(c_adj, o_adj, pooled), np.nan)
    table["min_detectable_gap_effective"] = effective_gap
    table["power_warning"] = np.where(ok, power_warning(effective_gap), "")
    notes = [
        f"consumer {c}; owned {o}" if isinstance(c, str) and isinstance(o, str) else ""
        for c, o in zip(table.get("consumer_clustering", [""] * len(table)), table.get("owned_clustering", [""] * len(table)))
    ]
    table["clustering"] = notes
    return table[columns].reset_index(drop=True)


def describe_gaps(gaps: pd.DataFrame) -> str:
    """One run-note line: how many gaps were tested and flagged, after which corrections."""
    tested = int(gaps["p_value"].notna().sum()) if "p_value" in gaps else 0
    if tested == 0:
        return "no consumer-vs-owned gaps tested (no brand has both sources)"
    raw = int(gaps.get("significant_before_context", gaps["significant"]).astype(bool).sum())
    text = (f"{raw} of {tested} consumer-vs-owned yes-rate gaps significant after "
            f"Benjamini-Hochberg over all brand x attribute gaps")
    if "context_q_value" in gaps and gaps["context_q_value"].notna().any():
        text += f"; {int(gaps['significant'].astype(bool).sum())} of them also after adjusting for context (Mantel-Haenszel)"
    weak = int((gaps.get("power_warning", pd.Series(dtype=str)).fillna("") != "").sum())
    if weak:
        text += f"; {weak} of {tested} cells too small to detect a 10-point gap at 80 % power"
    return text


#: Corrected-share columns of ``attribute_shares`` (NaN where no random labels exist).
SHARE_COLUMNS = [
    "share", "share_low", "share_high", "share_method", "share_lambda", "labels_used", "labels_positive",
    "labels_only_low", "labels_only_high",
]
#: Corrected-gap columns of ``attribute_gaps``.
SHARE_GAP_COLUMNS = ["share_gap", "share_gap_low", "share_gap_high"]


def add_corrected(shares: pd.DataFrame, gaps: pd.DataFrame, corrected: pd.DataFrame, corrected_gap: pd.DataFrame):
    """Put the corrected shares beside the yes-rate columns (after ``yes_rate_index``) and gaps after the yes-rate gap."""
    keys = ["level", "brand", "category", "source", "attribute"]
    part = corrected[keys + SHARE_COLUMNS] if len(corrected) else pd.DataFrame(columns=keys + SHARE_COLUMNS)
    merged = shares.merge(part, on=keys, how="left")
    merged["share_method"] = merged["share_method"].fillna("").astype(str)
    merged["labels_used"] = merged["labels_used"].fillna(0).astype(int)
    merged["labels_positive"] = merged["labels_positive"].fillna(0).astype(int)
    at = list(shares.columns).index("yes_rate_index") + 1 if "yes_rate_index" in shares else len(shares.columns)
    order = list(shares.columns[:at]) + SHARE_COLUMNS + list(shares.columns[at:])
    merged = merged[order]
    gkeys = ["brand", "category", "attribute"]
    gpart = corrected_gap[gkeys + SHARE_GAP_COLUMNS] if len(corrected_gap) else pd.DataFrame(columns=gkeys + SHARE_GAP_COLUMNS)
    gmerged = gaps.merge(gpart, on=gkeys, how="left")
    for c in SHARE_GAP_COLUMNS:
        gmerged[c] = gmerged[c].astype(float)
    gat = list(gaps.columns).index("yes_rate_gap_high") + 1 if "yes_rate_gap_high" in gaps else len(gaps.columns)
    gmerged = gmerged[list(gaps.columns[:gat]) + SHARE_GAP_COLUMNS + list(gaps.columns[gat:])]
    for c in ("share", "share_low", "share_high", "share_lambda", "labels_only_low", "labels_only_high"):
        merged[c] = merged[c].astype(float)
    return merged, gmerged


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
    labels: pd.DataFrame | None = None,
) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """The attributes stage: every table it writes, and notes for the run log.

    ``labels`` (from :func:`explore.attributes.labels.read_labels`): rows with
    ``sample == "random"`` give corrected shares (stratified PPI++ on the
    zero-shot probability, :mod:`explore.attributes.correction`); other rows
    are not used here.

    Returns
    -------
    ({"image_attributes", "attribute_definitions", "attribute_shares", "attribute_gaps"}, notes)
    """
    from explore.attributes.correction import corrected_gaps, corrected_shares
    from explore.attributes.labels import prevalence_labels

    image_attributes, definitions, notes = score_attributes(
        image_ids, joint, cluster, attributes, scoring, encoder, saved_checks
    )
    shares = attribute_shares(
        image_attributes, images, definitions, bootstrap_samples=scoring.bootstrap_samples, seed=seed
    )
    gaps = attribute_gaps(shares)
    random = pd.DataFrame()
    if labels is not None and len(labels):
        random, label_notes = prevalence_labels(labels, where="labels")
        notes += label_notes
    zero_shot = image_attributes[["image_id", "attribute", "zero_shot_probability"]].rename(
        columns={"zero_shot_probability": "probability"}
    ) if len(image_attributes) else image_attributes
    corrected = corrected_shares(zero_shot, images, random) if len(random) else pd.DataFrame()
    corrected_gap = corrected_gaps(zero_shot, images, random) if len(random) else pd.DataFrame()
    shares, gaps = add_corrected(shares, gaps, corrected, corrected_gap)
    for d in definitions.to_dict("records"):
        name = d["attribute"]
        mine = corrected[corrected["attribute"] == name] if len(corrected) else corrected
        if len(mine):
            r = mine.iloc[0]
            how = (f"PPI++ with lambda {r.share_lambda:.2f}" if r.share_lambda > 0
                   else "the labels alone: the model is not shown to be better than chance")
            notes.append(
                f"attribute '{name}': corrected shares from {int((random['attribute'] == name).sum())} random labels "
                f"by {how} (AUC {r.label_auc:.2f}, 95 % {r.label_auc_low:.2f}-{r.label_auc_high:.2f})"
            )
        if str(d.get("threshold_from", "")).startswith("check"):
            notes.append(
                f"attribute '{name}': its threshold{' and probe' if d.get('scored_by') == 'probe' else ''} "
                "were fitted on hand labels; the yes-rate with them is still the model's yes-rate, not a "
                "prevalence" + ("" if len(mine) else ": label a random sample (`explore label`) for corrected shares")
            )
    return (
        {
            "image_attributes": image_attributes,
            "attribute_definitions": definitions,
            "attribute_shares": shares,
            "attribute_gaps": gaps,
        },
        notes,
    )

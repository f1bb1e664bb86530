"""Corrected shares: prevalence from the model's probabilities and random hand labels.

Method: prediction-powered inference (Angelopoulos, Bates, Fannjiang, Jordan &
Zrnic 2023, Science 382:669) with power tuning (PPI++, Angelopoulos, Duchi &
Zrnic 2023, arXiv:2311.01453), stratified by brand x source. Per stratum h
with N_h images (f = the attribute's per-image zero-shot probability) and n_h
randomly drawn labels y:

    estimate_h = lambda * mean_N(f) - mean_n(lambda * f - y)
    variance_h = lambda^2 var_N(f) / N_h + var_n(lambda * f - y) / n_h

The second term is the labelled sample's mean residual: it removes the
model's bias whatever the model is (a weak model only widens the interval).
``lambda`` (one per attribute, from all its random labels, clipped to [0, 1])
is PPI++'s variance-minimising weight; lambda = 0 gives the labels alone. A
brand row (source ``all``) and a category row combine their strata weighted by
image counts (stratified estimation); a consumer-minus-owned gap is the
difference of the two strata, variances added.

The estimand is the share of the stratum's photos showing the attribute, as
a proportion of the population of photos the collected ones stand for (PPI's
superpopulation view: var_N(f)/N_h is kept), which is slightly conservative
for the collected photos themselves.

Small samples. With about 8 labels per stratum the plain residual variance
is often 0 (all labels 0) and normal intervals then collapse onto 0. We floor
each stratum's residual variance by the labels-only variance at the
Agresti-Coull centre p~ = (k + z^2/2) / (n + z^2) (Agresti & Coull 1998, the
Wilson interval's centre) scaled by the unexplained share of the label
variance, (1 - R^2), pooled over the attribute's strata:

    var_n(lambda f - y)  ->  max(var_n(lambda f - y), (1 - R^2) p~ (1 - p~))

With lambda = 0 (R^2 = 0) this is the labels-only Agresti-Coull variance,
so a corrected interval is never narrower than the labels-only one computed
here for the same labels unless the model explains part of the labels. The
coverage of this choice is shown by simulation in tests/test_correction.py.

When the attribute is not shown to be better than chance on its random
labels (DeLong AUC interval includes 0.5, or too few of a class) lambda is 0:
the share then rests on the labels alone.

Posters. Photos of one poster are not independent. When the images table
names posters, each variance term is the larger of the one above and the
cluster-robust (sandwich, CR1) variance of the same mean with posters as
clusters, G/(G-1) * sum_g (sum_{i in g} (x_i - mean))^2 / m^2 over the G
posters of the m photos (Liang & Zeger 1986; the variance behind
``explore.attributes.clustering``'s Kish design effect, never below 1). Without
poster ids photos are assumed independent, as everywhere else.

Everything is a pure function over arrays and DataFrames.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from explore.attributes.intervals import Z95

#: The method named in the tables.
METHOD = "PPI++ (stratified, brand x source)"
METHOD_LABELS_ONLY = "labels only (PPI++ with lambda 0: model not shown to beat chance)"


@dataclass
class Stratum:
    """One brand x source cell: every image's probability, and the random labels in it."""

    f_all: np.ndarray  # (N,) probabilities of every image of the stratum
    f_labelled: np.ndarray  # (n,) probabilities of the labelled images
    y: np.ndarray  # (n,) 0/1 labels
    clusters: np.ndarray | None = None  # (n,) poster ids of the labelled images (None: independent)
    clusters_all: np.ndarray | None = None  # (N,) poster ids of every image of the stratum


def ppi_lambda(strata: Sequence[Stratum], ddof: int = 1) -> float:
    """PPI++'s power-tuning weight, pooled over strata, clipped to [0, 1].

    lambda = sum_h n_h cov_h(y, f) / sum_h n_h (1 + n_h / N_h) var_h(f), the
    minimiser of the variance above for one stratum (Angelopoulos, Duchi &
    Zrnic 2023, eq. for mean estimation), with within-stratum moments pooled.
    With one stratum this is ``ppi_py``'s lambda for ``ppi_mean_ci``.
    """
    num = den = 0.0
    for s in strata:
        n, N = len(s.y), len(s.f_all)
        if n < 2 or N < 2:
            continue
        fc = s.f_labelled - s.f_labelled.mean()
        yc = s.y - s.y.mean()
        num += n * float((fc * yc).sum() / n)
        den += n * (1 + n / N) * float(np.var(s.f_all, ddof=1))
    if den <= 0:
        return 0.0
    return float(np.clip(num / den, 0.0, 1.0))


def explained_share(strata: Sequence[Stratum], lam: float) -> float:
    """R^2: the share of the within-stratum label variance that lambda * f explains (pooled, in [0, 1])."""
    ss_y = ss_r = 0.0
    for s in strata:
        if len(s.y) < 2:
            continue
        r = s.y - lam * s.f_labelled
        ss_y += float(((s.y - s.y.mean()) ** 2).sum())
        ss_r += float(((r - r.mean()) ** 2).sum())
    if ss_y <= 0:
        return 0.0
    return float(np.clip(1 - ss_r / ss_y, 0.0, 1.0))


def clustered_variance(x: np.ndarray, clusters: np.ndarray | None, ddof: int = 1) -> float:
    """Variance of one observation for the mean of ``x``: the plain one, or the poster-robust one when larger.

    Returned on the scale of ``var(x)`` (so ``/ len(x)`` gives the variance of
    the mean): ``m * V_CR1`` with V_CR1 the cluster-robust variance of the mean
    (Liang & Zeger 1986, small-sample factor G/(G-1)). With no poster ids, or
    fewer than 2 posters, the plain variance.
    """
    x = np.asarray(x, dtype=np.float64)
    m = len(x)
    plain = float(np.var(x, ddof=ddof)) if m > ddof else 0.0
    if clusters is None or m < 2:
        return plain
    from explore.attributes.clustering import cluster_codes

    codes = cluster_codes(clusters, m)
    g = int(codes.max()) + 1
    if g < 2 or g >= m:
        return plain
    sums = np.bincount(codes, weights=x - x.mean(), minlength=g)
    robust = g / (g - 1) * float((sums**2).sum()) / m  # m * V_CR1
    return max(plain, robust)


def stratum_estimate(
    s: Stratum, lam: float, *, r2: float = 0.0, floor: bool = True, z: float = Z95, ddof: int = 1
) -> tuple[float, float]:
    """PPI++ estimate and variance of one stratum's mean (see the module docstring).

    ``floor`` applies the small-sample floor to the residual variance; ``r2``
    is the pooled explained share used by it. ``ddof`` is the variances'
    degrees-of-freedom correction (``ppi_py`` uses 0).
    """
    n, N = len(s.y), len(s.f_all)
    if n == 0 or N == 0:
        return float("nan"), float("nan")
    resid = lam * s.f_labelled - s.y
    estimate = lam * float(s.f_all.mean()) - float(resid.mean())
    var_f = clustered_variance(s.f_all, s.clusters_all, ddof) if N > ddof else 0.0
    var_r = clustered_variance(resid, s.clusters, ddof) if n > ddof else 0.0
    if floor:
        k = float(s.y.sum())
        p = (k + z**2 / 2) / (n + z**2)
        var_r = max(var_r, (1 - r2) * p * (1 - p))
    return estimate, lam**2 * var_f / N + var_r / n


def combine(parts: Sequence[tuple[float, float]], weights: Sequence[float], z: float = Z95) -> tuple[float, float, float]:
    """Weighted sum of stratum estimates (weights = image counts, normalised) and its 95 % interval.

    The interval is clipped to [0, 1]; a missing stratum (NaN) makes the result NaN.
    """
    w = np.asarray(weights, dtype=np.float64)
    w = w / w.sum()
    est = np.array([p[0] for p in parts], dtype=np.float64)
    var = np.array([p[1] for p in parts], dtype=np.float64)
    if not np.all(np.isfinite(est)):
        return float("nan"), float("nan"), float("nan")
    e = float(w @ est)
    half = z * float(np.sqrt((w**2) @ var))
    return e, max(0.0, e - half), min(1.0, e + half)


def _stratum_meta(images: pd.DataFrame) -> pd.DataFrame:
    """Per image_id: brand, category, source (the strata) and the poster when the table has one."""
    cols = ["brand", "category", "source"] + (["poster"] if "poster" in images.columns else [])
    return images.set_index("image_id")[cols].fillna("").astype(str)


def _attribute_strata(prob: pd.DataFrame, lab: pd.DataFrame, meta: pd.DataFrame, auc_gate: bool):
    """One attribute's strata, lambda, pooled R^2 and the AUC (with DeLong interval) of its random labels."""
    f_of = dict(zip(prob["image_id"].astype(str), prob["probability"].astype(np.float64)))
    pm = prob.assign(image_id=prob["image_id"].astype(str)).join(meta, on="image_id", how="inner")
    lm = lab.assign(image_id=lab["image_id"].astype(str))
    lm = lm[lm["image_id"].isin(f_of)].join(meta, on="image_id", how="inner")
    by_cell = {k: g for k, g in lm.groupby(["brand", "category", "source"], sort=False)}
    posters = "poster" in meta.columns and (meta["poster"] != "").any()
    strata: dict[tuple, Stratum] = {}
    for key, g in pm.groupby(["brand", "category", "source"], sort=True):
        mine = by_cell.get(key, lm.iloc[0:0])
        strata[key] = Stratum(
            f_all=g["probability"].to_numpy(np.float64),
            f_labelled=np.array([f_of[i] for i in mine["image_id"]], dtype=np.float64),
            y=mine["label"].to_numpy(np.float64),
            clusters=mine["poster"].to_numpy(object) if posters else None,
            clusters_all=g["poster"].to_numpy(object) if posters else None,
        )
    lam, r2, auc = attribute_lambda(list(strata.values()), auc_gate)
    return strata, lam, r2, auc


def attribute_lambda(strata: Sequence[Stratum], auc_gate: bool = True) -> tuple[float, float, tuple]:
    """lambda, pooled R^2 and (auc, low, high) for one attribute's strata.

    With ``auc_gate``, lambda is 0 unless the DeLong 95 % interval of the AUC
    of f against all the attribute's random labels lies above 0.5.
    """
    from explore.attributes.check import auc_interval

    y = np.concatenate([s.y for s in strata]) if strata else np.zeros(0)
    f = np.concatenate([s.f_labelled for s in strata]) if strata else np.zeros(0)
    auc = auc_interval(y.astype(int), f)
    beats = bool(np.isfinite(auc[1]) and auc[1] > 0.5)
    lam = ppi_lambda(strata) if (beats or not auc_gate) else 0.0
    return lam, explained_share(strata, lam), auc


def corrected_shares(
    probabilities: pd.DataFrame,
    images: pd.DataFrame,
    labels: pd.DataFrame,
    *,
    auc_gate: bool = True,
) -> pd.DataFrame:
    """Corrected shares per brand x source, brand, category x source and category.

    Parameters
    ----------
    probabilities : long table image_id, attribute, probability (the zero-shot
        probability: nothing fitted on the labels enters it).
    images : usable images (image_id, brand, category, source[, poster]); a
        non-empty ``poster`` column makes every variance poster-robust.
    labels : *random* labels: image_id, attribute, label (0/1).
    auc_gate : use lambda = 0 when the attribute's DeLong AUC interval on its
        random labels includes 0.5 (or a class has fewer than 2 labels).

    Returns
    -------
    One row per level (brand/category), brand, category, source
    (consumer/owned/all) and attribute that has random labels: ``share``,
    ``share_low``, ``share_high`` (95 %), ``share_method``, ``share_lambda``,
    ``labels_used``, ``labels_positive``, ``labels_only``, ``labels_only_low``,
    ``labels_only_high`` (the same estimator with lambda 0), ``label_auc``,
    ``label_auc_low``, ``label_auc_high``. A group with a stratum lacking
    labels gets NaN numbers.
    """
    columns = [
        "level", "brand", "category", "source", "attribute", "share", "share_low", "share_high",
        "share_method", "share_lambda", "labels_used", "labels_positive", "labels_only",
        "labels_only_low", "labels_only_high", "label_auc", "label_auc_low", "label_auc_high",
    ]
    if labels is None or labels.empty or probabilities.empty:
        return pd.DataFrame(columns=columns)
    meta = _stratum_meta(images)
    rows = []
    for attribute, lab in labels.groupby("attribute", sort=False):
        prob = probabilities[probabilities["attribute"] == attribute]
        if prob.empty:
            continue
        strata, lam, r2, (auc, auc_low, auc_high) = _attribute_strata(prob, lab, meta, auc_gate)
        method = METHOD if lam > 0 else METHOD_LABELS_ONLY
        est = {k: stratum_estimate(s, lam, r2=r2) for k, s in strata.items()}
        only = {k: stratum_estimate(s, 0.0, r2=0.0) for k, s in strata.items()}
        for level in ("brand", "category"):
            owners = sorted({(k[0], k[1]) if level == "brand" else ("", k[1]) for k in strata})
            for brand, category in owners:
                mine = [k for k in strata if k[1] == category and (level == "category" or k[0] == brand)]
                for source in ("all", "consumer", "owned"):
                    keys = [k for k in mine if source == "all" or k[2] == source]
                    if not keys:
                        continue
                    weights = [len(strata[k].f_all) for k in keys]
                    e, lo, hi = combine([est[k] for k in keys], weights)
                    e0, lo0, hi0 = combine([only[k] for k in keys], weights)
                    used = int(sum(len(strata[k].y) for k in keys))
                    pos = int(sum(strata[k].y.sum() for k in keys))
                    rows.append((level, brand, category, source, attribute, e, lo, hi, method, lam, used, pos,
                                 e0, lo0, hi0, auc, auc_low, auc_high))
    return pd.DataFrame(rows, columns=columns)


def corrected_gaps(
    probabilities: pd.DataFrame, images: pd.DataFrame, labels: pd.DataFrame, *, auc_gate: bool = True
) -> pd.DataFrame:
    """Consumer-minus-owned corrected share per brand and attribute, with a 95 % interval.

    The two strata are independent samples, so the variances add. Columns:
    brand, category, attribute, share_gap, share_gap_low, share_gap_high
    (NaN where a source or its labels are missing).
    """
    columns = ["brand", "category", "attribute", "share_gap", "share_gap_low", "share_gap_high"]
    if labels is None or labels.empty or probabilities.empty:
        return pd.DataFrame(columns=columns)
    meta = _stratum_meta(images)
    rows = []
    for attribute, lab in labels.groupby("attribute", sort=False):
        prob = probabilities[probabilities["attribute"] == attribute]
        if prob.empty:
            continue
        strata, lam, r2, _ = _attribute_strata(prob, lab, meta, auc_gate)
        for brand, category in sorted({(k[0], k[1]) for k in strata}):
            c, o = strata.get((brand, category, "consumer")), strata.get((brand, category, "owned"))
            if c is None or o is None:
                rows.append((brand, category, attribute, np.nan, np.nan, np.nan))
                continue
            ec, vc = stratum_estimate(c, lam, r2=r2)
            eo, vo = stratum_estimate(o, lam, r2=r2)
            d, half = ec - eo, Z95 * float(np.sqrt(vc + vo))
            rows.append((brand, category, attribute, d, d - half, d + half))
    return pd.DataFrame(rows, columns=columns)

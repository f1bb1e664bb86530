"""Compare, agreement: do two brand metrics rank the brands alike?

Pair counts, Kendall's tau-b, Spearman's rho and Pearson's r per category,
attribute and pair of metrics, with exact permutation p-values for small
numbers of brands, intervals where defined, and Benjamini-Hochberg over the
family of agreement tests.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd

from explore.compare.survey import METRICS

#: Fewest brands for which rank statistics are computed.
MIN_BRANDS = 3
#: Name of the pooled rows that compare brands across all categories at once.
ALL_CATEGORIES = "all categories"


def pair_counts(x, y) -> dict:
    """Count concordant, discordant and tied brand pairs of two metrics.

    A pair of brands (i, j) is concordant when both metrics order them the
    same way, discordant when they order them oppositely, and tied when either
    metric gives the two brands the same value. Only brands with both values
    are used.

    Returns
    -------
    dict with ``n_brands``, ``pairs``, ``concordant``, ``discordant``, ``ties``
    (pairs tied in either metric), ``ties_a``, ``ties_b`` (pairs tied in x, in
    y) and ``concordant_share`` (concordant / pairs; with no ties it equals
    (1 + Kendall's tau-a) / 2).
    """
    x, y = _finite_pairs(x, y)
    n = len(x)
    i, j = np.triu_indices(n, 1)
    dx = np.sign(x[i] - x[j])
    dy = np.sign(y[i] - y[j])
    pairs = len(i)
    concordant = int(np.sum(dx * dy > 0))
    discordant = int(np.sum(dx * dy < 0))
    return {
        "n_brands": n,
        "pairs": pairs,
        "concordant": concordant,
        "discordant": discordant,
        "ties": pairs - concordant - discordant,
        "ties_a": int(np.sum(dx == 0)),
        "ties_b": int(np.sum(dy == 0)),
        "concordant_share": concordant / pairs if pairs else float("nan"),
    }


def pair_agreement(x, y, *, min_brands: int = MIN_BRANDS) -> dict:
    """Agreement of two brand metrics: pair counts plus tau-b, rho and r.

    Kendall's tau-b is computed from the pair counts,
    (C - D) / sqrt((P - T_x)(P - T_y)) (Kendall 1945); its p-value, Spearman's
    rho and Pearson's r with their p-values come from ``scipy.stats``. With
    fewer than ``min_brands`` brands, or a metric that is constant over the
    brands, the statistics are NaN and ``note`` says why.

    Returns
    -------
    dict: the keys of :func:`pair_counts` plus ``kendall_tau``, ``kendall_p``,
    ``spearman_rho``, ``spearman_p``, ``pearson_r``, ``pearson_p``, ``note``.
    """
    from scipy import stats

    out = pair_counts(x, y)
    nan = float("nan")
    out.update(
        kendall_tau=nan, kendall_p=nan, spearman_rho=nan, spearman_p=nan,
        pearson_r=nan, pearson_p=nan, note="",
    )
    n = out["n_brands"]
    if n == 0:
        out["note"] = "no brand has both values"
        return out
    if n < min_brands:
        out["note"] = f"too few brands ({n}; statistics need at least {min_brands})"
        return out
    x, y = _finite_pairs(x, y)
    constant = [name for name, v in (("first", x), ("second", y)) if np.all(v == v[0])]
    if constant:
        out["note"] = f"the {' and '.join(constant)} metric is the same for every brand; no statistics"
        return out
    p = out["pairs"]
    out["kendall_tau"] = (out["concordant"] - out["discordant"]) / math.sqrt(
        (p - out["ties_a"]) * (p - out["ties_b"])
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns about small n; the note column says it
        out["kendall_p"] = float(stats.kendalltau(x, y).pvalue)
        rho = stats.spearmanr(x, y)
        out["spearman_rho"], out["spearman_p"] = float(rho.statistic), float(rho.pvalue)
        r = stats.pearsonr(x, y)
        out["pearson_r"], out["pearson_p"] = float(r.statistic), float(r.pvalue)
    if out["ties"]:
        out["note"] = f"{out['ties']} of {p} brand pairs tied"
    return out


def _finite_pairs(x, y) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.shape != y.shape or x.ndim != 1:
        raise ValueError("both metrics must be 1-D and of the same length (one value per brand)")
    keep = np.isfinite(x) & np.isfinite(y)
    return x[keep], y[keep]


def agreement_table(metrics: pd.DataFrame, *, min_brands: int = MIN_BRANDS) -> pd.DataFrame:
    """Agreement for each category, attribute and pair of metrics.

    When the study has more than one category, rows with category
    ``"all categories"`` compare all brands at once as well.

    Parameters
    ----------
    metrics : output of :func:`brand_metrics`.

    Returns
    -------
    DataFrame with columns ``category``, ``attribute``, ``metric_a``,
    ``metric_b``, then the keys of :func:`pair_agreement`. Pairs involving the
    survey appear only when some survey score is present.
    """
    present = [m for m in METRICS if metrics[m].notna().any()]
    metric_pairs = [(a, b) for k, a in enumerate(present) for b in present[k + 1:]]
    groups = [(c, g) for c, g in metrics.groupby("category", sort=True)]
    if len(groups) > 1:
        groups.append((ALL_CATEGORIES, metrics))
    rows = []
    for category, g in groups:
        for attribute, ga in g.groupby("attribute", sort=True):
            for a, b in metric_pairs:
                stats = pair_agreement(ga[a].to_numpy(), ga[b].to_numpy(), min_brands=min_brands)
                rows.append({"category": category, "attribute": attribute, "metric_a": a, "metric_b": b, **stats})
    columns = [
        "category", "attribute", "metric_a", "metric_b", "n_brands", "pairs", "concordant",
        "discordant", "ties", "concordant_share", "kendall_tau", "kendall_p", "spearman_rho",
        "spearman_p", "pearson_r", "pearson_p", "note",
    ]
    return pd.DataFrame(rows, columns=columns)

"""Consumer-vs-owned yes-rate gaps adjusted for context, and their decomposition.

A raw gap can come from *which* contexts each source shows (the model says
yes more often in gym photos than in camp photos) rather than from how the
brand is portrayed within a context. With the contexts found by the contexts
stage as strata (the unassigned photos are a stratum of their own):

- **Mantel-Haenszel** common risk difference over contexts (Mantel & Haenszel
  1959; weights n1 n2 / N per stratum), with a Wald interval whose stratum
  variances are inflated by each source cell's poster design effect
  (:mod:`explore.attributes.clustering`); the Mantel-Haenszel odds ratio and
  the Cochran-Mantel-Haenszel test (no continuity correction; its statistic
  divided by the cells' mean design effect when posters are known) give the
  adjusted p-value. Benjamini-Hochberg over the same family as the raw gaps.
- **Kitagawa (1955) decomposition** of the raw gap, exactly additive:
  ``sum c_k r1_k - sum o_k r2_k = sum (c_k - o_k)(r1_k + r2_k)/2`` (context
  mix) ``+ sum (c_k + o_k)/2 (r1_k - r2_k)`` (within-context difference),
  with c, o the two sources' context shares and r their yes-rates per
  context. A context only one source shows has no within-context
  difference: its whole contribution counts as mix (the missing rate is set
  to the other source's).

This module takes the contexts stage's ``image_contexts`` table as an
argument and does not import it; ``explore.run`` calls it after contexts.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from explore.attributes.intervals import Z95
from explore.attributes.testing import benjamini_hochberg

ADDED_COLUMNS = [
    "contexts_used", "context_adjusted_gap", "context_adjusted_low", "context_adjusted_high",
    "context_odds_ratio", "context_p_value", "context_q_value", "context_mix_part",
    "within_context_part", "significant_before_context",
]


def mantel_haenszel(x1, n1, x2, n2, deff1=1.0, deff2=1.0, z: float = Z95) -> dict:
    """Mantel-Haenszel summaries of K 2 x 2 tables (group 1 vs 2, yes vs no).

    Parameters
    ----------
    x1, n1, x2, n2 : per-stratum yes counts and sizes of the two groups.
    deff1, deff2 : design effects of the two groups (variance inflation).

    Returns
    -------
    dict with risk_difference, low, high (Wald, 95 %), odds_ratio, chi2
    (CMH without continuity correction, divided by the mean design effect)
    and p_value. NaN where no stratum has both groups.
    """
    from scipy.stats import chi2 as chi2_dist

    x1, n1, x2, n2 = (np.asarray(a, dtype=np.float64) for a in (x1, n1, x2, n2))
    both = (n1 > 0) & (n2 > 0)
    out = {k: float("nan") for k in ("risk_difference", "low", "high", "odds_ratio", "chi2", "p_value")}
    if not both.any():
        return out
    x1, n1, x2, n2 = x1[both], n1[both], x2[both], n2[both]
    total = n1 + n2
    w = n1 * n2 / total
    p1, p2 = x1 / n1, x2 / n2
    rd = float((w * (p1 - p2)).sum() / w.sum())
    var = float((w**2 * (deff1 * p1 * (1 - p1) / n1 + deff2 * p2 * (1 - p2) / n2)).sum() / w.sum() ** 2)
    se = np.sqrt(var)
    out.update(risk_difference=rd, low=rd - z * se, high=rd + z * se)
    # Mantel-Haenszel odds ratio: sum(a d / N) / sum(b c / N).
    a, b, c, d = x1, n1 - x1, x2, n2 - x2
    num, den = (a * d / total).sum(), (b * c / total).sum()
    out["odds_ratio"] = float(num / den) if den > 0 else float("inf") if num > 0 else float("nan")
    # Cochran-Mantel-Haenszel: (sum a - E a)^2 / sum Var a, hypergeometric moments.
    yes = a + c
    expected = n1 * yes / total
    valid = total > 1
    variance = np.where(valid, n1 * n2 * yes * (total - yes) / (total**2 * np.maximum(total - 1, 1)), 0.0)
    if variance.sum() > 0:
        stat = float(((a - expected)[valid].sum()) ** 2 / variance.sum()) / ((deff1 + deff2) / 2)
        out["chi2"] = stat
        out["p_value"] = float(chi2_dist.sf(stat, 1))
    else:
        out["chi2"], out["p_value"] = 0.0, 1.0
    return out


def kitagawa(x1, n1, x2, n2) -> tuple[float, float]:
    """Kitagawa (1955) split of rate1 - rate2 into (context mix, within-context difference)."""
    x1, n1, x2, n2 = (np.asarray(a, dtype=np.float64) for a in (x1, n1, x2, n2))
    if n1.sum() == 0 or n2.sum() == 0:
        return float("nan"), float("nan")
    c, o = n1 / n1.sum(), n2 / n2.sum()
    with np.errstate(divide="ignore", invalid="ignore"):
        r1, r2 = x1 / n1, x2 / n2
    r1 = np.where(n1 > 0, r1, r2)
    r2 = np.where(n2 > 0, r2, r1)
    r1, r2 = np.nan_to_num(r1), np.nan_to_num(r2)
    mix = float(((c - o) * (r1 + r2) / 2).sum())
    within = float(((c + o) / 2 * (r1 - r2)).sum())
    return mix, within


def adjust_gaps_for_context(
    gaps: pd.DataFrame,
    image_attributes: pd.DataFrame,
    images: pd.DataFrame,
    image_contexts: pd.DataFrame,
    shares: pd.DataFrame | None = None,
    fdr: float = 0.05,
) -> pd.DataFrame:
    """``attribute_gaps`` with context-adjusted columns; ``significant`` then needs both.

    A gap stays ``significant`` only when it survived Benjamini-Hochberg raw
    (``significant_before_context``), its context-adjusted p-value survives
    Benjamini-Hochberg over the same family, and the adjusted gap has the same
    sign. Rows without both sources keep NaN and stay not significant.

    Parameters
    ----------
    gaps : attribute_gaps from :func:`explore.attributes.attribute_gaps`.
    image_attributes : long table (image_id, attribute, positive).
    images : the images table (image_id, brand, source).
    image_contexts : from the contexts stage (image_id, context_id; -1 unassigned).
    shares : attribute_shares, for each cell's ``design_effect`` (optional).
    """
    table = gaps.copy()
    for column in ADDED_COLUMNS:
        table[column] = np.nan
    table["significant_before_context"] = gaps["significant"].astype(bool)
    if table.empty or image_contexts is None or image_contexts.empty:
        return table
    calls = image_attributes[["image_id", "attribute", "positive"]].merge(
        images[["image_id", "brand", "source"]], on="image_id"
    ).merge(image_contexts[["image_id", "context_id"]], on="image_id")
    calls["positive"] = calls["positive"].astype(bool).astype(int)
    counts = calls.groupby(["brand", "attribute", "source", "context_id"])["positive"].agg(["sum", "count"])
    deff = {}
    if shares is not None and "design_effect" in shares:
        rows = shares[shares["level"] == "brand"]
        deff = {(str(b), str(a), str(s)): float(d) for b, a, s, d in
                zip(rows["brand"], rows["attribute"], rows["source"], rows["design_effect"])}
    contexts = sorted(set(image_contexts["context_id"]))
    results = []
    for i, row in table.iterrows():
        key = (row["brand"], row["attribute"])
        try:
            cells = {s: counts.loc[key + (s,)].reindex(contexts, fill_value=0) for s in ("consumer", "owned")}
        except KeyError:
            results.append(None)
            continue
        x1, n1 = cells["consumer"]["sum"].to_numpy(), cells["consumer"]["count"].to_numpy()
        x2, n2 = cells["owned"]["sum"].to_numpy(), cells["owned"]["count"].to_numpy()
        d1 = deff.get((str(row["brand"]), str(row["attribute"]), "consumer"), 1.0)
        d2 = deff.get((str(row["brand"]), str(row["attribute"]), "owned"), 1.0)
        mh = mantel_haenszel(x1, n1, x2, n2, d1, d2)
        mix, within = kitagawa(x1, n1, x2, n2)
        results.append((int(((n1 > 0) & (n2 > 0)).sum()), mh, mix, within))
    for i, res in zip(table.index, results):
        if res is None:
            continue
        used, mh, mix, within = res
        table.loc[i, "contexts_used"] = used
        table.loc[i, "context_adjusted_gap"] = mh["risk_difference"]
        table.loc[i, "context_adjusted_low"] = mh["low"]
        table.loc[i, "context_adjusted_high"] = mh["high"]
        table.loc[i, "context_odds_ratio"] = mh["odds_ratio"]
        table.loc[i, "context_p_value"] = mh["p_value"]
        table.loc[i, "context_mix_part"] = mix
        table.loc[i, "within_context_part"] = within
    table["context_q_value"] = benjamini_hochberg(table["context_p_value"].to_numpy(np.float64))
    same_sign = np.sign(table["context_adjusted_gap"]) == np.sign(table["yes_rate_gap"])
    table["significant"] = (
        table["significant_before_context"] & (table["context_q_value"] <= fdr) & same_sign
    ).astype(bool)
    return table

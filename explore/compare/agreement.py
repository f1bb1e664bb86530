"""Compare, agreement: do two brand metrics rank the brands alike?

Pair counts, Kendall's tau-b, Spearman's rho and Pearson's r per category,
attribute and pair of metrics, with exact permutation p-values for small
numbers of brands, intervals where defined, and Benjamini-Hochberg over the
family of agreement tests.
"""

from __future__ import annotations

import functools
import math
import warnings

import numpy as np
import pandas as pd

from explore.compare.survey import METRICS

#: Fewest brands for a brand map (and the old floor for any statistic).
MIN_BRANDS = 3
#: Fewest brands for correlations, p-values and intervals; below it, counts only.
MIN_TEST_BRANDS = 5
#: Up to this many brands p-values are exact (all n! orderings); above, large-sample.
EXACT_MAX_BRANDS = 10
#: False discovery rate for the agreement family (Benjamini-Hochberg).
AGREEMENT_FDR = 0.05
#: Statistic columns of the agreement table (NaN when not computed).
STAT_COLUMNS = (
    "kendall_tau", "kendall_low", "kendall_high", "kendall_p",
    "spearman_rho", "spearman_low", "spearman_high", "spearman_p",
    "pearson_r", "pearson_low", "pearson_high", "pearson_p",
)
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


def pair_agreement(x, y, *, min_brands: int = MIN_TEST_BRANDS) -> dict:
    """Agreement of two brand metrics: pair counts, then (from ``min_brands``) tau-b, rho, r.

    Kendall's tau-b is computed from the pair counts,
    (C - D) / sqrt((P - T_x)(P - T_y)) (Kendall 1945); Spearman's rho and
    Pearson's r from ``scipy.stats``. With fewer than ``min_brands`` brands
    (5 by default) only the counts are given: with 3 or 4 brands a rank
    correlation can take only a handful of values and no test can reach the
    usual levels (the smallest exact p with 3 brands is 1/3). A metric that
    is constant over the brands gets no statistics either; ``note`` says why.

    p-values are exact permutation p-values (every ordering of the second
    metric against the first, two-sided: the share of orderings whose
    statistic is at least as far from 0 as the observed one; Pitman 1937)
    with up to ``EXACT_MAX_BRANDS`` brands, and scipy's large-sample p-values
    above (``p_method`` says which). Intervals (95 %): Fisher's z for r,
    and z with the standard errors of Fieller, Hartley and Pearson (1957)
    for rho (sqrt(1.06 / (n - 3))) and tau (sqrt(0.437 / (n - 4))).

    Returns
    -------
    dict: the keys of :func:`pair_counts` plus ``kendall_tau``,
    ``kendall_low``, ``kendall_high``, ``kendall_p``, ``spearman_rho``,
    ``spearman_low``, ``spearman_high``, ``spearman_p``, ``pearson_r``,
    ``pearson_low``, ``pearson_high``, ``pearson_p``, ``p_method``, ``note``.
    """
    from scipy import stats

    out = pair_counts(x, y)
    nan = float("nan")
    out.update({key: nan for key in STAT_COLUMNS})
    out.update(p_method="", note="")
    n = out["n_brands"]
    if n == 0:
        out["note"] = "no brand has both values"
        return out
    if n < min_brands:
        out["note"] = f"counts only: {n} brand(s); correlations and p-values need at least {min_brands}"
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
        out["spearman_rho"] = float(stats.spearmanr(x, y).statistic)
        out["pearson_r"] = float(stats.pearsonr(x, y).statistic)
        if n <= EXACT_MAX_BRANDS:
            exact = exact_permutation_pvalues(x, y)
            out["kendall_p"], out["spearman_p"], out["pearson_p"] = exact["kendall"], exact["spearman"], exact["pearson"]
            out["p_method"] = f"exact permutation (all {math.factorial(n):,} orderings)"
        else:
            out["kendall_p"] = float(stats.kendalltau(x, y).pvalue)
            out["spearman_p"] = float(stats.spearmanr(x, y).pvalue)
            out["pearson_p"] = float(stats.pearsonr(x, y).pvalue)
            out["p_method"] = "large-sample (scipy)"
    for name, se in (("kendall", _fieller_se(n, 0.437, 4)), ("spearman", _fieller_se(n, 1.06, 3)),
                     ("pearson", _fieller_se(n, 1.0, 3))):
        value = out[{"kendall": "kendall_tau", "spearman": "spearman_rho", "pearson": "pearson_r"}[name]]
        out[f"{name}_low"], out[f"{name}_high"] = fisher_z_interval(value, se)
    if out["ties"]:
        out["note"] = f"{out['ties']} of {p} brand pairs tied"
    return out


def _fieller_se(n: int, numerator: float, offset: int) -> float:
    return math.sqrt(numerator / (n - offset)) if n > offset else float("nan")


def fisher_z_interval(value: float, se: float, z: float = 1.959963984540054) -> tuple[float, float]:
    """95 % interval tanh(atanh(value) +- z * se) for a correlation (Fisher 1921).

    With se = 1 / sqrt(n - 3) it is the usual interval for Pearson's r; with
    Fieller, Hartley and Pearson's (1957) standard errors it serves Spearman's
    rho and Kendall's tau. A correlation of exactly +-1 gives [value, value]
    (the transform is infinite there: the interval is not informative).
    """
    if not (math.isfinite(value) and math.isfinite(se)):
        return float("nan"), float("nan")
    if abs(value) >= 1.0:
        return float(value), float(value)
    centre = math.atanh(value)
    return math.tanh(centre - z * se), math.tanh(centre + z * se)


@functools.lru_cache(maxsize=2)
def _all_orderings(n: int) -> np.ndarray:
    """Every permutation of range(n), one per row (n! rows; 3,628,800 for n = 10).

    Built by inserting the value k at every position of each ordering of
    0..k-1, in numpy, so n = 10 takes a fraction of a second.
    """
    if n > EXACT_MAX_BRANDS:
        raise ValueError(f"exact enumeration is limited to {EXACT_MAX_BRANDS} brands, not {n}")
    orders = np.zeros((1, 1), dtype=np.int8)
    for k in range(1, n):
        rows = len(orders)
        grown = np.empty(((k + 1) * rows, k + 1), dtype=np.int8)
        for pos in range(k + 1):
            block = grown[pos * rows:(pos + 1) * rows]
            block[:, :pos] = orders[:, :pos]
            block[:, pos] = k
            block[:, pos + 1:] = orders[:, pos:]
        orders = grown
    return orders[:, :n] if n else np.zeros((1, 0), dtype=np.int8)


def _kendall_scores(codes: np.ndarray, sx: np.ndarray, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    """C - D of each row of ``codes`` (integer rank codes of y, one ordering per row) against x."""
    s = np.zeros(len(codes), dtype=np.int16)
    for k in range(len(i)):
        if sx[k]:
            d = np.sign(codes[:, i[k]] - codes[:, j[k]]).astype(np.int16)
            s += d if sx[k] > 0 else -d
    return s


@functools.lru_cache(maxsize=64)
def _rank_null(x_codes: tuple, y_codes: tuple) -> tuple[np.ndarray, np.ndarray]:
    """Sorted |C - D| and |sum of rank z-products| over all orderings of y against x.

    Both depend only on the rank patterns, so the null distributions are
    cached: every tie-free comparison of n brands shares one enumeration.
    """
    from scipy.stats import rankdata

    xc = np.asarray(x_codes, dtype=np.int16)
    yc = np.asarray(y_codes, dtype=np.int16)
    n = len(xc)
    i, j = np.triu_indices(n, 1)
    sx = np.sign(xc[i] - xc[j])
    rx, ry = rankdata(xc), rankdata(yc)
    zx = (rx - rx.mean()) / rx.std()
    zy = (ry - ry.mean()) / ry.std()
    kendall, spearman = [], []
    orders = _all_orderings(n)
    for start in range(0, len(orders), 400_000):
        block = orders[start:start + 400_000]
        kendall.append(np.abs(_kendall_scores(yc[block].astype(np.int8), sx, i, j)))
        spearman.append(np.abs(zy[block] @ zx))
    return np.sort(np.concatenate(kendall)), np.sort(np.concatenate(spearman))


def _share_at_least(null_sorted: np.ndarray, observed: float) -> float:
    # a relative tolerance so that orderings equal to the observed one count despite rounding
    tol = 1e-9 * max(1.0, abs(observed))
    below = np.searchsorted(null_sorted, abs(observed) - tol, side="left")
    return float(len(null_sorted) - below) / len(null_sorted)


def exact_permutation_pvalues(x, y, *, chunk: int = 400_000) -> dict:
    """Two-sided exact permutation p-values of Kendall's tau-b, Spearman's rho and Pearson's r.

    Every one of the n! orderings of ``y`` against ``x`` is equally likely
    when the two metrics are unrelated (exchangeability); the p-value is the
    share of orderings whose statistic is at least as large in absolute value
    as the observed one (the observed ordering included, so p >= 1 / n!, and
    with 3 brands p >= 2/6 = 1/3, since the reversed ordering ties it). Ties
    keep their pattern under permutation, so tau-b's denominator is fixed and
    its numerator C - D is enough; likewise rho's and r's denominators.

    Returns
    -------
    dict with ``kendall``, ``spearman``, ``pearson`` p-values.
    """
    from scipy.stats import rankdata

    x, y = _finite_pairs(x, y)
    n = len(x)
    if n > EXACT_MAX_BRANDS:
        raise ValueError(f"exact enumeration is limited to {EXACT_MAX_BRANDS} brands, not {n}")
    order = np.argsort(x, kind="stable")  # canonical form: the null does not depend on the brands' order
    x, y = x[order], y[order]
    x_codes = tuple(int(v) for v in rankdata(x, method="dense"))
    y_codes_obs = rankdata(y, method="dense").astype(int)
    kendall_null, spearman_null = _rank_null(x_codes, tuple(sorted(y_codes_obs)))
    # observed statistics on the same scale as the null (the null enumerates the sorted y codes)
    i, j = np.triu_indices(n, 1)
    s_obs = float(np.sign(y[i] - y[j]) @ np.sign(x[i] - x[j]))
    rx, ry = rankdata(x), rankdata(y)
    rho_obs = float(((rx - rx.mean()) / rx.std()) @ ((ry - ry.mean()) / ry.std()))
    zx = (x - x.mean()) / x.std()
    zy = (y - y.mean()) / y.std()
    r_obs = abs(float(zx @ zy))
    hits = 0
    orders = _all_orderings(n)
    tol = 1e-9 * max(1.0, r_obs)
    for start in range(0, len(orders), chunk):
        hits += int(np.sum(np.abs(zy[orders[start:start + chunk]] @ zx) >= r_obs - tol))
    return {
        "kendall": _share_at_least(kendall_null, s_obs),
        "spearman": _share_at_least(spearman_null, rho_obs),
        "pearson": hits / len(orders),
    }


def _finite_pairs(x, y) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.shape != y.shape or x.ndim != 1:
        raise ValueError("both metrics must be 1-D and of the same length (one value per brand)")
    keep = np.isfinite(x) & np.isfinite(y)
    return x[keep], y[keep]


def agreement_table(
    metrics: pd.DataFrame, *, min_brands: int = MIN_TEST_BRANDS, fdr: float = AGREEMENT_FDR
) -> pd.DataFrame:
    """Agreement for each category, attribute and pair of metrics, with BH over the family.

    When the study has more than one category, rows with category
    ``"all categories"`` compare all brands at once as well.

    The family of agreement tests is every row of this table with a p-value
    (at least ``min_brands`` brands and no constant metric). Each statistic's
    p-values are adjusted by Benjamini-Hochberg (1995) over that family
    (``kendall_q``, ``spearman_q``, ``pearson_q``); ``significant`` is
    Kendall's tau-b (the statistic the pair counts describe) with
    ``kendall_q <= fdr``. ``family`` names the family and its size on each
    tested row.

    Parameters
    ----------
    metrics : output of :func:`brand_metrics`.
    min_brands : fewest brands for correlations and p-values (counts only below).
    fdr : false discovery rate for ``significant``.

    Returns
    -------
    DataFrame with columns ``category``, ``attribute``, ``metric_a``,
    ``metric_b``, then the keys of :func:`pair_agreement`, the q-values,
    ``family`` and ``significant``. Pairs involving the survey appear only
    when some survey score is present.
    """
    from explore.contexts import benjamini_hochberg

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
    columns = AGREEMENT_COLUMNS
    table = pd.DataFrame(rows, columns=[c for c in columns if c not in ("kendall_q", "spearman_q", "pearson_q", "family", "significant")])
    tested = table["kendall_p"].notna()
    m = int(tested.sum())
    for name in ("kendall", "spearman", "pearson"):
        table[f"{name}_q"] = benjamini_hochberg(table[f"{name}_p"].to_numpy(dtype=float)) if len(table) else []
    table["family"] = np.where(tested, family_name(m, min_brands), "")
    table["significant"] = (table["kendall_q"] <= fdr).fillna(False).astype(bool) if len(table) else []
    return table[columns]


def family_name(m: int, min_brands: int = MIN_TEST_BRANDS) -> str:
    """How the family of agreement tests is named in the table, the notes and the report."""
    return (f"agreement tests: every category x attribute x metric pair with at least {min_brands} brands "
            f"(m = {m}, Benjamini-Hochberg)")


AGREEMENT_COLUMNS = [
    "category", "attribute", "metric_a", "metric_b", "n_brands", "pairs", "concordant",
    "discordant", "ties", "concordant_share", *STAT_COLUMNS, "p_method",
    "kendall_q", "spearman_q", "pearson_q", "family", "significant", "note",
]

"""Poster-aware intervals for yes-rates and gaps: photos clustered by poster.

Several photos by one poster are more alike than photos by different posters,
so n photos carry less information than n independent draws. Every function
here takes an optional array of cluster ids (the images table's ``poster``)
and returns the same numbers as the photo-independent methods when it is
absent (or every photo has its own poster).

Method (named, published):

- Variance of a yes-rate (a ratio mean over clusters) by Taylor linearisation,
  clusters drawn with replacement: ``v = C / (C - 1) * sum_i (y_i - p m_i)^2 / n^2``
  (Kish 1965, *Survey Sampling*, ch. 6; Cochran 1977, ch. 6), with ``y_i``
  positives and ``m_i`` photos of poster i, ``C`` posters.
- Design effect ``deff = v / v_srs`` with ``v_srs = p (1 - p) / (n - 1)`` (the
  simple-random-sample variance estimate s^2 / n), truncated below at 1 and
  set to 1 when p is 0 or 1 (Korn & Graubard 1998); effective n = n / deff
  (Kish 1965).
- Interval: Wilson's score interval on the Korn & Graubard (1998)
  degrees-of-freedom-adjusted effective n, ``n_df = n_eff * (t(n-1) / t(C-1))^2``
  (t quantiles at 0.975), with x = p * n_df positives. Dean & Pagano (2015,
  J. Survey Statistics and Methodology) found Wilson with this adjustment
  among the best for clustered proportions (from memory).
- Gaps (consumer minus owned, independent samples): Newcombe's (1998) hybrid
  score interval built from those two Wilson intervals, and a two-sided
  two-proportion z-test on the same adjusted n's (with independent photos:
  Pearson's chi-square test without continuity correction; with posters a
  design-effect correction in the spirit of Rao & Scott 1981).

A cell with fewer than two posters cannot show between-poster variation: its
photos are treated as independent within the one poster (the estimand is
then that poster's yes-rate), and ``clustering_note`` says so.

All functions are pure and vectorised over attributes: ``values`` is an
(n,) or (n, k) array of 0/1 calls, one column per attribute.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from explore.attributes.intervals import Z95, wilson_interval


@dataclass
class ClusterSummary:
    """Per-attribute design summary of one group of photos (arrays of length k)."""

    n: int
    posters: int  # distinct clusters (unknown posters count one each)
    known_posters: bool  # at least one photo has a poster id
    rate: np.ndarray
    design_effect: np.ndarray
    effective_n: np.ndarray
    interval_n: np.ndarray  # Korn-Graubard df-adjusted effective n, used for intervals and tests


def cluster_codes(clusters, n: int) -> np.ndarray:
    """Integer cluster codes; a missing or empty id makes that photo its own cluster."""
    if clusters is None:
        return np.arange(n)
    ids = np.asarray(clusters, dtype=object)
    if len(ids) != n:
        raise ValueError(f"{len(ids)} cluster ids for {n} photos")
    keys = np.array(["" if v is None or (isinstance(v, float) and np.isnan(v)) else str(v) for v in ids], dtype=object)
    unknown = keys == ""
    keys = keys.astype(str)
    keys = np.where(unknown, np.char.add("\x00photo", np.arange(n).astype(str)), np.char.add("p:", keys))
    return np.unique(keys, return_inverse=True)[1]


def cluster_summary(values, clusters=None) -> ClusterSummary:
    """Yes-rate, design effect and effective n of a group (see the module docstring).

    Parameters
    ----------
    values : (n,) or (n, k) 0/1 calls.
    clusters : optional (n,) poster ids ("" or None = unknown, its own cluster).
    """
    v = np.asarray(values, dtype=np.float64)
    if v.ndim == 1:
        v = v[:, None]
    n, k = v.shape
    known = clusters is not None and any(str(c) not in ("", "None", "nan") for c in np.asarray(clusters, dtype=object))
    codes = cluster_codes(clusters, n)
    posters = int(codes.max()) + 1 if n else 0
    nan = np.full(k, np.nan)
    if n == 0:
        return ClusterSummary(0, 0, known, nan, nan, nan, nan)
    rate = v.mean(axis=0)
    deff = np.ones(k)
    if posters >= 2 and posters < n and n >= 2:
        y = np.zeros((posters, k))
        np.add.at(y, codes, v)
        m = np.bincount(codes, minlength=posters).astype(np.float64)
        resid = y - m[:, None] * rate[None, :]
        v_cluster = posters / (posters - 1) * (resid**2).sum(axis=0) / n**2
        v_srs = rate * (1 - rate) / (n - 1)
        inner = (rate > 0) & (rate < 1)
        with np.errstate(divide="ignore", invalid="ignore"):
            deff = np.where(inner, np.maximum(v_cluster / v_srs, 1.0), 1.0)
    effective = n / deff
    return ClusterSummary(n, posters, known, rate, deff, effective, interval_n(n, effective, posters))


def clustering_note(summary: ClusterSummary) -> str:
    """One short phrase saying how photos were treated."""
    if not summary.known_posters:
        return "no poster ids: photos assumed independent"
    if summary.posters < 2:
        return "one poster: photos treated as independent within it"
    return f"{summary.posters} posters (Kish design effect, Korn-Graubard df)"


def yes_rate_interval(values, clusters=None, z: float = Z95):
    """Poster-aware 95 % interval of the yes-rate.

    Returns
    -------
    (low, high, summary): Wilson on the Korn-Graubard adjusted effective n.
    """
    s = cluster_summary(values, clusters)
    low, high = wilson_interval(s.rate * s.interval_n, s.interval_n, z)
    # Exact ends stay exact (Wilson gives 0 / 1 there).
    low = np.where(s.rate == 0, 0.0, low)
    high = np.where(s.rate == 1, 1.0, high)
    return low, high, s


def interval_n(n, effective_n, posters) -> np.ndarray:
    """Korn-Graubard (1998) df-adjusted effective n from a table's n, effective_n, posters.

    ``effective_n * (t(n-1) / t(posters-1))^2`` at 0.975, unchanged when there
    are fewer than two posters or every photo has its own.
    """
    from scipy.stats import t as student_t

    n = np.asarray(n, dtype=np.float64)
    e = np.asarray(effective_n, dtype=np.float64)
    c = np.asarray(posters, dtype=np.float64)
    use = (c >= 2) & (c < n)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = (student_t.ppf(0.975, np.maximum(n - 1, 1)) / student_t.ppf(0.975, np.maximum(c - 1, 1))) ** 2
    return np.where(use, e * ratio, e)


def gap_interval(rate1, n1, rate2, n2, z: float = Z95):
    """Newcombe (1998, method 10) interval of rate1 - rate2 on adjusted effective n's."""
    p1, p2 = np.asarray(rate1, dtype=np.float64), np.asarray(rate2, dtype=np.float64)
    n1, n2 = np.asarray(n1, dtype=np.float64), np.asarray(n2, dtype=np.float64)
    l1, u1 = wilson_interval(p1 * n1, n1, z)
    l2, u2 = wilson_interval(p2 * n2, n2, z)
    l1, u1 = np.where(p1 == 0, 0.0, l1), np.where(p1 == 1, 1.0, u1)
    l2, u2 = np.where(p2 == 0, 0.0, l2), np.where(p2 == 1, 1.0, u2)
    d = p1 - p2
    low = d - np.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2)
    high = d + np.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)
    return low, high


def gap_test(rate1, n1, rate2, n2) -> np.ndarray:
    """Two-sided p-value of rate1 == rate2: pooled two-proportion z-test on adjusted n's.

    With independent photos this is Pearson's chi-square test of the 2 x 2
    table without continuity correction.
    """
    from scipy.stats import norm

    p1, p2 = np.asarray(rate1, dtype=np.float64), np.asarray(rate2, dtype=np.float64)
    n1, n2 = np.asarray(n1, dtype=np.float64), np.asarray(n2, dtype=np.float64)
    pooled = (p1 * n1 + p2 * n2) / (n1 + n2)
    se = np.sqrt(pooled * (1 - pooled) * (1 / n1 + 1 / n2))
    with np.errstate(divide="ignore", invalid="ignore"):
        zstat = (p1 - p2) / se
    p = 2 * norm.sf(np.abs(zstat))
    # Both samples all-yes or all-no: no evidence of a difference.
    return np.where(se > 0, p, 1.0)

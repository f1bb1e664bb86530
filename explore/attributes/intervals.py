"""Intervals for proportions, differences of proportions and means.

Wilson score intervals (Wilson 1927), Newcombe's hybrid score interval for a
difference of independent proportions (Newcombe 1998, method 10) and seeded
percentile bootstrap intervals of means (Efron 1979).
"""

from __future__ import annotations

import zlib

import numpy as np

#: Two-sided 95 % normal quantile, scipy.stats.norm.ppf(0.975).
Z95 = 1.959963984540054


def wilson_interval(count, n, z: float = Z95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for a binomial proportion (Wilson 1927).

    Parameters
    ----------
    count, n : positives and trials (scalars or arrays). n == 0 gives NaN.

    Returns
    -------
    (low, high) arrays.
    """
    count = np.asarray(count, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = count / n
        denom = 1.0 + z**2 / n
        centre = (p + z**2 / (2 * n)) / denom
        half = z / denom * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2))
        # At the ends the bounds are exactly 0 and 1 (the formula leaves rounding dust).
        low = np.where(n == 0, np.nan, np.where(count == 0, 0.0, centre - half))
        high = np.where(n == 0, np.nan, np.where(count == n, 1.0, centre + half))
    return low, high


def newcombe_interval(count1, n1, count2, n2, z: float = Z95) -> tuple[np.ndarray, np.ndarray]:
    """Hybrid score interval for p1 - p2 from two independent samples.

    Newcombe (1998), "Interval estimation for the difference between
    independent proportions", method 10: built from the two Wilson intervals.
    """
    p1 = np.asarray(count1, dtype=np.float64) / np.asarray(n1, dtype=np.float64)
    p2 = np.asarray(count2, dtype=np.float64) / np.asarray(n2, dtype=np.float64)
    l1, u1 = wilson_interval(count1, n1, z)
    l2, u2 = wilson_interval(count2, n2, z)
    d = p1 - p2
    low = d - np.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2)
    high = d + np.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)
    return low, high


def bootstrap_sums(
    values: np.ndarray,
    samples: int,
    rng: np.random.Generator,
    chunk_elements: int = 4_000_000,
) -> np.ndarray:
    """Column sums of ``samples`` bootstrap resamples of the rows of ``values``.

    The same resamples of rows serve every column, so one draw covers all
    attributes of a group. Drawn in chunks of bounded memory.

    Parameters
    ----------
    values : (n, k) array.
    samples : number of resamples.
    rng : seeded generator.

    Returns
    -------
    (samples, k) float64 sums.
    """
    v = np.asarray(values, dtype=np.float64)
    n, k = v.shape
    sums = np.zeros((samples, k))
    if n == 0:
        return sums
    rows = max(1, chunk_elements // n)
    for start in range(0, samples, rows):
        b = min(rows, samples - start)
        draws = rng.integers(0, n, size=(b, n))
        if k <= 8:  # gathering each column is faster than building count weights
            for j in range(k):
                sums[start:start + b, j] = v[:, j][draws].sum(axis=1)
        else:  # count weights times the value matrix: one matrix product for all columns
            counts = np.bincount((draws + n * np.arange(b)[:, None]).ravel(), minlength=b * n)
            sums[start:start + b] = counts.reshape(b, n).astype(np.float64) @ v
    return sums


def bootstrap_mean_interval(
    values: np.ndarray,
    samples: int,
    rng: np.random.Generator,
    level: float = 0.95,
    chunk_elements: int = 4_000_000,
) -> tuple[np.ndarray, np.ndarray]:
    """Percentile bootstrap interval of the column means of ``values`` (Efron 1979).

    Parameters
    ----------
    values : (n,) or (n, k) array.
    samples : number of bootstrap resamples.
    rng : seeded generator.

    Returns
    -------
    (low, high), each (k,) (or scalars for 1-d input); NaN when n == 0.
    """
    v = np.asarray(values, dtype=np.float64)
    flat = v.ndim == 1
    if flat:
        v = v[:, None]
    n, k = v.shape
    if n == 0 or samples < 1:
        nan = np.full(k, np.nan)
        return (nan[0], nan[0]) if flat else (nan, nan)
    means = bootstrap_sums(v, samples, rng, chunk_elements) / n
    low, high = _percentiles(means, level)
    return (low[0], high[0]) if flat else (low, high)


def _percentiles(means: np.ndarray, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    alpha = (1 - level) / 2
    low, high = np.quantile(means, [alpha, 1 - alpha], axis=0)
    return low, high


def _group_rng(seed: int, key: tuple) -> np.random.Generator:
    """A generator that depends on the study seed and the group, never on table order."""
    return np.random.default_rng([int(seed) & 0xFFFFFFFF, zlib.crc32(repr(key).encode("utf-8"))])

"""Multiple testing and power for attribute gaps.

- Benjamini & Hochberg (1995) step-up adjusted p-values (q-values) over a
  named family of tests, so "significant" means: survives false-discovery
  control at the stated level over the whole family.
- Minimum detectable gap: the smallest consumer-minus-owned difference a
  two-sided test at level alpha detects with the given power, for the
  cell's n (or effective n). Computed on Cohen's arcsine scale
  (h = 2 asin sqrt(p1) - 2 asin sqrt(p2); Cohen 1988, ch. 6), the normal
  approximation statsmodels' ``NormalIndPower`` also uses: h = (z(1 - alpha/2)
  + z(power)) * sqrt(1/n1 + 1/n2); the two yes-rates are placed symmetrically
  on the arcsine scale around the cell's pooled yes-rate.
"""

from __future__ import annotations

import numpy as np

#: A gap that a useful study should be able to detect: 10 points (common practice
#: in brand tracking; a rule of thumb, not a published constant).
DETECTABLE_GAP = 0.10


def benjamini_hochberg(p_values) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p-values; NaN entries are not in the family.

    q_(i) = min over j >= i of m p_(j) / j, capped at 1 (step-up).
    """
    p = np.asarray(p_values, dtype=np.float64)
    q = np.full(p.shape, np.nan)
    tested = ~np.isnan(p)
    m = int(tested.sum())
    if m == 0:
        return q
    values = p[tested]
    order = np.argsort(values, kind="mergesort")
    scaled = values[order] * m / np.arange(1, m + 1)
    adjusted = np.minimum.accumulate(scaled[::-1])[::-1]
    out = np.empty(m)
    out[order] = np.minimum(adjusted, 1.0)
    q[tested] = out
    return q


def minimum_detectable_gap(n1, n2, base_rate, alpha: float = 0.05, power: float = 0.8) -> np.ndarray:
    """Smallest |rate1 - rate2| detected with ``power`` by a two-sided level-``alpha`` test.

    Parameters
    ----------
    n1, n2 : sample sizes (photos or effective n), arrays or scalars.
    base_rate : the pooled yes-rate the two rates are centred on (arcsine scale).

    Returns
    -------
    Gaps in [0, 1]; NaN where a sample is empty. At the ends of the scale the
    detectable gap is limited by 0 and 1 and may then be the whole range.
    """
    from scipy.stats import norm

    n1 = np.asarray(n1, dtype=np.float64)
    n2 = np.asarray(n2, dtype=np.float64)
    base = np.clip(np.asarray(base_rate, dtype=np.float64), 0.0, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        h = (norm.ppf(1 - alpha / 2) + norm.ppf(power)) * np.sqrt(1 / n1 + 1 / n2)
    centre = np.arcsin(np.sqrt(base))
    half = h / 4
    # Keep both ends on [0, pi/2]: shift the pair inwards when it would fall off.
    low_angle = np.clip(centre - half, 0.0, None)
    high_angle = np.clip(low_angle + 2 * half, None, np.pi / 2)
    low_angle = np.clip(high_angle - 2 * half, 0.0, None)
    gap = np.sin(high_angle) ** 2 - np.sin(low_angle) ** 2
    return np.where((n1 > 0) & (n2 > 0), gap, np.nan)


def power_warning(detectable_effective, gap: float = DETECTABLE_GAP) -> np.ndarray:
    """Plain warning where a cell cannot detect a ``gap`` (10 points) at 80 % power."""
    d = np.asarray(detectable_effective, dtype=np.float64)
    text = (
        f"too few photos (or posters) to detect a {round(gap * 100)}-point gap "
        f"at 80 % power"
    )
    return np.where(np.isnan(d) | (d > gap), text, "")

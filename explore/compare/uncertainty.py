"""Compare, map uncertainty: PROTEST for each Procrustes comparison, and a
bootstrap of every brand's map position and consumer-to-owned displacement.

- PROTEST (Jackson 1995, Ecoscience 2:297-303): is the owned (or survey) map
  more like the consumer map than two unrelated maps of the same brands?
  The brand labels of one map are permuted; the p-value is the share of
  orderings whose Procrustes disparity is at most the observed one. Up to
  ``PROTEST_EXACT_MAX`` brands every ordering is enumerated (exact); above,
  ``permutations`` seeded random orderings with p = (1 + hits) / (1 +
  permutations), the convention of vegan's ``protest``.
- Bootstrap (Efron and Tibshirani 1993): photos are resampled with
  replacement within each brand x source cell (whole posters instead, when
  the images table has a non-empty ``poster`` column: a cluster bootstrap,
  Davison and Hinkley 1997, section 3.8), the brand shares and both maps are
  recomputed exactly as for the main maps, and each replicate map is put
  onto the main map by Procrustes (rotation, reflection, scale and shift are
  arbitrary in a PCA; Milan and Whittaker 1995). The spread of the replicate
  positions gives a 95 % range and ellipse per brand, the spread of the
  replicate displacements a 95 % range, and the share of replicates in which
  a brand moves most says whether "moves most" is a finding.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd

from explore.compare.agreement import MIN_BRANDS
from explore.compare.maps import pca, procrustes, standardise

#: Up to this many brands PROTEST enumerates every ordering (8! = 40,320).
PROTEST_EXACT_MAX = 8
#: Random orderings above PROTEST_EXACT_MAX brands (vegan's default is 999).
PROTEST_PERMUTATIONS = 9999
#: Bootstrap replicates of the brand maps.
MAP_REPLICATES = 500
#: "Moves most" is named only when the brand moves most in at least this share of replicates.
MOVES_MOST_SHARE = 0.8
#: chi-square(2) 95 % quantile: a 95 % normal-theory ellipse has half-axes sqrt(5.991 x eigenvalue).
CHI2_2_95 = 5.991464547107979

BOOTSTRAP_COLUMNS = [
    "source", "brand", "replicates", "resampled", "x_low", "x_high", "y_low", "y_high",
    "ellipse_width", "ellipse_height", "ellipse_angle",
    "aligned_x_low", "aligned_x_high", "aligned_y_low", "aligned_y_high",
    "aligned_ellipse_width", "aligned_ellipse_height", "aligned_ellipse_angle",
]


# --------------------------------------------------------------------------
# PROTEST


def _unit(configuration: np.ndarray) -> np.ndarray:
    c = np.asarray(configuration, dtype=float)
    c = c - c.mean(axis=0)
    norm = np.linalg.norm(c)
    if norm == 0:
        raise ValueError("protest: a configuration has all points in one place")
    return c / norm


def _disparities(a: np.ndarray, b: np.ndarray, orders: np.ndarray) -> np.ndarray:
    """Procrustes disparity 1 - (trace of the singular values of B_perm^T A)^2 for each row order of b.

    With both configurations centred and scaled to unit norm this is the
    squared Procrustes distance m^2 (Gower 1971), the quantity
    ``scipy.spatial.procrustes`` returns; permuting rows changes neither the
    mean nor the norm, so a and b are standardised once.
    """
    cross = np.einsum("pni,nj->pij", b[orders], a)
    nuclear = np.linalg.svd(cross, compute_uv=False).sum(axis=1)
    return np.clip(1.0 - nuclear**2, 0.0, None)


def protest(target, moving, *, permutations: int = PROTEST_PERMUTATIONS, seed: int = 0,
            exact_max: int = PROTEST_EXACT_MAX) -> dict:
    """PROTEST (Jackson 1995): permutation test of a Procrustes fit of ``moving`` onto ``target``.

    Parameters
    ----------
    target, moving : (n, k) configurations, row i = the same brand.
    permutations : random orderings when n > exact_max.
    seed : seeds the random orderings.
    exact_max : enumerate all n! orderings up to this many rows.

    Returns
    -------
    dict with ``disparity`` (m^2 of the observed fit), ``correlation`` (the
    symmetric Procrustes correlation sqrt(1 - m^2)), ``p_value`` (one-sided:
    fits at least as good as the observed one), ``permutations`` (orderings
    used, the observed one included for the exact test) and ``method``.
    """
    a, b = _unit(target), _unit(moving)
    if a.shape != b.shape:
        raise ValueError(f"protest: shapes differ ({a.shape} vs {b.shape})")
    n = len(a)
    observed = float(_disparities(a, b, np.arange(n)[None, :])[0])
    tol = 1e-10
    if n <= exact_max:
        orders = np.array(list(itertools.permutations(range(n))), dtype=np.int64)
        hits = int(np.sum(_disparities(a, b, orders) <= observed + tol))
        p, used, method = hits / len(orders), len(orders), f"exact (all {len(orders):,} orderings of the brands)"
    else:
        rng = np.random.default_rng(seed)
        orders = np.argsort(rng.random((permutations, n)), axis=1)
        hits = int(np.sum(_disparities(a, b, orders) <= observed + tol))
        p, used = (1 + hits) / (1 + permutations), permutations
        method = f"{permutations:,} random orderings of the brands, p = (1 + hits) / (1 + orderings)"
    return {"disparity": observed, "correlation": math.sqrt(max(0.0, 1.0 - observed)), "p_value": p,
            "permutations": used, "method": method}


# --------------------------------------------------------------------------
# Bootstrap of the brand maps


def _scores(profile: np.ndarray) -> np.ndarray | None:
    """Two principal coordinates of a brands x attributes profile, as the main maps compute them."""
    z, varies = standardise(profile)
    if varies.sum() < 1:
        return None
    return pca(z[:, varies], 2)["scores"]


def _onto(target: np.ndarray, moving: np.ndarray) -> tuple[np.ndarray, dict]:
    fit = procrustes(target, moving)
    return fit["aligned"], fit


def _apply(fit: dict, points: np.ndarray) -> np.ndarray:
    return fit["scale"] * (points - fit["mean_moving"]) @ fit["rotation"] + fit["mean_target"]


def _ellipse(points: np.ndarray) -> tuple[float, float, float]:
    """Width, height (full axes) and angle (radians) of the 95 % normal-theory ellipse of 2-D points."""
    pts = points[np.isfinite(points).all(axis=1)]
    if len(pts) < 3:
        return float("nan"), float("nan"), float("nan")
    cov = np.cov(pts.T)
    values, vectors = np.linalg.eigh(cov)
    values = np.clip(values, 0.0, None)
    major = vectors[:, 1]
    return (2 * math.sqrt(CHI2_2_95 * values[1]), 2 * math.sqrt(CHI2_2_95 * values[0]),
            float(math.atan2(major[1], major[0])))


def resampling_units(images: pd.DataFrame) -> tuple[pd.Series, str]:
    """The unit resampled per photo: its poster when the images table names posters, else the photo.

    A photo with an empty poster is its own unit. Returns (unit per row, "posters" / "photos").
    """
    poster = images.get("poster")
    if poster is not None:
        text = poster.fillna("").astype(str).str.strip()
        if (text != "").any():
            return text.where(text != "", "photo:" + images["image_id"].astype(str)), "posters"
    return images["image_id"].astype(str), "photos"


def map_bootstrap(
    image_attributes: pd.DataFrame,
    images: pd.DataFrame,
    brand_map: pd.DataFrame,
    *,
    column: str = "positive",
    replicates: int = MAP_REPLICATES,
    seed: int = 0,
    min_brands: int = MIN_BRANDS,
) -> tuple[pd.DataFrame, pd.DataFrame, str]:
    """Bootstrap spread of each brand's consumer and owned map position and displacement.

    Each replicate resamples units (photos, or posters) with replacement
    within every brand x source cell, recomputes the brands x attributes
    shares (mean of ``column`` per brand and source), the two PCA maps and
    the alignment of owned onto consumer, exactly as :func:`brand_maps`, and
    then puts the replicate onto the main consumer map (for aligned
    positions and displacements) and each replicate map onto its own main
    map (for the ranges on each biplot).

    Returns
    -------
    (spread, displacement, resampled). spread: one row per source and brand
    (``BOOTSTRAP_COLUMNS``): 2.5-97.5 percentile ranges and the 95 %
    normal-theory ellipse of the replicate positions, on the source's own map
    and aligned onto the consumer map (ellipses are centred on the main
    position). displacement: ``brand``, ``displacement_low``,
    ``displacement_high`` (2.5-97.5 percentiles), ``moves_most_share``
    (share of replicates in which the brand's displacement is the largest),
    ``replicates``. resampled: ``"photos"`` or ``"posters"``.
    """
    empty = (pd.DataFrame(columns=BOOTSTRAP_COLUMNS),
             pd.DataFrame(columns=["brand", "displacement_low", "displacement_high", "moves_most_share", "replicates"]))
    need = ("consumer", "owned")  # a tuple: the draws must not depend on set order (hash seed)
    if brand_map is None or brand_map.empty or not set(need) <= set(brand_map["source"]):
        return (*empty, "")
    main = {s: brand_map[brand_map["source"] == s].set_index("brand") for s in need}
    brands = sorted(set(main["consumer"].index) & set(main["owned"].index))
    if len(brands) < min_brands or main["owned"]["aligned_x"].isna().all():
        return (*empty, "")
    wide = image_attributes.pivot_table(index="image_id", columns="attribute", values=column, aggfunc="first")
    attributes = sorted(wide.columns)
    units, resampled = resampling_units(images)
    meta = images.assign(_unit=units.to_numpy()).drop_duplicates("image_id").set_index("image_id")
    meta = meta.loc[meta.index.intersection(wide.index)]
    meta = meta[meta["brand"].isin(brands) & meta["source"].isin(need)]
    values = wide.loc[meta.index, attributes].to_numpy(dtype=float)

    # per unit: sums of the metric and photo counts, grouped by brand x source cell
    cells: dict[tuple[str, str], tuple[np.ndarray, np.ndarray]] = {}
    for (brand, source), g in meta.groupby(["brand", "source"], sort=True):
        idx = meta.index.get_indexer(g.index)
        codes, uniq = pd.factorize(g["_unit"])
        sums = np.zeros((len(uniq), len(attributes)))
        np.add.at(sums, codes, np.nan_to_num(values[idx]))
        counts = np.bincount(codes, minlength=len(uniq)).astype(float)
        cells[(brand, source)] = (sums, counts)
    if any((b, s) not in cells for b in brands for s in need):
        return (*empty, "")

    main_xy = {s: main[s].loc[brands, ["pc1", "pc2"]].to_numpy(float) for s in need}
    rng = np.random.default_rng([seed, 13])
    own = {s: np.full((replicates, len(brands), 2), np.nan) for s in need}
    aligned = {s: np.full((replicates, len(brands), 2), np.nan) for s in need}
    displacement = np.full((replicates, len(brands)), np.nan)
    for r in range(replicates):
        maps = {}
        for s in need:
            profile = np.empty((len(brands), len(attributes)))
            for k, b in enumerate(brands):
                sums, counts = cells[(b, s)]
                draw = rng.integers(0, len(counts), len(counts))
                profile[k] = sums[draw].sum(axis=0) / counts[draw].sum()
            maps[s] = _scores(profile)
        if maps["consumer"] is None or maps["owned"] is None:
            continue
        try:
            own_c, to_main = _onto(main_xy["consumer"], maps["consumer"])
            own["owned"][r], _ = _onto(main_xy["owned"], maps["owned"])
            owned_on_consumer, _ = _onto(maps["consumer"], maps["owned"])
        except ValueError:  # a degenerate replicate (all brands in one place)
            continue
        own["consumer"][r] = own_c
        aligned["consumer"][r] = own_c
        aligned["owned"][r] = _apply(to_main, owned_on_consumer)
        displacement[r] = np.hypot(*(aligned["owned"][r] - aligned["consumer"][r]).T)

    ok = np.isfinite(displacement).all(axis=1)
    rows = []
    for s in ("consumer", "owned"):
        for k, b in enumerate(brands):
            o, a = own[s][ok, k], aligned[s][ok, k]
            w, h, ang = _ellipse(o)
            aw, ah, aang = _ellipse(a)
            rows.append({
                "source": s, "brand": b, "replicates": int(ok.sum()), "resampled": resampled,
                "x_low": _q(o[:, 0], 2.5), "x_high": _q(o[:, 0], 97.5),
                "y_low": _q(o[:, 1], 2.5), "y_high": _q(o[:, 1], 97.5),
                "ellipse_width": w, "ellipse_height": h, "ellipse_angle": ang,
                "aligned_x_low": _q(a[:, 0], 2.5), "aligned_x_high": _q(a[:, 0], 97.5),
                "aligned_y_low": _q(a[:, 1], 2.5), "aligned_y_high": _q(a[:, 1], 97.5),
                "aligned_ellipse_width": aw, "aligned_ellipse_height": ah, "aligned_ellipse_angle": aang,
            })
    d = displacement[ok]
    top = np.argmax(d, axis=1) if len(d) else np.array([], dtype=int)
    disp = pd.DataFrame({
        "brand": brands,
        "displacement_low": [_q(d[:, k], 2.5) for k in range(len(brands))],
        "displacement_high": [_q(d[:, k], 97.5) for k in range(len(brands))],
        "moves_most_share": [float(np.mean(top == k)) if len(top) else float("nan") for k in range(len(brands))],
        "replicates": int(ok.sum()),
    })
    return pd.DataFrame(rows, columns=BOOTSTRAP_COLUMNS), disp, resampled


def _q(values: np.ndarray, q: float) -> float:
    values = values[np.isfinite(values)]
    return float(np.percentile(values, q)) if len(values) else float("nan")

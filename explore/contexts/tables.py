"""Brand x context tables and their tests: index, Fisher or poster permutation, Benjamini-Hochberg.

Per brand, source and context: count, share, index = 100 x brand share /
category share, a test of the brand against the rest of its category, and
the findings drawn from it (signature contexts, unexpected contexts,
consumer-vs-owned gaps).
"""

from __future__ import annotations

import zlib

import numpy as np
import pandas as pd

from explore.contexts.common import UNASSIGNED_ID, _name, _require
from explore.study import ContextSettings

SOURCES = ("consumer", "owned", "all")


# --------------------------------------------------------------------------
# Statistics


def fisher_pvalues(a, b, c, d) -> np.ndarray:
    """Two-sided Fisher exact p-values for 2x2 tables [[a, b], [c, d]] (scipy.stats.fisher_exact).

    Identical tables are tested once. A table with an empty row or column
    (nothing to compare) gets p = 1.
    """
    from scipy.stats import fisher_exact

    tables = np.stack([np.asarray(v, dtype=np.int64) for v in (a, b, c, d)], axis=1)
    if (tables < 0).any():
        raise ValueError("fisher_pvalues: negative count in a 2x2 table")
    unique, inverse = np.unique(tables, axis=0, return_inverse=True)
    p = np.empty(len(unique))
    for i, (ta, tb, tc, td) in enumerate(unique):
        if min(ta + tb, tc + td, ta + tc, tb + td) == 0:
            p[i] = 1.0
        else:
            p[i] = fisher_exact([[ta, tb], [tc, td]], alternative="two-sided").pvalue
    return p[np.ravel(inverse)]


def benjamini_hochberg(p_values) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p-values (q-values); NaN stays NaN.

    One implementation serves every corrected family:
    ``explore.attributes.testing.benjamini_hochberg`` (attributes is an earlier stage).
    """
    from explore.attributes.testing import benjamini_hochberg as adjust

    return adjust(p_values)


#: Poster permutations per test (p = (1 + hits) / (1 + permutations)).
POSTER_PERMUTATIONS = 1999
FISHER_TEST = "Fisher exact (photos assumed independent)"


def poster_units(frame: pd.DataFrame, by: list[str]) -> pd.Series | None:
    """Resampling unit per photo: its poster within ``by`` (brand, source ...), or None without posters.

    Returns None when the table has no ``poster`` column or every poster is
    empty (photos are then assumed independent). A photo with an empty
    poster is its own unit.
    """
    poster = frame.get("poster")
    if poster is None:
        return None
    text = poster.fillna("").astype(str).str.strip()
    if not (text != "").any():
        return None
    own = pd.Series([f"photo:{k}" for k in range(len(frame))], index=frame.index)
    key = frame[by].astype(str).agg("\x1f".join, axis=1)
    return key + "\x1f" + text.where(text != "", own)


def cluster_permutation_pvalues(
    focal: np.ndarray, counts: np.ndarray, permutations: int = POSTER_PERMUTATIONS, seed=0,
) -> np.ndarray:
    """Two-sided permutation p-values of a share difference with whole units (posters) permuted.

    The units (rows of ``counts``, one per poster; columns = contexts) are
    split into the focal group (``focal`` True: the brand's posters, or its
    consumer posters) and the rest. Under the null that the group label is
    exchangeable between posters, every split with the same number of focal
    posters is equally likely (a cluster-level permutation test, as for
    cluster-randomised designs: Gail et al. 1996, Statistics in Medicine
    15:1069). The statistic per context is |focal share - rest share| of
    photos; p = share of splits at least as extreme. When the number of
    possible splits is at most ``permutations`` every split is enumerated
    (exact); otherwise p = (1 + hits) / (1 + permutations) over seeded random
    splits.

    Returns
    -------
    (n_contexts,) p-values (1 where either group has no photo).
    """
    import itertools
    import math

    focal = np.asarray(focal, dtype=bool)
    counts = np.asarray(counts, dtype=np.float64)
    n_unit = counts.sum(axis=1)
    u, m = len(focal), int(focal.sum())
    total, total_n = counts.sum(axis=0), n_unit.sum()

    def stat(member: np.ndarray) -> np.ndarray:  # member: (B, U) 0/1
        fc, fn = member @ counts, member @ n_unit
        rn = total_n - fn
        with np.errstate(invalid="ignore", divide="ignore"):
            d = fc / fn[:, None] - (total - fc) / rn[:, None]
        return np.abs(np.where((fn[:, None] > 0) & (rn[:, None] > 0), d, 0.0))

    if m == 0 or m == u:
        return np.ones(counts.shape[1])
    observed = stat(focal[None, :].astype(np.float64))[0]
    tol = 1e-12
    splits = math.comb(u, m)
    if splits <= permutations:
        member = np.zeros((splits, u))
        for k, chosen in enumerate(itertools.combinations(range(u), m)):
            member[k, list(chosen)] = 1.0
        hits = (stat(member) >= observed - tol).sum(axis=0)
        return hits / splits
    rng = np.random.default_rng(seed)
    hits = np.zeros(counts.shape[1])
    step = max(1, min(500, 4_000_000 // u))  # splits per block: about 32 MB of membership rows at most
    for start in range(0, permutations, step):
        b = min(step, permutations - start)
        order = np.argsort(rng.random((b, u)), axis=1)[:, :m]
        member = np.zeros((b, u))
        np.put_along_axis(member, order, 1.0, axis=1)
        hits += (stat(member) >= observed - tol).sum(axis=0)
    return (1 + hits) / (1 + permutations)


def _poster_test(sub: pd.DataFrame, units: pd.Series, focal_mask: pd.Series, context_ids: list, seed) -> np.ndarray:
    """Poster-permutation p per context for the photos ``sub`` (focal group vs the rest)."""
    codes, uniq = pd.factorize(units.loc[sub.index])
    counts = np.zeros((len(uniq), len(context_ids)))
    col = {c: k for k, c in enumerate(context_ids)}
    np.add.at(counts, (codes, sub["context_id"].map(col).to_numpy()), 1.0)
    focal = np.zeros(len(uniq), dtype=bool)
    focal[codes[focal_mask.loc[sub.index].to_numpy()]] = True
    return cluster_permutation_pvalues(focal, counts, seed=seed)


def poster_test_name(permutations: int = POSTER_PERMUTATIONS) -> str:
    return (f"poster permutation ({permutations:,} random splits of posters, or every split when fewer; "
            "photos of one poster move together)")


# --------------------------------------------------------------------------
# Brand x context


def brand_context_table(
    images: pd.DataFrame, labels: np.ndarray, names: dict[int, str] | None = None, min_margin: int = 0,
    seed: int = 0,
) -> pd.DataFrame:
    """Count, share, index and Fisher test per brand, source and context.

    For each source (``consumer``, ``owned`` and ``all``), each brand with
    images of that source, and each context (including -1 "unassigned"):

    - count: the brand's images in the context; brand_n: the brand's images;
      share = count / brand_n;
    - category_share: the same share over all images of the brand's category
      (the brand included), and index = 100 x share / category_share
      (100 = parity; common marketing practice);
    - rest_count, rest_n, rest_share: the rest of the category (the brand
      left out), the group the brand is tested against;
    - p_value: two-sided Fisher exact test of [[count, brand_n - count],
      [rest_count, rest_n - rest_count]] (NaN when the brand is alone in its
      category, and for "unassigned", which is not a context to test);
    - q_value: Benjamini-Hochberg over the tested rows of this table whose
      category count (count + rest_count, a margin of the 2x2 table) is at
      least ``min_margin``; NaN for the others. Leaving out rows that could
      never pass ``min_count`` before adjusting is "independent filtering"
      (Bourgon, Gentleman and Huber, 2010, PNAS 107:9546): Fisher's test
      conditions on its margins, so the filter does not bias the p-values
      that remain, and the family is not padded with empty cells.
    - test: how p_value was computed. Fisher's test treats photos as
      independent; when ``images`` has a non-empty ``poster`` column the
      p-value comes from :func:`cluster_permutation_pvalues` instead (the
      brand's posters against the rest of its category's, photos of one
      poster kept together), seeded by ``seed``.

    Parameters
    ----------
    images : one row per clustered image, with brand, category, source.
    labels : context id per row of ``images``.
    names : context id -> name.
    min_margin : see q_value (run_contexts passes ``min_count``).
    """
    _require(images, ["brand", "category", "source"], "images")
    frame = images[["brand", "category", "source"]].reset_index(drop=True).copy()
    frame["context_id"] = np.asarray(labels, dtype=np.int64)
    units = poster_units(images.reset_index(drop=True), ["brand"])
    context_ids = sorted(frame["context_id"].unique())
    parts = []
    for source in SOURCES:
        sub = frame if source == "all" else frame[frame["source"] == source]
        if sub.empty:
            continue
        counts = pd.crosstab([sub["category"], sub["brand"]], sub["context_id"])
        counts = counts.reindex(columns=context_ids, fill_value=0)
        long = counts.stack().rename("count").reset_index()
        long["brand_n"] = long.groupby(["category", "brand"])["count"].transform("sum")
        long["category_count"] = long.groupby(["category", "context_id"])["count"].transform("sum")
        long["category_n"] = long.groupby(["category", "context_id"])["brand_n"].transform("sum")
        long["source"] = source
        parts.append(long)
    table = pd.concat(parts, ignore_index=True)
    table["share"] = table["count"] / table["brand_n"]
    table["category_share"] = table["category_count"] / table["category_n"]
    table["index"] = 100.0 * table["share"] / table["category_share"].where(table["category_share"] > 0)
    table["rest_count"] = table["category_count"] - table["count"]
    table["rest_n"] = table["category_n"] - table["brand_n"]
    table["rest_share"] = table["rest_count"] / table["rest_n"].where(table["rest_n"] > 0)
    tested = (table["rest_n"] > 0) & (table["context_id"] != UNASSIGNED_ID)
    table["p_value"] = np.nan
    table["test"] = ""
    if tested.any() and units is None:
        t = table[tested]
        table.loc[tested, "p_value"] = fisher_pvalues(
            t["count"], t["brand_n"] - t["count"], t["rest_count"], t["rest_n"] - t["rest_count"]
        )
        table.loc[tested, "test"] = FISHER_TEST
    elif tested.any():
        for (source, category, brand), idx in table[tested].groupby(["source", "category", "brand"]).groups.items():
            sub = frame[frame["category"] == category]
            if source != "all":
                sub = sub[sub["source"] == source]
            p = dict(zip(context_ids, _poster_test(sub, units, frame["brand"] == brand, context_ids,
                                                   [seed, zlib.crc32(f"{source}|{brand}".encode())])))
            table.loc[idx, "p_value"] = table.loc[idx, "context_id"].map(p).to_numpy()
            table.loc[idx, "test"] = poster_test_name()
    family = (table["category_count"] >= min_margin).to_numpy()
    table["q_value"] = np.nan
    table.loc[family, "q_value"] = benjamini_hochberg(table.loc[family, "p_value"].to_numpy())
    table["context"] = table["context_id"].map(lambda c: _name(c, names))
    columns = [
        "brand", "category", "source", "context_id", "context", "count", "brand_n", "share",
        "category_share", "index", "rest_count", "rest_n", "rest_share", "p_value", "q_value", "test",
    ]
    table = table[columns].sort_values(["category", "brand", "source", "context_id"], kind="stable")
    return table.reset_index(drop=True)


def signature_contexts(table: pd.DataFrame, settings: ContextSettings) -> pd.DataFrame:
    """Contexts where a brand over-indexes significantly.

    A row of ``brand_context_table`` is a signature context when q_value <=
    fdr, index >= min_index, count >= min_count and the brand's share exceeds
    the rest of its category's. Ranked within brand and source by index.
    """
    over = _over_indexed(table, settings).copy()
    over = over.sort_values(["brand", "source", "index", "q_value"], ascending=[True, True, False, True], kind="stable")
    over["rank"] = over.groupby(["brand", "source"]).cumcount() + 1
    return over.reset_index(drop=True)


def unexpected_contexts(table: pd.DataFrame, settings: ContextSettings) -> pd.DataFrame:
    """Significant over-indexes in contexts that are not the category's own.

    A signature row (see ``signature_contexts``) is unexpected when its
    category is rarely there (category_share < rare_category_share) or
    another category dominates the context: that category's share of its own
    images in the context (same source) is the highest of all categories and
    at least ``dominance_ratio`` times the brand's category share. Adds
    dominant_category, dominant_share and reason; ranked by index, overall
    (rank) and within brand (brand_rank).
    """
    over = _over_indexed(table, settings)
    cat = (
        table[table["context_id"] != UNASSIGNED_ID]
        .drop_duplicates(["source", "category", "context_id"])[["source", "category", "context_id", "category_share"]]
        .sort_values(["source", "context_id", "category_share", "category"], ascending=[True, True, False, True], kind="stable")
        .drop_duplicates(["source", "context_id"])
        .rename(columns={"category": "dominant_category", "category_share": "dominant_share"})
    )
    out = over.merge(cat, on=["source", "context_id"], how="left")
    rare = out["category_share"] < settings.rare_category_share
    dominated = (out["dominant_category"] != out["category"]) & (
        out["dominant_share"] >= settings.dominance_ratio * out["category_share"]
    )
    out = out[rare | dominated].copy()
    reasons = []
    for _, row in out.iterrows():
        why = []
        if row["category_share"] < settings.rare_category_share:
            why.append(
                f"its category is rarely here ({row['category_share']:.1%} of category images, "
                f"below {settings.rare_category_share:.0%})"
            )
        if row["dominant_category"] != row["category"] and row["dominant_share"] >= settings.dominance_ratio * row["category_share"]:
            why.append(
                f"typical of category {row['dominant_category']} ({row['dominant_share']:.1%} of its images "
                f"vs {row['category_share']:.1%})"
            )
        reasons.append("; ".join(why))
    out["reason"] = reasons
    out = out.sort_values(["index", "q_value", "brand"], ascending=[False, True, True], kind="stable")
    out["rank"] = np.arange(1, len(out) + 1)
    out["brand_rank"] = out.groupby(["brand", "source"]).cumcount() + 1
    return out.reset_index(drop=True)


def source_context_gaps(
    images: pd.DataFrame, labels: np.ndarray, settings: ContextSettings, names: dict[int, str] | None = None,
    seed: int = 0,
) -> pd.DataFrame:
    """Per brand and context: consumer share vs owned share, Fisher test, BH.

    Only brands with both consumer and owned images. gap = consumer_share -
    owned_share; p_value is the two-sided Fisher exact test of
    [[consumer_count, consumer_n - consumer_count], [owned_count, owned_n -
    owned_count]]; q_value is Benjamini-Hochberg over the tested rows whose
    consumer_count + owned_count (a margin) is at least min_count, NaN for the
    rest (independent filtering, as in ``brand_context_table``; "unassigned"
    rows are reported, not tested). significant: q_value <= fdr and the larger
    of the two counts >= min_count. direction says which
    source shows the context more. test: ``Fisher exact (photos assumed
    independent)``, or, when ``images`` has a non-empty ``poster`` column, a
    permutation of the brand's posters between its consumer and owned photos
    (:func:`cluster_permutation_pvalues`), seeded by ``seed``.
    """
    _require(images, ["brand", "category", "source"], "images")
    frame = images[["brand", "category", "source"]].reset_index(drop=True).copy()
    frame["context_id"] = np.asarray(labels, dtype=np.int64)
    units = poster_units(images.reset_index(drop=True), ["brand", "source"])
    frame = frame[frame["source"].isin(["consumer", "owned"])]
    context_ids = sorted(np.unique(np.asarray(labels)))
    columns = [
        "brand", "category", "context_id", "context", "consumer_count", "consumer_n", "consumer_share",
        "owned_count", "owned_n", "owned_share", "gap", "p_value", "q_value", "significant", "direction", "test",
    ]
    if frame.empty:
        return pd.DataFrame(columns=columns)
    counts = pd.crosstab([frame["category"], frame["brand"], frame["context_id"]], frame["source"])
    counts = counts.reindex(columns=["consumer", "owned"], fill_value=0)
    full = pd.MultiIndex.from_product(
        [counts.index.droplevel(2).unique(), context_ids], names=["cb", "context_id"]
    )
    rows = []
    for (category, brand), cid in full:
        key = (category, brand, cid)
        cc, oc = (counts.loc[key, "consumer"], counts.loc[key, "owned"]) if key in counts.index else (0, 0)
        rows.append((brand, category, int(cid), int(cc), int(oc)))
    out = pd.DataFrame(rows, columns=["brand", "category", "context_id", "consumer_count", "owned_count"])
    out["consumer_n"] = out.groupby("brand")["consumer_count"].transform("sum")
    out["owned_n"] = out.groupby("brand")["owned_count"].transform("sum")
    out = out[(out["consumer_n"] > 0) & (out["owned_n"] > 0)].copy()
    out["consumer_share"] = out["consumer_count"] / out["consumer_n"]
    out["owned_share"] = out["owned_count"] / out["owned_n"]
    out["gap"] = out["consumer_share"] - out["owned_share"]
    tested = out["context_id"] != UNASSIGNED_ID
    out["p_value"] = np.nan
    out["test"] = ""
    if tested.any() and units is None:
        t = out[tested]
        out.loc[tested, "p_value"] = fisher_pvalues(
            t["consumer_count"], t["consumer_n"] - t["consumer_count"],
            t["owned_count"], t["owned_n"] - t["owned_count"],
        )
        out.loc[tested, "test"] = FISHER_TEST
    elif tested.any():
        for brand, idx in out[tested].groupby("brand").groups.items():
            sub = frame[frame["brand"] == brand]
            p = dict(zip(context_ids, _poster_test(sub, units, frame["source"] == "consumer", context_ids,
                                                   [seed, zlib.crc32(f"gap|{brand}".encode())])))
            out.loc[idx, "p_value"] = out.loc[idx, "context_id"].map(p).to_numpy()
            out.loc[idx, "test"] = poster_test_name()
    family = ((out["consumer_count"] + out["owned_count"]) >= settings.min_count).to_numpy()
    out["q_value"] = np.nan
    out.loc[family, "q_value"] = benjamini_hochberg(out.loc[family, "p_value"].to_numpy())
    out["significant"] = (out["q_value"] <= settings.fdr) & (
        np.maximum(out["consumer_count"], out["owned_count"]) >= settings.min_count
    )
    out["direction"] = np.where(
        out["gap"] > 0, "more in consumer photos", np.where(out["gap"] < 0, "more in owned photos", "equal")
    )
    out["context"] = out["context_id"].map(lambda c: _name(c, names))
    return out[columns].sort_values(["category", "brand", "context_id"], kind="stable").reset_index(drop=True)


def _over_indexed(table: pd.DataFrame, settings: ContextSettings) -> pd.DataFrame:
    keep = (
        (table["context_id"] != UNASSIGNED_ID)
        & (table["q_value"] <= settings.fdr)
        & (table["index"] >= settings.min_index)
        & (table["count"] >= settings.min_count)
        & (table["share"] > table["rest_share"])
    )
    return table[keep.fillna(False)]


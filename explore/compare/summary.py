"""Compare, summary: the plain run-note lines and the stage entry :func:`compare_study`."""

from __future__ import annotations

import numpy as np
import pandas as pd

from explore.compare.agreement import (
    AGREEMENT_FDR,
    ALL_CATEGORIES,
    EXACT_MAX_BRANDS,
    MIN_TEST_BRANDS,
    agreement_table,
)
from explore.compare.maps import brand_displacement, brand_maps, brand_vector_map
from explore.compare.survey import brand_metrics, join_survey
from explore.compare.uncertainty import BOOTSTRAP_COLUMNS, MAP_REPLICATES, MOVES_MOST_SHARE, map_bootstrap


def attribute_agreement(agreement: pd.DataFrame, metric_a: str, metric_b: str) -> pd.DataFrame:
    """Agreement per attribute pooled over categories: concordant pairs / all pairs.

    Only within-category rows are pooled (brands compete within a category).

    Returns
    -------
    DataFrame with ``attribute``, ``concordant``, ``pairs``, ``ties``,
    ``n_brands`` (brands behind the pooled pairs), ``fewest_brands`` (in
    the smallest category pooled), ``concordant_share``,
    sorted from best to worst agreement.
    """
    rows = agreement[
        (agreement["metric_a"] == metric_a)
        & (agreement["metric_b"] == metric_b)
        & (agreement["category"] != ALL_CATEGORIES)
    ]
    if rows.empty:
        return pd.DataFrame(columns=["attribute", "concordant", "pairs", "ties", "n_brands", "fewest_brands",
                                     "concordant_share"])
    pooled = rows.groupby("attribute", sort=True)[["concordant", "pairs", "ties", "n_brands"]].sum()
    pooled["fewest_brands"] = rows.groupby("attribute", sort=True)["n_brands"].min()
    pooled = pooled.reset_index()
    pooled = pooled[pooled["pairs"] > 0]
    pooled["concordant_share"] = pooled["concordant"] / pooled["pairs"]
    return pooled.sort_values(["concordant_share", "attribute"], ascending=[False, True]).reset_index(drop=True)


def format_p(p) -> str:
    """A p-value as text: "< 0.001" below 0.001, never "0"; "–" when missing."""
    try:
        p = float(p)
    except (TypeError, ValueError):
        return "–"
    if not np.isfinite(p):
        return "–"
    return "< 0.001" if p < 0.001 else f"{p:.3f}"


#: Fewest pooled brand pairs for an attribute to be called best or worst.
MIN_SUMMARY_PAIRS = 3

_METRIC_WORDS = {
    "consumer_share": "consumer photos",
    "owned_share": "owned photos",
    "survey_score": "survey",
}


def summarise(tables: dict[str, pd.DataFrame], *, top: int = 2) -> list[str]:
    """A few plain lines: where metrics agree best and worst, who moves most.

    Parameters
    ----------
    tables : the tables of :func:`compare_study`.
    top : how many attributes / brands to name per line.

    Returns
    -------
    list of one-line texts, most useful first.
    """
    lines = []
    agreement = tables.get("agreement")
    if agreement is not None and len(agreement):
        for a, b in (("consumer_share", "survey_score"), ("owned_share", "survey_score"), ("consumer_share", "owned_share")):
            per = attribute_agreement(agreement, a, b)
            if per.empty:
                continue

            def fmt(r):
                tie = f", {int(r.ties)} tied" if r.ties else ""
                return f"{r.attribute} ({int(r.concordant)}/{int(r.pairs)} pairs{tie})"

            words = f"agreement {_METRIC_WORDS[a]} vs {_METRIC_WORDS[b]} (brand pairs ranked alike)"
            # "best" / "worst" only where an attribute rests on enough brands and pairs
            # (every category pooled must have MIN_TEST_BRANDS brands: pairs within a category of 3 say little)
            enough = (per["fewest_brands"] >= MIN_TEST_BRANDS) & (per["pairs"] >= MIN_SUMMARY_PAIRS)
            if not enough.all() or per["concordant_share"].nunique() == 1:
                why = "" if enough.all() else (
                    f" (counts only: best/worst needs at least {MIN_TEST_BRANDS} brands per category and "
                    f"{MIN_SUMMARY_PAIRS} pairs per attribute)"
                )
                alike = "" if len(per) == 1 or not enough.all() else "alike for every attribute: "
                lines.append(f"{words}{why}: {alike}{', '.join(fmt(r) for r in per.head(3).itertuples())}")
                continue
            hi, lo = per["concordant_share"].max(), per["concordant_share"].min()
            best = [fmt(r) for r in per[per["concordant_share"] > lo].head(top).itertuples()]
            worst = [fmt(r) for r in per[per["concordant_share"] < hi].iloc[::-1].head(top).itertuples()]
            lines.append(f"{words}: best {', '.join(best)}; worst {', '.join(worst)} (pooled within categories; counts, not tests)")
        tested = agreement[agreement["kendall_p"].notna()] if "kendall_p" in agreement else agreement.iloc[0:0]
        if len(tested):
            sig = tested[tested["significant"].astype(bool)]
            named = ", ".join(
                f"{r.attribute} {_METRIC_WORDS[r.metric_a]} vs {_METRIC_WORDS[r.metric_b]} ({r.category})"
                for r in sig.head(top + 1).itertuples()
            )
            lines.append(
                f"agreement tests: {len(sig)} of {len(tested)} significant after Benjamini-Hochberg at "
                f"{100 * AGREEMENT_FDR:.0f} % (Kendall tau-b, exact permutation p up to {EXACT_MAX_BRANDS} brands; family: "
                f"every category x attribute x metric pair with at least {MIN_TEST_BRANDS} brands)"
                + (f": {named}" if named else "")
            )
        else:
            lines.append(f"agreement tests: none (no comparison has {MIN_TEST_BRANDS} or more brands; counts only)")
    disp = tables.get("brand_displacement")
    if disp is not None and len(disp):
        moved = disp.dropna(subset=["displacement"]).sort_values("displacement", ascending=False)
        if len(moved):
            fit = ""
            bm = tables.get("brand_map")
            if bm is not None and (bm["source"] == "owned").any():
                owned = bm[bm["source"] == "owned"].iloc[0]
                fit = f" (Procrustes disparity {owned['disparity']:.2f}"
                if "protest_p" in owned and pd.notna(owned["protest_p"]):
                    fit += f", PROTEST p {format_p(owned['protest_p'])}: {owned['protest_method']}"
                fit += ")"
            head = f"brand map, consumer -> owned photos{fit}"
            share = moved.get("moves_most_share")
            top_brand = moved.iloc[0]
            if share is not None and pd.notna(top_brand.get("moves_most_share")):
                reps = ""
                sp = tables.get("brand_map_bootstrap")
                if sp is not None and len(sp):
                    reps = f" of {int(sp['replicates'].iloc[0])}"
                ranked = moved.sort_values("moves_most_share", ascending=False)
                best = ranked.iloc[0]
                if best["moves_most_share"] >= MOVES_MOST_SHARE:
                    line = (f"{head}, moves most: {best.brand} ({best.displacement:.2f}, range "
                            f"{best.displacement_low:.2f}-{best.displacement_high:.2f}; largest in "
                            f"{100 * best.moves_most_share:.0f} %{reps} bootstrap replicates)")
                else:
                    line = (f"{head}: no brand moves most in at least {100 * MOVES_MOST_SHARE:.0f} % of the bootstrap "
                            f"replicates (the rule for naming one); largest displacement " + ", ".join(
                                f"{r.brand} ({r.displacement:.2f}, range {r.displacement_low:.2f}-"
                                f"{r.displacement_high:.2f}, largest in {100 * r.moves_most_share:.0f} %)"
                                for r in moved.head(top).itertuples()))
            else:
                line = f"{head}, largest displacement (no bootstrap): " + ", ".join(
                    f"{r.brand} ({r.displacement:.2f})" for r in moved.head(top).itertuples()
                )
            far = moved.dropna(subset=["owned_profile_distance"]).sort_values("owned_profile_distance", ascending=False)
            if len(far):
                line += "; most different attribute profiles: " + ", ".join(
                    f"{r.brand} ({r.owned_profile_distance:.2f})" for r in far.head(top).itertuples()
                )
            lines.append(line)
        far = disp.dropna(subset=["survey_profile_distance"]).sort_values("survey_profile_distance", ascending=False)
        if len(far):
            lines.append(
                "survey vs consumer photos, most different attribute profiles: "
                + ", ".join(f"{r.brand} ({r.survey_profile_distance:.2f})" for r in far.head(top).itertuples())
                + "; largest mean rank gap within category: "
                + ", ".join(
                    f"{r.brand} ({r.survey_rank_gap:.2f})"
                    for r in far.sort_values("survey_rank_gap", ascending=False).head(top).itertuples()
                )
            )
        vec = disp.dropna(subset=["vector_distance"]).sort_values("vector_distance", ascending=False)
        if len(vec):
            lines.append(
                "image vectors, consumer vs owned most different: "
                + ", ".join(f"{r.brand} (cosine distance {r.vector_distance:.3f})" for r in vec.head(top).itertuples())
            )
    return lines


def compare_study(
    attribute_shares: pd.DataFrame,
    *,
    survey: pd.DataFrame | None = None,
    brand_categories: dict[str, str] | None = None,
    attributes: list[str] | None = None,
    images: pd.DataFrame | None = None,
    embeddings=None,
    value: str = "yes_rate",
    vectors: str = "cluster",
    image_attributes: pd.DataFrame | None = None,
    seed: int = 0,
    map_replicates: int = MAP_REPLICATES,
) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """Run the compare stage: survey join, agreement, brand maps, displacement.

    Parameters
    ----------
    attribute_shares : the ``attribute_shares`` table from the attributes stage.
    survey : output of :func:`read_survey`, or ``None`` when the study has none.
    brand_categories : brand -> category of the study (defaults to the brands
        of ``attribute_shares``); survey brands outside it are reported.
    attributes : the study's attribute names (defaults to those of
        ``attribute_shares``); survey attributes outside it are reported.
    images, embeddings : the images table and the ``Embeddings``, for the
        image-vector map (left out when either is ``None``).
    value : photo metric column of ``attribute_shares`` (``yes_rate``).
    vectors : which image vectors build the vector map (``cluster``).
    image_attributes : the long per-image table of the attributes stage, for
        the bootstrap of the brand maps (left out when ``None``, or with
        ``map_replicates`` 0).
    seed : the study seed (PROTEST orderings, bootstrap draws).
    map_replicates : bootstrap replicates of the brand maps.

    Returns
    -------
    (tables, notes): tables ``survey``, ``agreement``, ``brand_map``,
    ``brand_map_loadings``, ``brand_vector_map``, ``brand_displacement``; notes
    are one-line texts for the run summary (survey problems first, then the
    summary lines of :func:`summarise`).
    """
    brand_rows = attribute_shares[attribute_shares["level"] == "brand"]
    if brand_categories is None:
        brand_categories = brand_rows.drop_duplicates("brand").set_index("brand")["category"].to_dict()
    else:
        # brands with images keep the category the attributes stage recorded
        brand_categories = {**brand_categories, **brand_rows.drop_duplicates("brand").set_index("brand")["category"].to_dict()}
    if attributes is None:
        attributes = sorted(set(brand_rows["attribute"]))
    notes: list[str] = []
    if survey is not None:
        survey_table, survey_notes = join_survey(survey, brand_categories, attributes)
        notes += survey_notes
        used = int((survey_table["status"] == "used").sum())
        notes.insert(0, f"survey: {used} of {len(survey_table)} rows used")
    else:
        survey_table = pd.DataFrame(
            columns=["row", "brand", "category", "survey_category", "attribute", "score", "sample_size",
                     "known_brand", "known_attribute", "status", "note"]
        )
        notes.append("survey: none in the study; agreement covers consumer vs owned photos only")

    metrics = brand_metrics(attribute_shares, survey_table if survey is not None else None, value=value)
    if "consumer_from" in metrics:
        used = int((metrics[["consumer_from", "owned_from"]] == "share").to_numpy().sum())
        total = int(metrics[["consumer_from", "owned_from"]].isin(["share", "yes_rate"]).to_numpy().sum())
        notes.append(f"photo metric: corrected share for {used} of {total} brand x source x attribute values, "
                     "the model's yes-rate for the rest" if used else "photo metric: the model's yes-rate "
                     "(no random hand labels, so no corrected shares)")
    agreement = agreement_table(metrics)
    brands_per_category = metrics.groupby("category")["brand"].nunique()
    too_few = sorted(brands_per_category[brands_per_category < MIN_TEST_BRANDS].index)
    if too_few:
        notes.append(
            f"agreement: counts only within {', '.join(too_few)} (fewer than {MIN_TEST_BRANDS} brands each: "
            "no correlations or p-values)"
        )
    brand_map, loadings, map_notes = brand_maps(metrics, seed=seed)
    notes += map_notes
    vector_map, distances = None, None
    if images is not None and embeddings is not None and len(embeddings.image_ids):
        vector_map, info = brand_vector_map(images, embeddings, vectors=vectors)
        distances = info["distances"]
    displacement = brand_displacement(brand_map, vector_map, distances, metrics)
    spread = pd.DataFrame(columns=BOOTSTRAP_COLUMNS)
    boot = None
    if image_attributes is not None and images is not None and map_replicates > 0 and len(image_attributes):
        column = "probability" if value == "mean_probability" else "positive"
        spread, boot, resampled = map_bootstrap(
            image_attributes, images, brand_map, column=column, replicates=map_replicates, seed=seed
        )
        if resampled:
            notes.append(
                f"brand map uncertainty: {int(boot['replicates'].iloc[0])} bootstrap replicates, {resampled} "
                "resampled within brand x source"
                + ("" if resampled == "posters" else " (no poster ids: photos assumed independent)")
            )
    for col in ("displacement_low", "displacement_high", "moves_most_share"):
        displacement[col] = (
            boot.set_index("brand")[col].reindex(displacement["brand"]).to_numpy(dtype=float)
            if boot is not None and len(boot) else np.nan
        )
    tables = {
        "survey": survey_table,
        "agreement": agreement,
        "brand_map": brand_map,
        "brand_map_loadings": loadings,
        "brand_vector_map": vector_map if vector_map is not None else pd.DataFrame(
            columns=["brand", "category", "source", "n_images", "x", "y", "nearest_brand", "nearest_distance", "vectors"]
        ),
        "brand_displacement": displacement,
        "brand_map_bootstrap": spread,
    }
    return tables, notes + summarise(tables)

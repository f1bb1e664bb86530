"""Report comparison sections: survey agreement, brand maps and their uncertainty, brand view."""

from __future__ import annotations

import numpy as np
import pandas as pd

from explore.report.data import OutputFolder
from explore.report.format import _clean, fmt_number, fmt_p, html_table


def _agreement(out: OutputFolder):
    """The agreement table in reading form: each statistic with its 95 % interval, exact p and BH q.

    Rows with fewer than 5 brands carry counts only (the compare stage leaves
    their statistics empty); "significant" is Kendall's tau-b after
    Benjamini-Hochberg over the family named above the table.
    """
    if not out.has("agreement"):
        return {"missing": out.missing("agreement")}
    t = out.get("agreement")

    def col(name):
        return t[name] if name in t else pd.Series(np.nan, index=t.index)

    def with_p(stat: str, value_col: str) -> list[str]:
        cells = []
        for v, lo, hi, p, q in zip(col(value_col), col(f"{stat}_low"), col(f"{stat}_high"), col(f"{stat}_p"),
                                   col(f"{stat}_q")):
            if fmt_number(v) == "–":
                cells.append("–")
                continue
            text = fmt_number(v)
            if fmt_number(lo) != "–":
                text += f" [{fmt_number(lo)}, {fmt_number(hi)}]"
            if fmt_p(p) != "–":
                text += f" (p {fmt_p(p)}" + (f", q {fmt_p(q)}" if fmt_p(q) != "–" else "") + ")"
            cells.append(text)
        return cells

    def named(v) -> str:
        return str(v).replace("_", " ")

    view = pd.DataFrame({
        "category": t.get("category", ""),
        "attribute": t.get("attribute", ""),
        "compared": [f"{named(a)} vs {named(b)}" for a, b in zip(t.get("metric_a", ""), t.get("metric_b", ""))],
        "brands": t.get("n_brands", np.nan),
        "pairs ranked alike": [("–" if fmt_number(v) == "–" else f"{100 * float(v):.0f} %") for v in t.get("concordant_share", np.nan)],
        "Kendall tau": with_p("kendall", "kendall_tau"),
        "Spearman rho": with_p("spearman", "spearman_rho"),
        "Pearson r": with_p("pearson", "pearson_r"),
        "significant (BH)": [bool(v) if pd.notna(v) else False for v in col("significant")],
        "note": t.get("note", "").fillna("") if "note" in t else "",
    })
    families = sorted({str(f) for f in t.get("family", pd.Series(dtype=str)).fillna("") if str(f)})
    methods = sorted({str(f) for f in t.get("p_method", pd.Series(dtype=str)).fillna("") if str(f)})
    return {"missing": "", "table": html_table(view), "families": families, "methods": methods,
            "significant": int(sum(bool(v) for v in col("significant") if pd.notna(v))),
            "tested": int(col("kendall_p").notna().sum())}


def _map_uncertainty(out: OutputFolder) -> dict:
    """Caption texts for the brand maps: bootstrap ellipses, PROTEST per alignment, the "moves most" rule."""
    from explore.compare import MOVES_MOST_SHARE

    texts = {"ellipses": "", "protest": "", "moves": ""}
    if out.has("brand_map_bootstrap", "replicates", "resampled") and len(out.get("brand_map_bootstrap")):
        sp = out.get("brand_map_bootstrap")
        what = ("posters resampled within brand × source" if (sp["resampled"] == "posters").any()
                else "photos resampled within brand × source; no poster ids, so photos are assumed independent")
        texts["ellipses"] = (f"Dashed ellipses: the 95 % region of each brand's position over "
                             f"{int(sp['replicates'].iloc[0])} bootstrap replicates ({what}; each replicate map "
                             "aligned onto the one shown). Overlapping ellipses do not by themselves mean two "
                             "brands are alike or different.")
    if out.has("brand_map", "source", "protest_p"):
        bm = out.get("brand_map")
        parts = []
        for src in ("owned", "survey"):
            rows = bm[(bm["source"] == src) & bm["protest_p"].notna()]
            if len(rows):
                r = rows.iloc[0]
                parts.append(f"{src} vs consumer map: disparity {fmt_number(r['disparity'], 2)}, "
                             f"PROTEST p {fmt_p(r['protest_p'])} ({r.get('protest_method', '')})")
        if parts:
            texts["protest"] = ("PROTEST (Jackson 1995) asks whether two maps agree more than maps of shuffled brand "
                                "labels would: " + "; ".join(parts) + ".")
    if out.has("brand_displacement", "moves_most_share"):
        d = out.get("brand_displacement").dropna(subset=["moves_most_share"])
        if len(d):
            top = d.sort_values("moves_most_share", ascending=False).iloc[0]
            rule = f"a brand is said to move most only when it does so in at least {100 * MOVES_MOST_SHARE:.0f} % of the replicates"
            if top["moves_most_share"] >= MOVES_MOST_SHARE:
                texts["moves"] = f"{top['brand']} moves most in {100 * top['moves_most_share']:.0f} % of the replicates ({rule})."
            else:
                texts["moves"] = (f"No brand moves most reliably: the most frequent, {top['brand']}, does in "
                                  f"{100 * top['moves_most_share']:.0f} % of the replicates ({rule}).")
    return texts


def _stability(out: OutputFolder) -> str:
    """One sentence on how the contexts change with the seed (context_stability)."""
    if not out.has("context_stability", "ari", "refit_seed"):
        return ""
    r = out.get("context_stability").iloc[0]
    ari = fmt_number(r.get("ari"), 2)
    return (f"Stability: a refit with another seed ({r.get('method', '')}) found {fmt_number(r.get('refit_contexts'))} "
            f"contexts against {fmt_number(r.get('main_contexts'))}; on the {fmt_number(r.get('both_assigned'))} photos "
            f"assigned in both, the adjusted Rand index is {ari} (1 = the same grouping, 0 = chance). "
            "Small contexts and their names may change between runs.")


def _displacement_table(out: OutputFolder):
    if not out.has("brand_displacement", "brand"):
        return None
    cols = ["brand", "category", "displacement", "displacement_low", "displacement_high", "moves_most_share",
            "survey_displacement", "owned_rank_gap", "survey_rank_gap", "vector_distance", "vector_displacement"]
    return html_table(out.get("brand_displacement"), cols)


def _brand_view_data(out: OutputFolder, brands: list[str], bc, points: pd.DataFrame, thumbs: dict) -> dict:
    """Per brand: contexts with share/index and exemplar ids, signature/unexpected, attribute shares."""
    view: dict[str, dict] = {b: {"contexts": [], "signature": [], "unexpected": [], "attributes": []} for b in brands}
    if bc is not None and "brand" in bc:
        ex = {}
        if "context_id" in points and len(points):
            pts = points[points["image_id"].isin(thumbs.keys())]
            pts = pts.sort_values("membership", ascending=False)
            for (b, c), g in pts.groupby(["brand", "context_id"], sort=False):
                ex[(b, int(c))] = g["image_id"].head(4).tolist()
        for src in ("all", "consumer", "owned"):
            part = bc[bc["source"] == src] if "source" in bc else (bc if src == "all" else bc.iloc[0:0])
            for rec in part.to_dict("records"):
                b = rec["brand"]
                if b not in view:
                    continue
                if int(rec["context_id"]) < 0:  # "unassigned": its own row, no index (it is not a context)
                    view[b].setdefault("unassigned", []).append({
                        "source": src, "count": _clean(rec.get("count")), "n": _clean(rec.get("brand_n")),
                        "share": _clean(rec.get("share")),
                    })
                    continue
                view[b]["contexts"].append({
                    "source": src,
                    "id": int(rec["context_id"]),
                    "name": str(rec.get("context", "")),
                    "count": _clean(rec.get("count")),
                    "n": _clean(rec.get("brand_n")),
                    "share": _clean(rec.get("share")),
                    "categoryShare": _clean(rec.get("category_share")),
                    "index": _clean(rec.get("index")),
                    "q": _clean(rec.get("q_value")),
                    "exemplars": ex.get((b, int(rec["context_id"])), []) if src == "all" else [],
                })
    for key, name in (("signature_contexts", "signature"), ("unexpected_contexts", "unexpected")):
        table = out.get(key)
        if table is None or "brand" not in table:
            continue
        for rec in table.to_dict("records"):
            b = str(rec["brand"])
            if b in view:
                view[b][name].append({
                    "id": _clean(rec.get("context_id")),
                    "name": str(rec.get("context", "")),
                    "index": _clean(rec.get("index")),
                    "share": _clean(rec.get("share")),
                    "count": _clean(rec.get("count")),
                    "source": str(rec.get("source", "")) if rec.get("source") is not None else "",
                })
    if out.has("attribute_shares", "level", "brand", "source", "attribute", "yes_rate"):
        sh = out.get("attribute_shares")
        sh = sh[sh["level"] == "brand"]
        gaps = out.get("attribute_gaps")
        sig = set()
        if gaps is not None and {"brand", "attribute", "significant"} <= set(gaps.columns):
            sig = {(str(b), str(a)) for b, a, s in zip(gaps["brand"], gaps["attribute"], gaps["significant"]) if bool(s)}
        for rec in sh.to_dict("records"):
            b = str(rec["brand"])
            if b in view:
                view[b]["attributes"].append({
                    "attribute": str(rec["attribute"]),
                    "source": str(rec["source"]),
                    "share": _clean(rec.get("yes_rate")),
                    "low": _clean(rec.get("yes_rate_low")),
                    "high": _clean(rec.get("yes_rate_high")),
                    "n": _clean(rec.get("n")),
                    "significantGap": (b, str(rec["attribute"])) in sig,
                })
    return view


def _brand_map_points(out: OutputFolder) -> list[dict]:
    """Small brand maps for the brand view: the consumer attribute map and the image-vector map."""
    maps = []
    if out.has("brand_map", "source", "brand", "pc1", "pc2"):
        bm = out.get("brand_map")
        for src in ("consumer", "owned", "survey"):
            part = bm[bm["source"] == src]
            if len(part):
                maps.append({"title": f"attribute map ({src} yes-rates)" if src != "survey" else "attribute map (survey)",
                             "points": [{"brand": str(b), "x": _clean(x), "y": _clean(y)}
                                        for b, x, y in zip(part["brand"], part["pc1"], part["pc2"])]})
                break
    if out.has("brand_vector_map", "brand", "source", "x", "y"):
        vm = out.get("brand_vector_map")
        part = vm[vm["source"] == "all"]
        if len(part):
            maps.append({"title": "look-alike map (mean image vectors)",
                         "points": [{"brand": str(b), "x": _clean(x), "y": _clean(y)}
                                    for b, x, y in zip(part["brand"], part["x"], part["y"])]})
    return maps

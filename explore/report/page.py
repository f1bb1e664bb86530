"""Assemble the report page: section data, bokeh figures, embedded data, HTML.

The page is one file. Bokeh's JavaScript is inlined (``bokeh.resources.INLINE``),
thumbnails are base64 WebP images inside one JSON block, and every table offered for
download is embedded as JSON too, so opening the file makes no request of any
kind.

Escaping: the HTML is rendered by Jinja2 with autoescaping on, so every text
from the output folder (file, folder, brand, attribute, context and survey
texts) is HTML-escaped where it appears. Data for the page's script sits in
``<script type="application/json">`` blocks with ``<``, ``>`` and ``&`` written
as ``\\u003c``, ``\\u003e`` and ``\\u0026``, so no text can close the block;
the script reads it with ``JSON.parse`` and writes texts into the page with
``textContent`` only.
"""

from __future__ import annotations

import math
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path

import pandas as pd

from explore.report import colours, figures
from explore.report.attributes_section import _attribute_validation, _split_prompts
from explore.report.comparison import (
    _agreement,
    _brand_map_points,
    _brand_view_data,
    _displacement_table,
    _map_uncertainty,
    _stability,
)
from explore.report.contexts_section import _contexts_section, _findings_section
from explore.report.data import OutputFolder
from explore.report.dropped import dropped_section
from explore.report.findings import findings_table, study_fdr
from explore.report.format import (  # noqa: F401
    MAX_HTML_ROWS,
    PER_IMAGE_TABLES,
    _clean,
    fmt_number,
    fmt_p,
    fmt_pct_points,
    html_table,
    script_json,
    table_json,
)
from explore.report.overview import (  # noqa: F401
    _gap_family,
    _overview,
    encoder_quality,
    faces_sentence,
    flatten_settings,
)
from explore.report.thumbnails import (
    MIME,
    choose_thumbnail_ids,
    thumbnails_for,
)

#: Most thumbnails the gallery under the map draws at once.
GALLERY_LIMIT = 240
#: Longest side of the larger copies shown in the photo viewer (context exemplars only, so size stays bounded).
LARGE_PX = 360


# --------------------------------------------------------------------------
# Building the page


def context_name_note(rec: dict) -> str:
    """One line under a context's name: how sure the name is, or that the analyst chose it."""
    source = str(rec.get("name_source") or "")
    conf = rec.get("name_confidence")
    candidates = str(rec.get("candidates") or "") if pd.notna(rec.get("candidates")) else ""
    if source == "analyst":
        suggested = str(rec.get("suggested_name") or "") if pd.notna(rec.get("suggested_name")) else ""
        return "named by the analyst (study file)" + (f"; the model suggested “{suggested}”" if suggested else "")
    if source == "zero-shot, weak":
        return (f"no confident name: the model's best phrase held in {float(conf):.0%} of bootstrap resamples of "
                f"these photos (a name needs 80 %); candidates: {candidates.replace(' | ', ', ')}")
    if source == "zero-shot" and conf is not None and pd.notna(conf):
        runner = str(rec.get("runner_up") or "") if pd.notna(rec.get("runner_up")) else ""
        return (f"name held in {float(conf):.0%} of bootstrap resamples of these photos"
                + (f" (runner-up: “{runner}”)" if runner else ""))
    return ""


def blurred_suffix(blur_faces: bool) -> str:
    """Thumbnail cache file suffix: names the face detector, so a new detector never reuses old blurring."""
    if not blur_faces:
        return ""
    from explore.report.faces import detector_id

    return "_faces_" + detector_id().replace(".", "-")


def build_page(
    out: OutputFolder,
    *,
    thumbnail_px: int,
    max_thumbnails: int,
    seed: int,
    cache_dir: Path | None,
    blur_faces: bool = True,
) -> str:
    """The whole report as HTML text.

    Parameters
    ----------
    out : the loaded output folder.
    thumbnail_px : longest side of embedded thumbnails.
    max_thumbnails : cap on embedded thumbnails (beyond: seeded sample + exemplars).
    seed : seed of that sample.
    cache_dir : where the thumbnail cache lives (None: no cache).
    blur_faces : blur detected faces in the thumbnails (``explore.report.faces``).
    """
    from bokeh.embed import file_html
    from bokeh.resources import INLINE

    run = out.run or {}
    notes: list[str] = list(out.problems)
    images_all = out.get("images")
    if images_all is None:
        images_all = pd.DataFrame(columns=["image_id", "path", "relpath", "brand", "category", "source", "status", "reason"])
    images_all = images_all.copy()
    for col in ("brand", "category", "source", "relpath", "status", "reason"):
        if col in images_all:
            images_all[col] = images_all[col].fillna("").astype(str)
    usable = images_all[images_all["status"] == "ok"].reset_index(drop=True) if "status" in images_all else images_all

    brands = sorted(usable["brand"].unique().tolist()) if "brand" in usable else []
    brand_category = (
        usable.drop_duplicates("brand").set_index("brand")["category"].to_dict() if "category" in usable else {}
    )
    categories = sorted(set(brand_category.values()))
    sources = [s for s in ("consumer", "owned") if "source" in usable and (usable["source"] == s).any()]
    sources += sorted(set(usable["source"]) - set(sources)) if "source" in usable else []

    # ---- contexts and map points
    ctx_table = out.get("contexts")
    image_contexts = out.get("image_contexts")
    has_map = out.has("image_contexts", "image_id", "context_id", "map_x", "map_y")
    context_list: list[dict] = []
    if out.has("contexts", "context_id", "context"):
        ctx_sorted = ctx_table.sort_values("context_id")
        ctx_sorted = ctx_sorted[ctx_sorted["context_id"] >= 0]
        palette = colours.categorical(len(ctx_sorted))
        for colour, row in zip(palette, ctx_sorted.itertuples(index=False)):
            rec = row._asdict()
            context_list.append({
                "id": int(rec["context_id"]),
                "name": str(rec["context"]),
                "size": int(rec["size"]) if "size" in rec and pd.notna(rec["size"]) else None,
                "name_score": _clean(rec.get("name_score")),
                "alternatives": str(rec.get("alternatives") or "") if pd.notna(rec.get("alternatives")) else "",
                "exemplars": str(rec.get("exemplars") or "").split(),
                "color": colour,
                "name_note": context_name_note(rec),
            })
    elif has_map:
        ids = sorted(int(c) for c in image_contexts["context_id"].unique() if c >= 0)
        names = image_contexts.drop_duplicates("context_id").set_index("context_id")["context"].to_dict()
        for colour, cid in zip(colours.categorical(len(ids)), ids):
            context_list.append({"id": cid, "name": str(names.get(cid, cid)), "size": None, "name_score": None,
                                 "alternatives": "", "exemplars": [], "color": colour})
    context_by_id = {c["id"]: c for c in context_list}

    points = usable[[c for c in ("image_id", "relpath", "brand", "category", "source") if c in usable]].copy()
    if has_map:
        ic = image_contexts.drop_duplicates("image_id").set_index("image_id")
        points = points[points["image_id"].isin(ic.index)].reset_index(drop=True)
        sub = ic.loc[points["image_id"]]
        points["context_id"] = sub["context_id"].astype(int).to_numpy()
        points["membership"] = sub["membership"].astype(float).to_numpy() if "membership" in sub else 0.0
        points["map_x"] = sub["map_x"].astype(float).to_numpy()
        points["map_y"] = sub["map_y"].astype(float).to_numpy()
    attributes: list[str] = []
    prob_matrix = None
    if out.has("image_attributes", "image_id", "attribute", "probability"):
        ia = out.get("image_attributes")
        if out.has("attribute_definitions", "attribute"):
            attributes = [str(a) for a in out.get("attribute_definitions")["attribute"]]
        else:
            attributes = list(dict.fromkeys(ia["attribute"].astype(str)))
        wide = ia.assign(attribute=ia["attribute"].astype(str)).pivot_table(
            index="image_id", columns="attribute", values="probability", aggfunc="first"
        )
        attributes = [a for a in attributes if a in wide.columns]
        prob_matrix = wide.reindex(points["image_id"])[attributes].to_numpy(dtype=float)

    # ---- thumbnails
    exemplar_ids = [i for c in context_list for i in c["exemplars"]]
    usable_ids = usable["image_id"].tolist() if "image_id" in usable else []
    strata = None
    if usable_ids and {"brand", "source"} <= set(usable.columns):
        ctx_of = points.set_index("image_id")["context_id"].to_dict() if "context_id" in points else {}
        strata = [(b, s_, ctx_of.get(i, -2)) for i, b, s_ in zip(usable_ids, usable["brand"], usable["source"])]
    choice = choose_thumbnail_ids(usable_ids, exemplar_ids, max_thumbnails, seed, strata)
    thumbs: dict[str, str] = {}
    face_counts: dict[str, int] = {}
    if choice.ids and "path" in usable:
        suffix = blurred_suffix(blur_faces)
        cache_file = cache_dir / f"thumbnails_{thumbnail_px}{suffix}_webp.parquet" if cache_dir else None
        thumbs = thumbnails_for(
            usable, choice.ids, thumbnail_px, cache_file, blur_faces=blur_faces, face_counts=face_counts
        )
        unreadable = len(choice.ids) - len(thumbs)
        if unreadable:
            notes.append(
                f"{unreadable:,} image file(s) could not be read again for thumbnails (moved or changed since the run); "
                "they appear on the map without a picture."
            )

    # Larger copies for the photo viewer: context exemplars only (a few per context).
    large: dict[str, str] = {}
    large_ids = [i for i in dict.fromkeys(exemplar_ids) if i in thumbs]
    if large_ids and "path" in usable:
        large_suffix = blurred_suffix(blur_faces)
        large_cache = cache_dir / f"thumbnails_{LARGE_PX}{large_suffix}_webp.parquet" if cache_dir else None
        large = thumbnails_for(usable, large_ids, LARGE_PX, large_cache, blur_faces=blur_faces)

    # Photos left out or flagged (reposts, near-duplicates, commercial posts): a few examples each.
    dropped = dropped_section(images_all, run.get("settings") or {})
    # Their thumbnails sit in the section itself (same cache, faces blurred the same way), not in the map's set.
    dropped_thumbs = {i: thumbs[i] for i in dropped["example_ids"] if i in thumbs}
    dropped_ids = [i for i in dropped["example_ids"] if i not in thumbs]
    if dropped_ids and "path" in images_all:
        suffix = blurred_suffix(blur_faces)
        cache_file = cache_dir / f"thumbnails_{thumbnail_px}{suffix}_webp.parquet" if cache_dir else None
        dropped_thumbs.update(thumbnails_for(images_all, dropped_ids, thumbnail_px, cache_file, blur_faces=blur_faces))
    for kind in dropped["kinds"]:
        for ex in kind["examples"]:
            b64 = dropped_thumbs.get(ex["image_id"])
            ex["thumb"] = f"data:{MIME};base64,{b64}" if b64 else ""

    # ---- per-point payload (columnar: compact and fast to read in the page)
    brand_ix = {b: i for i, b in enumerate(brands)}
    source_ix = {s: i for i, s in enumerate(sources)}
    cat_ix = {c: i for i, c in enumerate(categories)}
    point_payload = {
        "id": points["image_id"].tolist(),
        "file": points["relpath"].tolist() if "relpath" in points else [""] * len(points),
        "b": [brand_ix.get(b, -1) for b in points.get("brand", [])],
        "s": [source_ix.get(s, -1) for s in points.get("source", [])],
        "k": [cat_ix.get(c, -1) for c in points.get("category", [])],
        "c": points["context_id"].tolist() if "context_id" in points else [-1] * len(points),
        "t": [1 if i in thumbs else 0 for i in points["image_id"]],
        "p": (
            [[None if not math.isfinite(v) else round(v, 3) for v in col] for col in prob_matrix.T]
            if prob_matrix is not None else []
        ),
    }

    # ---- figures
    models = []
    plot_names: set[str] = set()

    def add(model):
        if model is not None:
            models.append(model)
            plot_names.add(model.name)

    map_colours = []
    if has_map and len(points):
        for cid in point_payload["c"]:
            map_colours.append(context_by_id[cid]["color"] if cid in context_by_id else colours.UNASSIGNED)
        add(figures.context_map(points["map_x"].to_numpy(), points["map_y"].to_numpy(), map_colours))

    bc = out.get("brand_contexts")
    has_bc = out.has("brand_contexts", "brand", "context_id", "index", "share")
    bc_all = None
    if has_bc:
        bc = bc.assign(brand=bc["brand"].astype(str), context=bc["context"].astype(str))
        bc_all = bc[bc["source"] == "all"] if "source" in bc else bc
        if bc_all.empty:
            bc_all = bc
        order = [(c["id"], c["name"]) for c in context_list] or list(
            bc_all.drop_duplicates("context_id").sort_values("context_id")[["context_id", "context"]].itertuples(index=False, name=None)
        )
        add(figures.context_heatmap(bc_all, [b for b in brands if b in set(bc_all["brand"])] or sorted(set(bc_all["brand"])), order,
                                    fdr=study_fdr(out.tables)))

    attr_sections = []
    gap_family = ""
    shares = out.get("attribute_shares")
    if out.has("attribute_shares", "level", "brand", "source", "attribute", "yes_rate", "yes_rate_low", "yes_rate_high"):
        shares = shares.assign(brand=shares["brand"].astype(str), attribute=shares["attribute"].astype(str))
        gaps = out.get("attribute_gaps")
        if gaps is not None and "attribute" in gaps:
            gaps = gaps.assign(attribute=gaps["attribute"].astype(str), brand=gaps["brand"].astype(str))
        defs = out.get("attribute_definitions")
        defs_by = {}
        if defs is not None and "attribute" in defs:
            for rec in defs.to_dict("records"):
                defs_by[str(rec["attribute"])] = rec
        gap_family = _gap_family(gaps)
        attr_names = attributes or list(dict.fromkeys(shares["attribute"]))
        for k, attr in enumerate(attr_names):
            rows = shares[(shares["level"] == "brand") & (shares["attribute"] == attr)]
            g = gaps[gaps["attribute"] == attr] if gaps is not None and "attribute" in gaps else None
            name = f"attribute_chart_{k}"
            chart = figures.attribute_chart(attr, rows, g, [b for b in brands if b in set(rows["brand"])] or sorted(set(rows["brand"])), name)
            add(chart)
            d = defs_by.get(attr, {})
            cat_rows = shares[(shares["level"] == "category") & (shares["attribute"] == attr) & (shares["source"] == "all")]
            sig = []
            if g is not None and "significant" in g:
                for rec in g[g["significant"].astype(bool)].to_dict("records"):
                    sig.append({"brand": rec["brand"], "gap": fmt_pct_points(rec.get("yes_rate_gap")),
                                "low": fmt_pct_points(rec.get("yes_rate_gap_low")), "high": fmt_pct_points(rec.get("yes_rate_gap_high"))})
            attr_sections.append({
                "validation": _attribute_validation(out, attr, shares),
                "name": attr,
                "anchor": f"attr-{k}",
                "chart": name if chart is not None else None,
                "positive": _split_prompts(d.get("positive_descriptions", d.get("positive_prompts", ""))),
                "negative": _split_prompts(d.get("negative_descriptions", d.get("negative_prompts", ""))),
                "positive_prompts": _split_prompts(d.get("positive_prompts", "")),
                "negative_prompts": _split_prompts(d.get("negative_prompts", "")),
                "threshold": fmt_number(d.get("threshold")) if d else "",
                "threshold_from": str(d.get("threshold_from", "")) if d else "",
                "scored_by": str(d.get("scored_by", "")) if d else "",
                "category_shares": [(str(r["category"]), f"{100 * r['yes_rate']:.1f} %") for r in cat_rows.to_dict("records")],
                "significant": sig,
            })

    comparison_plots = []
    if out.has("brand_map", "source", "brand", "pc1", "pc2"):
        bm = out.get("brand_map")
        loads = out.get("brand_map_loadings") if out.has("brand_map_loadings", "source", "attribute", "loading_1", "loading_2") else None
        spread = out.get("brand_map_bootstrap") if out.has("brand_map_bootstrap", "source", "brand") else None
        for k, src in enumerate(s for s in ("consumer", "owned", "survey") if s in set(bm["source"])):
            name = f"biplot_{k}"
            fig = figures.biplot(bm, loads, src, name, spread)
            add(fig)
            if fig is not None:
                comparison_plots.append({"name": name, "kind": "biplot", "source": src})
    if out.has("brand_displacement", "brand", "consumer_x", "consumer_y", "owned_x", "owned_y"):
        spread = out.get("brand_map_bootstrap") if out.has("brand_map_bootstrap", "source", "brand") else None
        fig = figures.displacement_plot(out.get("brand_displacement"), "displacement_plot", spread)
        add(fig)
    if out.has("brand_vector_map", "brand", "source", "x", "y"):
        add(figures.vector_map_plot(out.get("brand_vector_map"), "vector_map_plot"))

    # ---- section data for the template
    payload_tables = {}
    for name, table in out.tables.items():
        if name not in PER_IMAGE_TABLES:
            payload_tables[name] = table_json(table)
    # The "photos" CSV (one row per plotted image) is built in the page from the point payload and
    # the map's data source, so the per-image data is embedded once, not twice.

    brand_view = _brand_view_data(out, brands, bc, points, thumbs)
    brand_maps = _brand_map_points(out)

    payload = {
        "brands": brands,
        "brandCategory": brand_category,
        "categories": categories,
        "sources": sources,
        "contexts": [{k: c[k] for k in ("id", "name", "size", "color", "exemplars")} for c in context_list],
        "attributes": attributes,
        "points": point_payload,
        "colours": {
            "brand": colours.categorical(len(brands) + 3)[3:],
            "source": {"consumer": colours.CONSUMER, "owned": colours.OWNED},
            "category": colours.categorical(len(categories) + 7)[7:],
            "sequential": colours.SEQUENTIAL,
            "unassigned": colours.UNASSIGNED,
        },
        "brandView": brand_view,
        "brandMaps": brand_maps,
        "tables": payload_tables,
        "galleryLimit": GALLERY_LIMIT,
        "thumbMime": MIME,
    }

    overview = _overview(run, out, usable, images_all, choice, thumbs, notes)
    overview["faces"] = faces_sentence(blur_faces, face_counts, len(thumbs))
    findings = out.get("findings")
    if findings is None:
        findings = findings_table(out.tables)
    findings_section = _findings_section(out, findings, brands, brand_category, [a["name"] for a in attr_sections])
    contexts_section = _contexts_section(out, context_list, bc_all, brands)

    from jinja2 import Environment, PackageLoader, select_autoescape

    env = Environment(
        loader=PackageLoader("explore", "report"),
        autoescape=select_autoescape(default=True, default_for_string=True),
        trim_blocks=True,
        lstrip_blocks=True,
    )
    template = env.get_template("page.html.jinja")
    css = resources.files("explore.report").joinpath("report.css").read_text(encoding="utf-8")
    js = resources.files("explore.report").joinpath("report.js").read_text(encoding="utf-8")
    if "</script" in js.lower():
        raise RuntimeError("report.js must not contain a closing script tag")

    title = f"{run.get('study') or out.folder.name} — explore report"
    variables = dict(
        study=run.get("study") or out.folder.name,
        overview=overview,
        dropped=dropped,
        findings=findings_section,
        brands=brands,
        categories=categories,
        sources=sources,
        attributes=attributes,
        has_map=has_map and len(points) > 0,
        map_missing=out.missing("image_contexts", "image_id", "context_id", "map_x", "map_y"),
        n_points=len(points),
        contexts=contexts_section,
        heatmap_missing=out.missing("brand_contexts", "brand", "context_id", "index", "share"),
        attr_sections=attr_sections,
        gap_family=gap_family,
        attr_missing=out.missing("attribute_shares", "level", "brand", "source", "attribute", "yes_rate", "yes_rate_low", "yes_rate_high"),
        agreement=_agreement(out),
        context_stability=_stability(out),
        map_uncertainty=_map_uncertainty(out),
        comparison_plots=comparison_plots,
        compare_missing=out.missing("brand_map", "source", "brand", "pc1", "pc2"),
        displacement=_displacement_table(out),
        survey=html_table(out.get("survey")) if out.has("survey") else None,
        plot_names=plot_names,
        report_css=css,
        report_js=js,
        data_json=script_json(payload),
        thumbs_json=script_json(thumbs),
        large_json=script_json(large),
        built_at=datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
    )
    if not models:
        # bokeh needs at least one root; an empty spacer keeps the page valid.
        from bokeh.models import Spacer

        models = [Spacer(name="empty_spacer", width=1, height=1)]
        plot_names.add("empty_spacer")
    from bokeh.document import Document

    doc = Document()
    with doc.models.freeze():  # one model-graph walk for all roots instead of one per root
        for model in models:
            doc.add_root(model)
    return file_html(doc, INLINE, title=title, template=template, template_variables=variables)



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

import json
import math
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd

from explore.report import colours, figures
from explore.report.advice import advice_lines
from explore.report.data import OutputFolder
from explore.report.findings import findings_basis, findings_table, study_fdr
from explore.report.tables import cell as table_cell
from explore.report.tables import label as column_label
from explore.report.tables import readable
from explore.report.thumbnails import MIME, ThumbnailChoice, choose_thumbnail_ids, thumbnails_for

#: Per-image tables: too large to embed as they are; the page offers the plotted
#: images (ids, brand, source, context, map position, attribute probabilities) instead.
PER_IMAGE_TABLES = ("images", "image_attributes", "image_contexts")
#: Most rows of a table written into the HTML itself (the CSV download has all).
MAX_HTML_ROWS = 300
#: Most thumbnails the gallery under the map draws at once.
GALLERY_LIMIT = 240
#: Longest side of the larger copies shown in the photo viewer (context exemplars only, so size stays bounded).
LARGE_PX = 360


# --------------------------------------------------------------------------
# JSON that is safe inside <script>


def script_json(value) -> str:
    """JSON text that can sit inside ``<script type="application/json">``.

    ``<``, ``>`` and ``&`` (and the JavaScript line separators U+2028/2029) are
    written as unicode escapes; JSON.parse reads them back unchanged.
    """
    text = json.dumps(value, ensure_ascii=False, separators=(",", ":"), allow_nan=False, default=_json_default)
    return (
        text.replace("<", "\\u003c")
        .replace(">", "\\u003e")
        .replace("&", "\\u0026")
        .replace("\u2028", "\\u2028")
        .replace("\u2029", "\\u2029")
    )


def _json_default(value):
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, (np.ndarray, list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, (pd.Timestamp, datetime)):
        return value.isoformat()
    return str(value)


def _clean(v):
    """A scalar ready for JSON (NaN -> None, numpy -> Python)."""
    if v is None:
        return None
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return v if math.isfinite(v) else None
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.bool_):
        return bool(v)
    if isinstance(v, (str, bool, int)):
        return v
    if isinstance(v, (list, tuple, np.ndarray)):
        return [_clean(x) for x in v]
    try:
        if pd.isna(v):
            return None
    except (TypeError, ValueError):
        pass
    return str(v)


def table_json(table: pd.DataFrame) -> dict:
    """A table as {"columns": [...], "rows": [[...], ...]} for the page's CSV download."""
    return {
        "columns": [str(c) for c in table.columns],
        "rows": [[_clean(v) for v in row] for row in table.itertuples(index=False, name=None)],
    }


# --------------------------------------------------------------------------
# Formatting helpers for the template


def fmt_number(v, digits: int = 3) -> str:
    """Readable text for a table cell (numbers rounded, NaN as an en dash)."""
    if v is None:
        return "–"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    if isinstance(v, (float, np.floating)):
        v = float(v)
        if not math.isfinite(v):
            return "–"
        if v == int(v) and abs(v) < 1e15:
            return f"{int(v):,}"
        return f"{v:.{digits}g}" if abs(v) < 1e-3 or abs(v) >= 1e4 else f"{v:,.{digits}f}".rstrip("0").rstrip(".")
    try:
        if pd.isna(v):
            return "–"
    except (TypeError, ValueError):
        pass
    return str(v)


def fmt_p(v) -> str:
    """A p- or q-value as text: "< 0.001" for tiny values (never "0"), else 3 decimals; "–" when missing."""
    from explore.compare import format_p

    return format_p(v)


def _is_p_column(name: str) -> bool:
    name = str(name)
    return name in ("p_value", "q_value") or name.endswith(("_p", "_q"))


def html_table(table: pd.DataFrame, columns: list[str] | None = None, limit: int = MAX_HTML_ROWS) -> dict:
    """Rows of readable cells (human headers, units, rounding) for the template, at most ``limit`` rows."""
    return readable(table, columns, limit)


def encoder_quality(encoder_id: str) -> dict:
    """What the encoder id means for the quality of the numbers."""
    eid = (encoder_id or "").lower()
    if eid.startswith("bundled"):
        return {
            "level": "lower",
            "label": "Bundled encoder: lower fidelity than a CLIP model",
            "text": (
                "Photos were read by a small ImageNet classifier (EfficientNet-Lite0) and attributes were "
                "scored through the names of the 1,000 object classes it knows (ConSE zero-shot, with the "
                "MiniLM sentence encoder). It runs anywhere without downloads. It can see objects, animals, "
                "food, drinks, vehicles, plants and equipment (the things ImageNet names); it cannot see mood, "
                "style, light, colour schemes, facial expressions, logos or text, so attribute scores and "
                "context names are coarse. Treat the numbers as a first look and rerun the study with a CLIP "
                "encoder before quoting them. To get it: run `explore fetch-model` on a computer with internet "
                "access and copy the file it names here (README, Offline machines), or run once with internet "
                "access and the encoder set to auto."
            ),
        }
    if eid.startswith("clip") or "clip" in eid:
        return {
            "level": "standard",
            "label": "CLIP encoder",
            "text": (
                "Photos and attribute prompts were embedded in one shared space by an open_clip model trained "
                "on image and text pairs, the higher-fidelity option of explore. Scores are still zero-shot "
                "estimates, not hand labels."
            ),
        }
    return {
        "level": "unknown",
        "label": "Encoder not recorded" if not eid else "Unrecognised encoder",
        "text": "The run did not record a known encoder, so the quality of the scores cannot be judged here.",
    }


def flatten_settings(settings, prefix: str = "") -> list[tuple[str, str]]:
    """Nested settings -> (dotted key, text) pairs; attributes are shown in their own section."""
    out: list[tuple[str, str]] = []
    if isinstance(settings, dict):
        for key, value in settings.items():
            if key in ("attributes", "brands") and not prefix:
                continue
            name = f"{prefix}.{key}" if prefix else str(key)
            if isinstance(value, dict) and value:
                out += flatten_settings(value, name)
            else:
                out.append((name, _setting_text(value)))
    return out


def _setting_text(value) -> str:
    if value is None:
        return "not set (automatic)"
    if isinstance(value, (list, tuple)):
        return ", ".join(str(v) for v in value) if value else "(none)"
    if isinstance(value, dict):
        return "(none)"
    return str(value)


# --------------------------------------------------------------------------
# Building the page


def blurred_suffix(blur_faces: bool) -> str:
    """Thumbnail cache file suffix: names the face detector, so a new detector never reuses old blurring."""
    if not blur_faces:
        return ""
    from explore.report.faces import detector_id

    return "_faces_" + detector_id().replace(".", "-")


def faces_sentence(blur_faces: bool, face_counts: dict[str, int], n_thumbs: int) -> str:
    """What the report did about faces, in one sentence for the privacy card."""
    from explore.report.faces import detector_description

    if not blur_faces:
        return (
            "Faces are NOT blurred in this file (turned off with report.blur_faces = false or "
            "--show-faces): treat every thumbnail as showing people recognisably."
        )
    faces = sum(face_counts.values())
    pictures = sum(1 for v in face_counts.values() if v)
    return (
        f"Faces are blurred where detected: {faces:,} face(s) in {pictures:,} of {n_thumbs:,} thumbnails "
        f"({detector_description()}). The detector misses some faces (small, turned, covered), so the caution above "
        "still applies. Blurring is for this file only: the analysis used the original photos."
    )


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


def _pct(v) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return "–"
    return "–" if not math.isfinite(v) else f"{100 * v:.0f} %"


def _attribute_validation(out: OutputFolder, attr: str, shares: pd.DataFrame) -> dict:
    """What an attribute card says about checking: labels, AUC, accuracy, which number is shown, warnings."""
    view = {"checked": False, "lines": [], "warnings": [], "reword": [], "shares": None,
            "shown": "the model's yes-rate (no random hand labels, so not corrected for the model's errors)"}
    check = out.get("attribute_check") if out.has("attribute_check", "attribute", "n", "auc") else None
    row = None
    if check is not None:
        mine = check[check["attribute"].astype(str) == attr]
        row = mine.iloc[0].to_dict() if len(mine) else None
    if row is not None:
        view["checked"] = True
        sampled = str(row.get("sampled") or "sample design not recorded")
        view["lines"].append(
            f"labels: {fmt_number(row.get('n_positive'))} yes, {fmt_number(row.get('n_negative'))} no ({sampled})")
        if bool(row.get("enough")):
            auc, lo, hi = (float(row.get(k, np.nan)) for k in ("auc", "auc_low", "auc_high"))
            view["lines"].append(f"AUC {auc:.2f} (95 % interval {lo:.2f}–{hi:.2f}; 0.5 = chance, 1 = perfect)")
            acc, chance = float(row.get("accuracy", np.nan)), float(row.get("chance_accuracy", np.nan))
            view["lines"].append(
                f"accuracy {_pct(acc)} at the threshold used; always guessing the larger class: {_pct(chance)}")
            if not bool(row.get("better_than_chance")):
                view["warnings"].append("Not shown to be better than chance: the AUC interval includes 0.5. "
                                        "Do not read differences between brands from the model's numbers.")
            if math.isfinite(acc) and math.isfinite(chance) and acc < chance:
                view["warnings"].append("Accuracy is below always guessing the larger class: the yes/no calls "
                                        "are worse than no model at all.")
            if math.isfinite(auc) and auc < 0.5:
                view["warnings"].append("The descriptions work against their own side (AUC below 0.5): reword or remove.")
            gn = row.get("grade_n")
            if gn is not None and math.isfinite(float(gn)) and float(gn) > 0:
                view["lines"].append(
                    f"graded answers (1–7, {int(gn)} images): Spearman rho {fmt_number(row.get('grade_spearman'))}, "
                    f"Harrell's C {fmt_number(row.get('grade_harrell_c'))}")
        else:
            view["warnings"].append(str(row.get("warning") or "too few labels to say anything"))
        desc = out.get("attribute_check_descriptions") if out.has(
            "attribute_check_descriptions", "attribute", "side", "description", "auc") else None
        if desc is not None:
            bad = desc[(desc["attribute"].astype(str) == attr) & (desc["auc"].astype(float) < 0.5)]
            view["reword"] = [f"{r['side']}: “{r['description']}” (AUC {float(r['auc']):.2f})" for r in bad.to_dict("records")]
    else:
        view["lines"].append("not checked against hand labels (explore label, then explore run --labels)")
    if "share" in shares:
        mine = shares[(shares["attribute"] == attr) & (shares["level"] == "brand") & shares["share"].notna()]
        if len(mine):
            method = str(mine["share_method"].iloc[0])
            view["shown"] = (f"corrected shares below ({method}, from {int(mine['labels_used'].max())} random labels "
                             "per brand); the bars above are the model's yes-rate")
            rows = []
            for r in mine.sort_values(["brand", "source"]).to_dict("records"):
                rows.append([r["brand"], r["source"], f"{100 * r['share']:.0f} %",
                             f"{100 * r['share_low']:.0f}–{100 * r['share_high']:.0f} %",
                             f"{100 * r['labels_only_low']:.0f}–{100 * r['labels_only_high']:.0f} %",
                             fmt_number(r.get("labels_used"))])
            view["shares"] = {"columns": ["brand", "source", "share", "95 % interval", "labels alone", "labels"],
                              "rows": rows}
    return view


def fmt_pct_points(v) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return "–"
    return "–" if not math.isfinite(v) else f"{100 * v:+.1f}"


def _split_prompts(text) -> list[str]:
    if text is None:
        return []
    if isinstance(text, (list, tuple, np.ndarray)):
        return [str(t) for t in text]
    try:
        if pd.isna(text):
            return []
    except (TypeError, ValueError):
        pass
    return [t.strip() for t in str(text).split(" | ") if t.strip()]


def _posters_caveat(usable: pd.DataFrame) -> str:
    """One line: are photos clustered by poster, or assumed independent?"""
    posters = usable["poster"].fillna("").astype(str) if "poster" in usable else pd.Series([], dtype=str)
    known = posters[posters != ""]
    if known.empty:
        return ("No poster ids were given, so photos are assumed independent; where one poster posted "
                "several photos, intervals and tests are too narrow.")
    return (f"Intervals and tests treat the photos of each of the {known.nunique()} posters as a cluster "
            f"(effective n beside n in the CSVs).")


def _gap_family(gaps) -> str:
    """What 'significant gap' means in this report, from the attribute_gaps table."""
    if gaps is None or "family" not in gaps or "p_value" not in gaps:
        return ""
    tested = int(gaps["p_value"].notna().sum())
    if not tested:
        return ""
    text = (f"A gap is marked significant only after Benjamini-Hochberg over the family of all "
            f"{tested} brand × attribute gaps")
    if "context_q_value" in gaps and gaps["context_q_value"].notna().any():
        text += ", and only if it stays significant, with the same sign, after adjusting for context (Mantel-Haenszel)"
    text += f": {int(gaps['significant'].astype(bool).sum())} of {tested}."
    if "power_warning" in gaps:
        weak = int((gaps["power_warning"].fillna("").astype(str) != "").sum())
        if weak:
            text += f" {weak} of {tested} brand × attribute cells have too few photos to detect a 10-point gap at 80 % power."
    return text


def _overview(run: dict, out: OutputFolder, usable: pd.DataFrame, images_all: pd.DataFrame,
              choice: ThumbnailChoice, thumbs: dict, notes: list[str]) -> dict:
    counts_rows = []
    if len(usable) and {"brand", "source"} <= set(usable.columns):
        pivot = usable.pivot_table(index="brand", columns="source", values="image_id", aggfunc="count", fill_value=0)
        for brand, row in pivot.iterrows():
            cells = {s: int(row.get(s, 0)) for s in ("consumer", "owned")}
            counts_rows.append({
                "brand": brand,
                "category": str(usable.loc[usable["brand"] == brand, "category"].iloc[0]) if "category" in usable else "",
                "consumer": cells["consumer"], "owned": cells["owned"], "total": int(row.sum()),
            })
    skipped = images_all[images_all["status"] != "ok"] if "status" in images_all else images_all.iloc[0:0]
    status_counts = skipped["status"].value_counts().to_dict() if len(skipped) else {}
    near = 0
    if "near_duplicate_of" in usable:
        near = int((usable["near_duplicate_of"].fillna("").astype(str) != "").sum())
    settings = run.get("settings") or {}
    study_attrs = settings.get("attributes") or []
    encoder_id = str(run.get("encoder_id") or "")
    written = str(run.get("written_at") or "")
    return {
        "written_at": written.replace("T", " ").replace("+00:00", " UTC"),
        "encoder_id": encoder_id or "not recorded",
        "encoder_notice": str(run.get("encoder_notice") or ""),
        "quality": encoder_quality(encoder_id),
        "found": int(run.get("counts", {}).get("found", len(images_all))),
        "used": len(usable),
        "skipped": len(skipped),
        "n_brands": len(set(usable["brand"])) if "brand" in usable else 0,
        "counts": counts_rows,
        "status_counts": sorted(status_counts.items(), key=lambda kv: -kv[1]),
        "skipped_table": html_table(skipped, ["relpath", "brand", "source", "status", "reason", "duplicate_of"])
        if len(skipped) else None,
        "near_duplicates": near,
        "posters": _posters_caveat(usable),
        "settings": flatten_settings(settings),
        "study_attributes": [str(a.get("name", "")) for a in study_attrs if isinstance(a, dict)],
        "stage_seconds": [(k, f"{float(v):.1f} s") for k, v in (run.get("stage_seconds") or {}).items()],
        "run_notes": [str(n) for n in run.get("notes") or []],
        "notes": notes,
        "thumbnails": choice.describe() if choice.total else "No usable images, so no thumbnails.",
        "thumbnails_sampled": choice.sampled,
        "n_thumbs": len(thumbs),
        "tables": sorted(n for n in out.tables if n not in PER_IMAGE_TABLES),
        "folder": str(run.get("output") or out.folder),  # a run builds its report in a staging folder
        "run_id": str(run.get("run_id") or ""),
    }


def _findings_section(out: OutputFolder, findings: pd.DataFrame, brands: list[str], brand_category: dict,
                      attribute_names: list[str]) -> dict:
    """Per brand: its findings with their evidence links, then what they rest on and the advice."""
    anchors = {a: f"attr-{k}" for k, a in enumerate(attribute_names)}
    blocks = []
    for brand in brands:
        rows = findings[findings["brand"].astype(str) == brand].sort_values("rank") if len(findings) else findings
        items = []
        for rec in rows.to_dict("records"):
            evidence = str(rec.get("evidence") or "")
            item = {"rank": int(rec["rank"]), "kind": str(rec["kind"]), "sentence": str(rec["sentence"]),
                    "value": _clean(rec.get("value")), "test": str(rec.get("test") or ""),
                    "estimand": str(rec.get("estimand") or ""), "context_id": None, "source": "all", "anchor": ""}
            if evidence.startswith("photos:"):
                item["context_id"] = _clean(rec.get("context_id"))
                src = str(rec.get("source") or "all")
                item["source"] = src if src in ("consumer", "owned") else "all"
                item["anchor"] = f"context-{int(rec['context_id'])}"
            elif evidence.startswith("chart:"):
                item["anchor"] = anchors.get(str(rec.get("attribute")), "attributes")
            items.append(item)
        blocks.append({"brand": brand, "category": str(brand_category.get(brand, "")), "findings": items})
    return {
        "blocks": blocks,
        "basis": findings_basis(out.tables),
        "advice": advice_lines(out.tables, out.run, findings),
        "total": len(findings),
    }


def _contexts_section(out: OutputFolder, context_list: list[dict], bc_all, brands: list[str]) -> dict:
    cards = []
    for c in context_list:
        indices = []
        if bc_all is not None:
            rows = bc_all[bc_all["context_id"] == c["id"]]
            for rec in rows.sort_values("index", ascending=False).to_dict("records"):
                idx = _clean(rec.get("index"))
                indices.append({
                    "brand": rec["brand"],
                    "index": "–" if idx is None else f"{idx:.0f}",
                    "count": fmt_number(rec.get("count")),
                    "colour": colours.diverging_index(idx if idx is not None else float("nan")),
                    "dark": idx is not None and idx > 0 and abs(math.log2(idx / 100)) > 1.2,
                })
        cards.append({**c, "indices": indices})
    lists = []
    tested = _tests_sentences(out)
    for key, title in (("signature_contexts", "Signature contexts"), ("unexpected_contexts", "Unexpected contexts")):
        table = out.get(key)
        if table is None or not len(table):
            missing = out.missing(key)
            if table is not None and not len(table):
                missing = tested[key]
            lists.append({"key": key, "title": title, "missing": missing, "rows": []})
            continue
        preferred = ["brand", "source", "context", "count", "brand_n", "share", "category_share",
                     "index", "q_value", "reason"]
        cols = [c for c in preferred if c in table.columns]
        if "source" in cols and set(table["source"].astype(str)) <= {"all"}:
            cols.remove("source")
        rows = []
        sort_cols = [c for c in ("brand", "index") if c in table.columns]
        t = table.sort_values(sort_cols, ascending=[True, False][: len(sort_cols)]) if sort_cols else table
        for rec in t.head(MAX_HTML_ROWS).to_dict("records"):
            rows.append({
                "cells": [table_cell(col, rec.get(col), rec.get("brand_n")) for col in cols],
                "brand": str(rec.get("brand", "")),
                "context_id": int(rec["context_id"]) if "context_id" in rec and pd.notna(rec["context_id"]) else None,
                "context": str(rec.get("context", "")),
                "source": str(rec.get("source", "all") or "all"),
            })
        lists.append({"key": key, "title": title, "missing": "", "columns": [column_label(c) for c in cols],
                      "rows": rows, "total": len(table)})
    gaps = out.get("source_context_gaps")
    return {
        "cards": cards,
        "lists": lists,
        "missing": "" if context_list else out.missing("contexts", "context_id", "context"),
        "source_gaps": html_table(gaps) if out.has("source_context_gaps") else None,
        "source_gaps_empty": tested["source_context_gaps"] if gaps is not None and not len(gaps) else "",
    }


def _tests_sentences(out: OutputFolder) -> dict[str, str]:
    """What was tested, for tables that came out empty (a sentence instead of "table is empty")."""
    ctx = out.get("contexts")

    def setting(name, default):
        if ctx is not None and f"setting_{name}" in ctx and len(ctx):
            v = ctx[f"setting_{name}"].iloc[0]
            return default if pd.isna(v) else v
        return default

    fdr, min_index, min_count = setting("fdr", 0.05), setting("min_index", 120), setting("min_count", 5)
    rare, ratio = setting("rare_category_share", 0.05), setting("dominance_ratio", 2)
    return {
        "signature_contexts": (
            f"No brand shows up in any context clearly more than the rest of its category. Tested: every brand and "
            f"context with a two-sided Fisher exact test against the rest of the category, Benjamini-Hochberg q at most "
            f"{float(fdr):g}, index at least {float(min_index):.0f} and at least {int(min_count)} photos"
        ),
        "unexpected_contexts": (
            f"None of the signature contexts is unusual for its category. Tested: signature contexts where the "
            f"category has under {100 * float(rare):.0f} % of its photos, or another category is at least "
            f"{float(ratio):g} times as present"
        ),
        "source_context_gaps": (
            f"No context differs between a brand's consumer and owned photos. Tested: every brand with both sources, "
            f"two-sided Fisher exact test, Benjamini-Hochberg q at most {float(fdr):g}, at least {int(min_count)} photos"
        ),
    }


def _fmt_cell(column: str, value) -> str:
    if column in ("share", "category_share", "consumer_share", "owned_share") and value is not None:
        try:
            v = float(value)
            return "–" if not math.isfinite(v) else f"{100 * v:.1f} %"
        except (TypeError, ValueError):
            pass
    if column == "index" and value is not None:
        try:
            v = float(value)
            return "–" if not math.isfinite(v) else f"{v:.0f}"
        except (TypeError, ValueError):
            pass
    return fmt_number(value)


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

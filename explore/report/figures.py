"""Bokeh figures of the report: context map, brand x context heatmap, attribute
shares, brand maps.

Each function takes plain DataFrames and returns one bokeh model with a
``name`` (the page places it by that name) or None when its data is missing.
User-provided strings only ever reach bokeh as data (axis factors, labels and
hover fields); bokeh draws them as canvas text or escapes them in tooltips,
and the page never feeds them to an HTML-rendering model (Div, Paragraph).
Colours are the report's own (see :mod:`explore.report.colours`).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from explore.report.colours import (
    CONSUMER,
    INK,
    LINE,
    MUTED,
    OWNED,
    PAPER,
    SURVEY,
    diverging_index,
)

SOURCE_COLOURS = {"consumer": CONSUMER, "owned": OWNED, "all": MUTED, "survey": SURVEY}


def _style(p) -> None:
    """Shared look: quiet grid, our ink and paper colours."""
    p.background_fill_color = "#ffffff"
    p.border_fill_color = PAPER
    p.outline_line_color = LINE
    p.toolbar.logo = None
    p.toolbar.autohide = False
    for axis in p.axis:
        axis.axis_line_color = LINE
        axis.major_tick_line_color = LINE
        axis.minor_tick_line_color = None
        axis.major_label_text_color = INK
        axis.axis_label_text_color = MUTED
        axis.axis_label_text_font_style = "normal"
    p.grid.grid_line_color = "#efebe3"
    if p.title is not None:
        p.title.text_color = INK
        p.title.text_font_size = "13px"


# --------------------------------------------------------------------------
# Context map


def rgba_array(colours: list[str]) -> np.ndarray:
    """'#rrggbb' colours -> n x 4 uint8 RGBA (opaque)."""
    palette = {c: (int(c[1:3], 16), int(c[3:5], 16), int(c[5:7], 16), 255) for c in set(colours)}
    out = np.empty((len(colours), 4), dtype=np.uint8)
    for k, c in enumerate(colours):
        out[k] = palette[c]
    return out


def context_map(x: np.ndarray, y: np.ndarray, colours: list[str]):
    """WebGL scatter of the 2-D map, one glyph per plotted image.

    The data source holds only what the canvas needs (x, y, colour and the row
    index ``i`` into the page's point table); the page's script recolours,
    filters (through the view's BooleanFilter), shows the hover card and fills
    the gallery from a selection.
    """
    from bokeh.models import (
        BooleanFilter,
        BoxSelectTool,
        CDSView,
        ColumnDataSource,
        CustomJS,
        HoverTool,
        LassoSelectTool,
        PanTool,
        ResetTool,
        WheelZoomTool,
    )
    from bokeh.plotting import figure

    n = len(x)
    # Colours as an n x 4 uint8 RGBA array and no initial filter list: binary columns that bokeh
    # reads without parsing 100,000 strings (the page script may later set CSS colour strings).
    source = ColumnDataSource(
        data=dict(x=np.asarray(x, dtype=np.float32), y=np.asarray(y, dtype=np.float32),
                  color=rgba_array(colours), i=np.arange(n, dtype=np.int32)),
        name="map_source",
    )
    view = CDSView(filter=BooleanFilter(booleans=None, name="map_filter"))
    box = BoxSelectTool()
    lasso = LassoSelectTool()
    wheel = WheelZoomTool()
    p = figure(
        name="context_map",
        output_backend="webgl",
        tools=[PanTool(), wheel, box, lasso, ResetTool()],
        active_drag=box,
        active_scroll=wheel,
        height=560,
        sizing_mode="stretch_width",
    )
    size = 7 if n < 2000 else (5 if n < 10000 else 4)
    renderer = p.scatter(
        "x", "y", source=source, view=view, size=size, fill_color="color", line_color=None,
        fill_alpha=0.8, selection_fill_alpha=0.95, nonselection_fill_alpha=0.12,
        selection_line_color=None, nonselection_line_color=None, name="map_points",
    )
    hover = HoverTool(
        renderers=[renderer],
        tooltips=None,
        callback=CustomJS(code="if (window.ExploreReport) { window.ExploreReport.mapHover(cb_data); }"),
    )
    p.add_tools(hover)
    source.selected.js_on_change(
        "indices",
        CustomJS(args=dict(src=source), code="if (window.ExploreReport) { window.ExploreReport.mapSelect(src.selected.indices); }"),
    )
    _style(p)
    p.axis.visible = False
    p.grid.visible = False
    return p


# --------------------------------------------------------------------------
# Brand x context heatmap


def context_label(context_id, name) -> str:
    """Unique display label of a context (names may repeat across clusters)."""
    return f"{int(context_id)} · {name}"


def context_heatmap(brand_contexts: pd.DataFrame, brands_order: list[str], context_order: list[tuple], fdr: float = 0.05):
    """Cells coloured by index (diverging around 100 on a log scale), counts on hover.

    Cells significant after correction (BH ``q_value`` at most ``fdr``) get a
    dark outline and a star; cells that were not tested (``q_value`` NaN: too
    few photos in the category for the context, see ``min_count``) are grey
    with a dash, so a strong colour from two photos is not read as a result.

    Parameters
    ----------
    brand_contexts : rows with source ``all`` (brand, context_id, context, count, brand_n,
        share, category_share, index, q_value).
    brands_order : brands top to bottom.
    context_order : (context_id, name) left to right.
    """
    from bokeh.models import ColumnDataSource, FactorRange, HoverTool
    from bokeh.plotting import figure

    table = brand_contexts.copy()
    table["label"] = [context_label(c, n) for c, n in zip(table["context_id"], table["context"])]
    table["brand"] = table["brand"].astype(str)
    x_factors = [context_label(c, n) for c, n in context_order]
    table = table[table["label"].isin(x_factors) & table["brand"].isin(brands_order)]
    if table.empty:
        return None
    index = table["index"].astype(float).to_numpy()
    q = table["q_value"].astype(float).to_numpy() if "q_value" in table else np.full(len(table), np.nan)
    tested = np.isfinite(q)
    significant = tested & (q <= fdr)
    table["color"] = [diverging_index(v) if t else "#e6e3dd" for v, t in zip(index, tested)]
    table["index_text"] = [("–" if not (np.isfinite(v) and t) else f"{v:.0f}" + ("*" if s else ""))
                           for v, t, s in zip(index, tested, significant)]
    table["judged"] = ["significant after correction" if s else ("tested, not significant" if t else "too few photos to test")
                       for t, s in zip(tested, significant)]
    table["outline_alpha"] = [1.0 if s else 0.0 for s in significant]
    table["share_pct"] = (100 * table["share"].astype(float)).round(1)
    table["category_pct"] = (100 * table["category_share"].astype(float)).round(1)
    table["q_text"] = [f"{q:.3g}" for q in table.get("q_value", pd.Series(np.nan, index=table.index)).astype(float)]
    table["text_color"] = ["#ffffff" if t and np.isfinite(v) and abs(math.log2(max(v, 1e-9) / 100)) > 1.2 else
                           (INK if t else MUTED) for v, t in zip(index, tested)]
    cols = ["label", "brand", "context", "color", "index_text", "count", "brand_n", "share_pct", "category_pct",
            "q_text", "text_color", "judged", "outline_alpha"]
    source = ColumnDataSource({c: table[c].tolist() for c in cols})
    cell = 44
    width = max(420, 260 + cell * len(x_factors))
    p = figure(
        name="context_heatmap",
        x_range=FactorRange(*x_factors),
        y_range=FactorRange(*reversed(brands_order)),
        height=max(220, 150 + 34 * len(brands_order)),
        width=min(width, 1400),
        tools="",
        toolbar_location=None,
        x_axis_location="above",
        min_border_right=90,  # the last slanted context name needs room
    )
    p.rect("label", "brand", 0.94, 0.9, source=source, fill_color="color", line_color=INK,
           line_alpha="outline_alpha", line_width=2)
    p.text("label", "brand", text="index_text", source=source, text_align="center", text_baseline="middle",
           text_font_size="11px", text_color="text_color")
    p.add_tools(HoverTool(tooltips=[
        ("brand", "@brand"), ("context", "@context"), ("index", "@index_text"),
        ("photos", "@count of @brand_n"), ("brand share", "@share_pct %"),
        ("category share", "@category_pct %"), ("q (BH)", "@q_text"), ("judged", "@judged"),
    ]))
    _style(p)
    p.xaxis.major_label_orientation = 0.9
    p.grid.visible = False
    p.axis.axis_line_color = None
    p.axis.major_tick_line_color = None
    return p


# --------------------------------------------------------------------------
# Attribute yes-rates


def attribute_chart(attribute: str, shares: pd.DataFrame, gaps: pd.DataFrame | None, brands_order: list[str], name: str):
    """Horizontal bars: each brand's yes-rate per source with its interval; significant gaps marked.

    Parameters
    ----------
    attribute : the attribute shown.
    shares : attribute_shares rows of level ``brand`` for this attribute.
    gaps : attribute_gaps rows for this attribute (``significant``), or None.
    brands_order : brands top to bottom.
    name : the bokeh model name (the page places the chart by it).
    """
    from bokeh.models import ColumnDataSource, FactorRange, HoverTool, Whisker
    from bokeh.plotting import figure

    rows = shares.copy()
    rows["brand"] = rows["brand"].astype(str)
    have = set(rows["source"])
    sources = [s for s in ("consumer", "owned") if s in have] or ["all"]
    rows = rows[rows["source"].isin(sources) & rows["brand"].isin(brands_order)]
    if rows.empty:
        return None
    factors = [(b, s) for b in brands_order for s in sources if ((rows["brand"] == b) & (rows["source"] == s)).any()]
    rows["factor"] = list(zip(rows["brand"], rows["source"]))
    rows = rows.set_index("factor").loc[factors].reset_index()
    rows["color"] = [SOURCE_COLOURS.get(s, MUTED) for s in rows["source"]]
    rows["share_pct"] = (100 * rows["yes_rate"]).round(1)
    rows["interval"] = [f"{100 * lo:.1f} – {100 * hi:.1f} %" for lo, hi in zip(rows["yes_rate_low"], rows["yes_rate_high"])]
    source = ColumnDataSource(dict(
        factor=rows["factor"].tolist(), share=rows["yes_rate"].astype(float), low=rows["yes_rate_low"].astype(float),
        high=rows["yes_rate_high"].astype(float), color=rows["color"], brand=rows["brand"], source=rows["source"],
        n=rows["n"], positives=rows["positives"], share_pct=rows["share_pct"], interval=rows["interval"],
    ))
    p = figure(
        name=name,
        y_range=FactorRange(*reversed(factors)),
        x_range=(0, 1.08),
        height=max(160, 60 + 20 * len(factors)),
        sizing_mode="stretch_width",
        tools="",
        toolbar_location=None,
    )
    bars = [p.hbar(y="factor", right="share", left=0, height=0.72, source=source, fill_color="color",
                   line_color=None, fill_alpha=0.85)]
    p.add_layout(Whisker(source=source, base="factor", lower="low", upper="high", dimension="width",
                         line_color=INK, line_width=1.2, upper_head=None, lower_head=None))
    tips = [("brand", "@brand"), ("source", "@source"), ("model's yes-rate", "@share_pct %"),
            ("95 % interval", "@interval"), ("photos the model calls positive", "@positives of @n")]
    if "mean_probability" in rows:
        source.data["mean"] = rows["mean_probability"].astype(float)
        source.data["mean_text"] = [f"{v:.2f}" for v in rows["mean_probability"].astype(float)]
        bars.append(p.scatter("mean", "factor", source=source, size=7, fill_color="#ffffff", line_color=INK,
                              line_width=1.3))
        tips.append(("mean probability", "@mean_text"))
    p.add_tools(HoverTool(renderers=bars, tooltips=tips))
    if gaps is not None and len(gaps) and "significant" in gaps and len(sources) == 2:
        sig = gaps[gaps["significant"].astype(bool) & gaps["brand"].astype(str).isin(brands_order)]
        if len(sig):
            marks = ColumnDataSource(dict(
                y=[(str(b), "consumer") for b in sig["brand"]], x=[1.04] * len(sig),
                brand=sig["brand"].astype(str).tolist(),
                gap=[f"{100 * g:+.1f} points ({100 * lo:+.1f} to {100 * hi:+.1f})"
                     for g, lo, hi in zip(sig["yes_rate_gap"], sig["yes_rate_gap_low"], sig["yes_rate_gap_high"])],
            ))
            star = p.scatter("x", "y", source=marks, marker="diamond", size=13, fill_color="#b8432b",
                             line_color="#ffffff")
            p.add_tools(HoverTool(renderers=[star], tooltips=[("significant yes-rate gap", "@brand"),
                                                              ("consumer − owned", "@gap")]))
    _style(p)
    p.xaxis.formatter = _percent_formatter()
    p.ygrid.visible = False
    p.yaxis.group_label_orientation = "horizontal"
    p.yaxis.major_label_text_font_size = "10px"
    p.yaxis.group_text_font_size = "11px"
    return p


def _percent_formatter():
    from bokeh.models import NumeralTickFormatter

    return NumeralTickFormatter(format="0 %")


# --------------------------------------------------------------------------
# Brand maps


def _ellipses(p, centres: pd.DataFrame, spread: pd.DataFrame | None, x: str, y: str, prefix: str, colour: str,
              label: str | None = None):
    """Draw each brand's 95 % bootstrap ellipse (``brand_map_bootstrap``) around its map position."""
    if spread is None or spread.empty or f"{prefix}ellipse_width" not in spread:
        return None
    from bokeh.models import ColumnDataSource

    m = centres[["brand", x, y]].merge(spread, on="brand").dropna(subset=[x, y, f"{prefix}ellipse_width"])
    if m.empty:
        return None
    src = ColumnDataSource(dict(x=m[x].astype(float), y=m[y].astype(float),
                                w=m[f"{prefix}ellipse_width"].astype(float), h=m[f"{prefix}ellipse_height"].astype(float),
                                a=m[f"{prefix}ellipse_angle"].astype(float)))
    kwargs = {"legend_label": label} if label else {}
    return p.ellipse("x", "y", width="w", height="h", angle="a", source=src, fill_color=colour, fill_alpha=0.10,
                     line_color=colour, line_alpha=0.55, line_dash="dashed", **kwargs)


def biplot(brand_map: pd.DataFrame, loadings: pd.DataFrame | None, source_name: str, name: str,
           spread: pd.DataFrame | None = None):
    """PCA biplot (Gabriel, 1971): brands as points, attributes as arrows from the origin.

    Loadings are correlations (at most 1 in length); they are scaled by one
    common factor so the arrows span the brands, which keeps their directions
    and relative lengths (the usual way to draw a biplot). With ``spread``
    (the ``brand_map_bootstrap`` table) each brand gets its 95 % bootstrap
    ellipse (photos or posters resampled, replicate maps aligned onto this one).
    """
    from bokeh.models import Arrow, ColumnDataSource, HoverTool, LabelSet, VeeHead
    from bokeh.plotting import figure

    pts = brand_map[brand_map["source"] == source_name]
    if pts.empty:
        return None
    ev1 = float(pts["explained_1"].iloc[0]) if "explained_1" in pts else float("nan")
    ev2 = float(pts["explained_2"].iloc[0]) if "explained_2" in pts else float("nan")
    p = figure(
        name=name,
        height=380,
        sizing_mode="stretch_width",
        match_aspect=True,
        tools="pan,wheel_zoom,reset",
        x_axis_label=f"component 1 ({100 * ev1:.0f} % of variance)" if np.isfinite(ev1) else "component 1",
        y_axis_label=f"component 2 ({100 * ev2:.0f} % of variance)" if np.isfinite(ev2) else "component 2",
        title=f"{source_name} profile",
    )
    brand_src = ColumnDataSource(dict(x=pts["pc1"].astype(float), y=pts["pc2"].astype(float),
                                      brand=pts["brand"].astype(str), category=pts["category"].astype(str)))
    extent = float(np.nanmax(np.abs(pts[["pc1", "pc2"]].to_numpy(float)))) or 1.0
    if loadings is not None and len(loadings):
        ld = loadings[loadings["source"] == source_name]
        if "used" in ld:
            ld = ld[ld["used"].astype(bool)]
        if len(ld):
            vec = ld[["loading_1", "loading_2"]].to_numpy(float)
            scale = 0.9 * extent / max(float(np.nanmax(np.hypot(vec[:, 0], vec[:, 1]))), 1e-9)
            arrows = ColumnDataSource(dict(x0=np.zeros(len(ld)), y0=np.zeros(len(ld)), x1=vec[:, 0] * scale,
                                           y1=vec[:, 1] * scale, attribute=ld["attribute"].astype(str)))
            p.add_layout(Arrow(end=VeeHead(size=8, fill_color=MUTED, line_color=MUTED), source=arrows,
                               x_start="x0", y_start="y0", x_end="x1", y_end="y1", line_color=MUTED,
                               line_width=1.3))
            # Arrows are annotations and do not widen the ranges; an invisible glyph at their tips does.
            p.scatter(vec[:, 0] * scale * 1.35, vec[:, 1] * scale * 1.35, size=1, alpha=0)  # room for the labels
            p.add_layout(LabelSet(x="x1", y="y1", text="attribute", source=arrows, text_color=MUTED,
                                  text_font_size="11px", text_font_style="italic", x_offset=4, y_offset=2))
    if spread is not None and len(spread) and "source" in spread:
        _ellipses(p, pts.rename(columns={"pc1": "_x", "pc2": "_y"}), spread[spread["source"] == source_name],
                  "_x", "_y", "", SOURCE_COLOURS.get(source_name, INK))
    r = p.scatter("x", "y", source=brand_src, size=11, fill_color=SOURCE_COLOURS.get(source_name, INK),
                  line_color="#ffffff")
    p.add_layout(LabelSet(x="x", y="y", text="brand", source=brand_src, text_color=INK, text_font_size="12px",
                          x_offset=7, y_offset=-6))
    p.add_tools(HoverTool(renderers=[r], tooltips=[("brand", "@brand"), ("category", "@category")]))
    _style(p)
    p.x_range.range_padding = 0.45  # room for the labels
    p.y_range.range_padding = 0.15
    return p


def displacement_plot(displacement: pd.DataFrame, name: str, spread: pd.DataFrame | None = None):
    """Consumer -> owned arrows per brand on the aligned brand map, with 95 % bootstrap ellipses."""
    from bokeh.models import Arrow, ColumnDataSource, HoverTool, LabelSet, NormalHead
    from bokeh.plotting import figure

    need = ["consumer_x", "consumer_y", "owned_x", "owned_y"]
    d = displacement.dropna(subset=need)
    if d.empty:
        return None
    src = ColumnDataSource(dict(
        cx=d["consumer_x"].astype(float), cy=d["consumer_y"].astype(float), ox=d["owned_x"].astype(float),
        oy=d["owned_y"].astype(float), brand=d["brand"].astype(str),
        dist=[f"{v:.2f}" for v in d.get("displacement", pd.Series(np.nan, index=d.index)).astype(float)],
        dist_range=[("–" if not (np.isfinite(lo) and np.isfinite(hi)) else f"{lo:.2f} to {hi:.2f}")
                    for lo, hi in zip(d.get("displacement_low", pd.Series(np.nan, index=d.index)).astype(float),
                                      d.get("displacement_high", pd.Series(np.nan, index=d.index)).astype(float))],
        most=[("–" if not np.isfinite(v) else f"{100 * v:.0f} %")
              for v in d.get("moves_most_share", pd.Series(np.nan, index=d.index)).astype(float)],
    ))
    p = figure(name=name, height=380, sizing_mode="stretch_width", match_aspect=True, tools="pan,wheel_zoom,reset",
               title="consumer → owned position (aligned onto the consumer map)")
    if spread is not None and len(spread) and "source" in spread:
        _ellipses(p, d, spread[spread["source"] == "consumer"], "consumer_x", "consumer_y", "aligned_", CONSUMER,
                  "95 % bootstrap ellipse")
        _ellipses(p, d, spread[spread["source"] == "owned"], "owned_x", "owned_y", "aligned_", OWNED,
                  "95 % bootstrap ellipse")
    p.add_layout(Arrow(end=NormalHead(size=9, fill_color=OWNED, line_color=OWNED), source=src, x_start="cx",
                       y_start="cy", x_end="ox", y_end="oy", line_color=MUTED, line_width=1.5))
    c = p.scatter("cx", "cy", source=src, size=11, fill_color=CONSUMER, line_color="#ffffff", legend_label="consumer photos")
    o = p.scatter("ox", "oy", source=src, size=8, marker="square", fill_color=OWNED, line_color="#ffffff",
                  legend_label="owned photos")
    p.add_layout(LabelSet(x="cx", y="cy", text="brand", source=src, text_color=INK, text_font_size="12px",
                          x_offset=7, y_offset=-6))
    p.add_tools(HoverTool(renderers=[c, o], tooltips=[("brand", "@brand"), ("displacement", "@dist"),
                                                       ("95 % bootstrap range", "@dist_range"),
                                                       ("moves most in", "@most of replicates")]))
    _style(p)
    p.x_range.range_padding = 0.4
    p.y_range.range_padding = 0.15
    _legend_below(p)
    return p


def _legend_below(p) -> None:
    """Legend under the plot, in one row, so it never hides a brand."""
    legend = p.legend[0]
    legend.orientation = "horizontal"
    legend.label_text_font_size = "11px"
    legend.border_line_color = None
    legend.background_fill_alpha = 0
    p.add_layout(legend, "below")


def vector_map_plot(vector_map: pd.DataFrame, name: str):
    """Brands placed by their mean image vectors (MDS): consumer and owned points joined per brand."""
    from bokeh.models import ColumnDataSource, HoverTool, LabelSet
    from bokeh.plotting import figure

    vm = vector_map.copy()
    vm["brand"] = vm["brand"].astype(str)
    p = figure(name=name, height=380, sizing_mode="stretch_width", match_aspect=True, tools="pan,wheel_zoom,reset",
               title="brands by what their photos look like (mean image vectors)")
    segs = []
    for brand, g in vm.groupby("brand"):
        s = g.set_index("source")
        if {"consumer", "owned"} <= set(s.index):
            segs.append((s.loc["consumer", "x"], s.loc["consumer", "y"], s.loc["owned", "x"], s.loc["owned", "y"]))
    if segs:
        a = np.array(segs, dtype=float)
        p.segment(a[:, 0], a[:, 1], a[:, 2], a[:, 3], line_color=LINE, line_width=2)
    renderers = []
    for source, marker in (("consumer", "circle"), ("owned", "square"), ("all", "diamond")):
        g = vm[vm["source"] == source]
        if g.empty:
            continue
        src = ColumnDataSource(dict(x=g["x"].astype(float), y=g["y"].astype(float), brand=g["brand"],
                                    n=g.get("n_images", pd.Series(0, index=g.index)),
                                    source=[source] * len(g)))
        renderers.append(p.scatter("x", "y", source=src, marker=marker, size=13 if source == "all" else 10,
                                   fill_color=SOURCE_COLOURS[source], line_color="#ffffff",
                                   legend_label=f"{source} photos"))
        if source == "all":
            p.add_layout(LabelSet(x="x", y="y", text="brand", source=src, text_color=INK, text_font_size="12px",
                                  x_offset=7, y_offset=-6))
    if not renderers:
        return None
    p.add_tools(HoverTool(renderers=renderers, tooltips=[("brand", "@brand"), ("source", "@source"), ("photos", "@n")]))
    _style(p)
    p.x_range.range_padding = 0.4
    p.y_range.range_padding = 0.15
    _legend_below(p)
    return p

"""The report in a real browser: Debian's headless Chromium driven by playwright.

Checks: opens from file:// with no console error and no request other than the
file itself (and data:/blob: URIs); the context map holds one glyph per plotted
image (bokeh's data source length, read through ``Bokeh.documents``); hovering
a point shows its thumbnail; the colour selector recolours; a box selection
fills the gallery with the enclosed photos; filters hide points; a CSV download
equals the table on disk; hostile names run nothing and show as text.
Screenshots go to outputs/test-artifacts/.

Skipped, with the reason, when /usr/bin/chromium is absent (``apt-get install
chromium``; .ci/run installs it).
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import report_synthetic as synth
from explore.report import write_report

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).resolve().parent.parent / "outputs" / "test-artifacts"

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium is not installed (/usr/bin/chromium); apt-get install -y chromium"),
]


@pytest.fixture(scope="module")
def browser():
    sync_api = pytest.importorskip("playwright.sync_api", reason="playwright is not installed")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(
            executable_path=str(CHROMIUM),
            args=["--no-sandbox", "--disable-background-networking", "--disable-component-update"],
        )
        yield b
        b.close()


class Opened:
    """A page with everything it logged, requested and tried to pop up."""

    def __init__(self, browser, path: Path, width: int = 1400, height: int = 950):
        self.context = browser.new_context(viewport={"width": width, "height": height}, accept_downloads=True)
        self.page = self.context.new_page()
        self.errors: list[str] = []
        self.requests: list[str] = []
        self.dialogs: list[str] = []
        self.page.on("console", lambda m: self.errors.append(m.text) if m.type == "error" else None)
        self.page.on("pageerror", lambda e: self.errors.append(f"page error: {e}"))
        self.page.on("request", lambda r: self.requests.append(r.url))
        self.page.on("dialog", self._dialog)
        self.page.goto(path.resolve().as_uri())
        self.page.wait_for_function(
            "window.Bokeh && Bokeh.documents.length > 0 && Bokeh.documents[0].is_idle", timeout=60_000
        )

    def _dialog(self, dialog):
        self.dialogs.append(dialog.message)
        dialog.dismiss()

    def outside_requests(self) -> list[str]:
        return [u for u in self.requests if not u.startswith(("file://", "data:", "blob:"))]

    def close(self):
        self.context.close()


def map_js(page, body: str):
    """Run ``body`` with ``doc``, ``src`` (the map's data source), ``fig`` and ``view`` bound."""
    return page.evaluate(
        "() => { const doc = Bokeh.documents[0]; const src = doc.get_model_by_name('map_source');"
        " const fig = doc.get_model_by_name('context_map'); const view = Bokeh.index.get_one(fig);"
        f" {body} }}"
    )


#: The map's colour column as one text per point: the report writes it as an n x 4 RGBA byte
#: array, the page's recolouring as CSS colour strings.
COLOURS_JS = """const c = src.data.color;
    if (typeof c[0] === 'string') return Array.from(c);
    const out = []; for (let k = 0; k < c.length / 4; k++) out.push('rgb' + [c[4 * k], c[4 * k + 1], c[4 * k + 2]].join(','));
    return out;"""


def shoot(page, selector: str, name: str) -> None:
    """Screenshot of one section as laid out on the full page (the sticky bar stays at the top)."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    page.evaluate("window.scrollTo(0, 0)")
    box = page.evaluate(
        f"() => {{ const r = document.querySelector('{selector}').getBoundingClientRect();"
        " return {x: r.left + window.scrollX, y: r.top + window.scrollY, width: r.width, height: r.height}; }"
    )
    page.screenshot(path=str(ARTIFACTS / name), full_page=True, clip=box)


def screen_xy(page, x: float, y: float) -> tuple[float, float]:
    """Page coordinates of the data point (x, y) on the context map."""
    page.locator("#map-frame").scroll_into_view_if_needed()
    return tuple(map_js(page, f"""
        const r = view.canvas_view.el.getBoundingClientRect();
        return [r.left + view.frame.x_scale.compute({x}), r.top + view.frame.y_scale.compute({y})];"""))


@pytest.fixture(scope="module")
def synthetic_report(tmp_path_factory):
    out = synth.make_output_folder(tmp_path_factory.mktemp("browser"), 400, seed=1)
    return out, write_report(out)


@pytest.fixture(scope="module")
def hostile_report(tmp_path_factory):
    out = synth.make_output_folder(tmp_path_factory.mktemp("hostile_browser"), 48, hostile=True)
    return out, write_report(out)


@pytest.fixture
def opened(browser, synthetic_report):
    page = Opened(browser, synthetic_report[1])
    yield page
    page.close()


def test_opens_offline_clean_with_one_glyph_per_image(opened, synthetic_report):
    out, _ = synthetic_report
    assert opened.errors == []
    assert opened.outside_requests() == []
    ic = pd.read_parquet(out / "image_contexts.parquet")
    n = map_js(opened.page, "return src.get_length();")
    assert n == len(ic) == 400
    # The glyph draws from that source through WebGL.
    assert map_js(opened.page, "return fig.output_backend;") == "webgl"
    shoot(opened.page, "#overview", "synthetic-overview.png")
    shoot(opened.page, "#context-map", "synthetic-map.png")


def test_hovering_a_point_shows_its_thumbnail(opened, synthetic_report):
    out, _ = synthetic_report
    ic = pd.read_parquet(out / "image_contexts.parquet")
    images = pd.read_parquet(out / "images.parquet").set_index("image_id")
    # The point farthest from the others' centre is least likely to be covered by a neighbour.
    xy = ic[["map_x", "map_y"]].to_numpy()
    k = int(np.argmax(np.linalg.norm(xy - xy.mean(axis=0), axis=1)))
    sx, sy = screen_xy(opened.page, *xy[k])
    opened.page.mouse.move(sx - 30, sy - 30)
    opened.page.mouse.move(sx, sy, steps=5)
    card = opened.page.locator("#hover-card")
    card.wait_for(state="visible", timeout=5000)
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    opened.page.screenshot(path=str(ARTIFACTS / "synthetic-map-hover.png"))
    src = card.locator("img").get_attribute("src")
    assert src.startswith("data:image/webp;base64,")
    text = card.inner_text()
    assert images.loc[ic["image_id"].iloc[k], "brand"] in text
    assert "context:" in text
    opened.page.mouse.move(5, 5)
    card.wait_for(state="hidden", timeout=5000)


def test_colour_selector_recolours_the_points(opened, synthetic_report):
    out, _ = synthetic_report
    before = map_js(opened.page, COLOURS_JS)
    contexts = pd.read_parquet(out / "contexts.parquet")
    assert len(set(before)) == int((contexts["context_id"] >= 0).sum()) + 1  # one colour per context, plus unassigned
    opened.page.select_option("#colour-select", "brand")
    after = map_js(opened.page, COLOURS_JS)
    assert after != before
    ic = pd.read_parquet(out / "image_contexts.parquet")
    brands = pd.read_parquet(out / "images.parquet").set_index("image_id").loc[ic["image_id"], "brand"].to_numpy()
    # Same brand <=> same colour.
    pairs = set(zip(brands, after))
    assert len(pairs) == len(set(brands)) == len(set(after))
    opened.page.select_option("#colour-select", "attr:0")
    ramp = map_js(opened.page, COLOURS_JS)
    assert len(set(ramp)) > 20  # a continuous scale gives many shades
    assert "probability" in opened.page.locator("#map-legend").inner_text()


def test_box_selection_fills_the_gallery(opened, synthetic_report):
    out, _ = synthetic_report
    ic = pd.read_parquet(out / "image_contexts.parquet")
    images = pd.read_parquet(out / "images.parquet").set_index("image_id")
    # A box over the left half of the plot frame (in page pixels), and the same box in data units.
    opened.page.locator("#map-frame").scroll_into_view_if_needed()
    ax, ay, bx, by, x0, x1, y0, y1 = map_js(opened.page, """
        const r = view.canvas_view.el.getBoundingClientRect(); const f = view.frame.bbox;
        const left = f.left + 3, right = f.left + f.width / 2, top = f.top + 3, bottom = f.bottom - 3;
        return [r.left + left, r.top + top, r.left + right, r.top + bottom,
                view.frame.x_scale.invert(left), view.frame.x_scale.invert(right),
                view.frame.y_scale.invert(bottom), view.frame.y_scale.invert(top)];""")
    inside = ic[(ic["map_x"] >= x0) & (ic["map_x"] <= x1) & (ic["map_y"] >= y0) & (ic["map_y"] <= y1)]
    assert 0 < len(inside) < len(ic)
    opened.page.mouse.move(ax, ay)
    opened.page.mouse.down()
    opened.page.mouse.move(bx, by, steps=8)
    opened.page.mouse.up()
    opened.page.wait_for_function("document.querySelectorAll('#gallery figure').length > 0", timeout=5000)
    selected = map_js(opened.page, "return src.selected.indices.length;")
    # Points within a pixel of the box edge may go either way.
    assert abs(selected - len(inside)) <= 3
    figures = opened.page.locator("#gallery figure").count()
    assert figures == min(selected, 240)
    counts = opened.page.locator("#gallery-counts .brand-count").all_inner_texts()
    assert sum(int(t.rsplit(":", 1)[1]) for t in counts) == selected
    expected = images.loc[inside["image_id"], "brand"].value_counts()
    for t in counts:
        brand, n = t.rsplit(":", 1)
        assert abs(int(n) - expected.get(brand.strip(), 0)) <= 3
    shoot(opened.page, "#context-map", "synthetic-map-selection.png")


def test_filters_hide_a_brand(opened, synthetic_report):
    out, _ = synthetic_report
    images = pd.read_parquet(out / "images.parquet")
    first = opened.page.locator("#filter-brand input").first
    brand = opened.page.locator("#filter-brand label").first.inner_text().strip()
    first.uncheck()
    shown = map_js(opened.page, "return doc.get_model_by_name('map_filter').booleans.filter(Boolean).length;")
    usable = images[images["status"] == "ok"]
    assert shown == int((usable["brand"] != brand).sum())
    assert f"{shown:,} of 400" in opened.page.locator("#filter-count").inner_text()


def test_click_through_from_a_signature_context_shows_its_photos(opened, synthetic_report):
    out, _ = synthetic_report
    sig = pd.read_parquet(out / "signature_contexts.parquet").sort_values(["brand", "index"], ascending=[True, False])
    row = sig.iloc[0]
    opened.page.locator("#contexts tr.photo-row").first.click()
    dialog = opened.page.locator("#photo-dialog")
    dialog.wait_for(state="visible")
    suffix = "" if row["source"] == "all" else f" · {row['source']} photos"
    assert opened.page.locator("#photo-dialog-title").inner_text() == f"{row['brand']} · {row['context']}{suffix}"
    assert dialog.locator("figure").count() == int(row["count"])
    opened.page.keyboard.press("Escape")
    dialog.wait_for(state="hidden")
    # A consumer-only row shows that brand's consumer photos in the context, and only those.
    unexpected = pd.read_parquet(out / "unexpected_contexts.parquet").sort_values(["brand", "index"], ascending=[True, False])
    k = int(np.flatnonzero((unexpected["source"] == "consumer").to_numpy())[0])
    row = unexpected.iloc[k]
    opened.page.locator("#contexts .context-list").nth(1).locator("tr.photo-row").nth(k).click()
    dialog.wait_for(state="visible")
    assert opened.page.locator("#photo-dialog-title").inner_text() == f"{row['brand']} · {row['context']} · consumer photos"
    assert dialog.locator("figure").count() == int(row["count"])


def test_brand_view_follows_the_picker(opened, synthetic_report):
    out, _ = synthetic_report
    opened.page.select_option("#brand-select", index=2)
    brand = opened.page.locator("#brand-select option").nth(2).inner_text()
    assert opened.page.locator(".bv-brand").first.inner_text() == brand
    bc = pd.read_parquet(out / "brand_contexts.parquet")
    rows = bc[(bc["brand"] == brand) & (bc["source"] == "all") & (bc["context_id"] >= 0)]
    assert opened.page.locator("#bv-contexts .bv-row:not(.bv-unassigned)").count() == len(rows)
    # photos in no context: a row of their own, with advice above 30 %
    un = bc[(bc["brand"] == brand) & (bc["source"] == "all") & (bc["context_id"] < 0)]
    has_un = len(un) > 0 and int(un["count"].iloc[0]) > 0
    assert opened.page.locator("#bv-contexts .bv-unassigned").count() == int(has_un)
    assert opened.page.locator("#bv-contexts .bv-advice").count() == int(has_un and float(un["share"].iloc[0]) > 0.3)
    top = rows.sort_values("share", ascending=False).iloc[0]
    assert opened.page.locator("#bv-contexts .bv-index").first.inner_text() == f"{top['index']:.0f}"
    shoot(opened.page, "#brand-view", "synthetic-brand-view.png")


def test_csv_download_equals_the_table_on_disk(opened, synthetic_report):
    out, _ = synthetic_report
    with opened.page.expect_download() as info:
        opened.page.locator('#attributes button.csv[data-table="attribute_shares"]').click()
    download = info.value
    assert download.suggested_filename == "attribute_shares.csv"
    got = pd.read_csv(io.BytesIO(Path(download.path()).read_bytes()), encoding="utf-8-sig", keep_default_na=False)
    want = pd.read_parquet(out / "attribute_shares.parquet")
    assert list(got.columns) == list(want.columns)
    for col in ("n", "positives", "yes_rate", "yes_rate_low", "yes_rate_high"):
        np.testing.assert_allclose(got[col].to_numpy(float), want[col].to_numpy(float), rtol=1e-12)
    assert got["brand"].tolist() == want["brand"].fillna("").tolist()
    assert opened.outside_requests() == []


def test_hostile_names_run_nothing_and_show_as_text(browser, hostile_report):
    out, path = hostile_report
    page = Opened(browser, path)
    try:
        p = page.page
        # Hover every kind of text, open the hostile brand and a context's photos.
        p.select_option("#brand-select", label=synth.HOSTILE_BRAND)
        p.hover("#bv-attributes .bv-attr-name >> nth=0")
        p.locator("#contexts .show-photos").first.click()
        p.locator("#photo-dialog").wait_for(state="visible")
        p.keyboard.press("Escape")
        ic = pd.read_parquet(out / "image_contexts.parquet")
        ids = pd.read_parquet(out / "images.parquet").set_index("image_id")
        k = int(np.flatnonzero(ic["image_id"].map(ids["relpath"]).str.endswith(synth.HOSTILE_FILE))[0])
        sx, sy = screen_xy(p, ic["map_x"].iloc[k], ic["map_y"].iloc[k])
        p.mouse.move(sx, sy, steps=3)
        p.wait_for_timeout(300)
        p.mouse.move(5, 5)
        p.wait_for_timeout(200)
        assert page.dialogs == []
        assert page.errors == []
        assert page.outside_requests() == []
        body = p.locator("body").inner_text()
        for raw in (synth.HOSTILE_BRAND, synth.HOSTILE_ATTRIBUTE, synth.HOSTILE_CONTEXT, synth.HOSTILE_PROMPT.strip()):
            assert raw in body, raw
        # None of the injected markup became an element.
        injected = p.evaluate("""() => ({
            img_x: document.querySelectorAll('img[src="x"]').length,
            iframes: document.querySelectorAll('iframe').length,
            bold: document.querySelectorAll('b[onmouseover]').length,
            svg_onload: document.querySelectorAll('svg[onload]').length,
            scripts: Array.from(document.scripts).filter(s => s.textContent.includes('alert(1)') && !s.type).length,
        })""")
        assert injected == {"img_x": 0, "iframes": 0, "bold": 0, "svg_onload": 0, "scripts": 0}
        shoot(p, "#brand-view", "hostile-brand-view.png")
    finally:
        page.close()


@pytest.mark.slow
def test_demo_report_in_the_browser(browser, request):
    """The demo run (session fixture ``demo_run`` in conftest.py): printed path, size, clean load,
    one glyph per image, hover, colours, selection, screenshots."""
    out = Path(request.getfixturevalue("demo_run"))
    # `explore demo` ends by printing the report's path (the fixture keeps its stdout).
    stdout = (out / "demo_stdout.txt").read_text(encoding="utf-8")
    assert f"report: {out.resolve() / 'report.html'}" in stdout.splitlines(), stdout[-2000:]
    # ... followed by the closing summary: the report's findings, the same sentences as findings.csv.
    findings = pd.read_csv(out / "findings.csv")
    tail = stdout.split(f"report: {out.resolve() / 'report.html'}", 1)[1]
    assert "findings (only results that pass the study's tests" in tail
    for sentence in findings["sentence"]:
        assert sentence in tail, sentence
    path = out / "report.html"
    assert path.is_file(), f"the demo run wrote no report at {path}"
    size = path.stat().st_size
    assert size < 15 * 1024 * 1024, f"demo report is {size / 1e6:.1f} MB"
    page = Opened(browser, path)
    try:
        assert page.errors == []
        assert page.outside_requests() == []
        ic = pd.read_parquet(out / "image_contexts.parquet")
        assert map_js(page.page, "return src.get_length();") == len(ic)
        p = page.page
        # Hover the outermost point: its thumbnail shows.
        xy = ic[["map_x", "map_y"]].to_numpy()
        k = int(np.argmax(np.linalg.norm(xy - xy.mean(axis=0), axis=1)))
        sx, sy = screen_xy(p, *xy[k])
        p.mouse.move(sx - 30, sy - 30)
        p.mouse.move(sx, sy, steps=5)
        p.locator("#hover-card").wait_for(state="visible", timeout=5000)
        assert p.locator("#hover-card img").get_attribute("src").startswith("data:image/webp;base64,")
        p.mouse.move(5, 5)
        # The colour selector recolours.
        before = map_js(p, COLOURS_JS)
        p.select_option("#colour-select", "source")
        assert map_js(p, COLOURS_JS) != before
        # A box over the left half of the frame fills the gallery with what it encloses.
        ax, ay, bx, by = map_js(p, """
            const r = view.canvas_view.el.getBoundingClientRect(); const f = view.frame.bbox;
            return [r.left + f.left + 3, r.top + f.top + 3, r.left + f.left + f.width / 2, r.top + f.bottom - 3];""")
        p.mouse.move(ax, ay)
        p.mouse.down()
        p.mouse.move(bx, by, steps=8)
        p.mouse.up()
        p.wait_for_function("document.querySelectorAll('#gallery figure').length > 0", timeout=5000)
        selected = map_js(p, "return src.selected.indices.length;")
        assert p.locator("#gallery figure").count() == min(selected, 240)
        for section in ("overview", "brand-view", "context-map", "contexts", "brand-by-context", "attributes", "comparisons"):
            shoot(page.page, f"#{section}", f"demo-{section}.png")
    finally:
        page.close()


def test_lasso_selection_fills_the_gallery(opened, synthetic_report):
    out, _ = synthetic_report
    ic = pd.read_parquet(out / "image_contexts.parquet")
    p = opened.page
    p.locator("#map-frame").scroll_into_view_if_needed()
    # Make the lasso the active drag tool (as its toolbar button does), then draw a triangle
    # over the left half of the frame.
    corners = map_js(p, """
        const lasso = fig.toolbar.tools.find(t => t.type === "LassoSelectTool");
        lasso.active = true;
        const r = view.canvas_view.el.getBoundingClientRect(); const f = view.frame.bbox;
        const px = [[f.left + 3, f.top + 3], [f.left + f.width / 2, f.top + 3], [f.left + 3, f.bottom - 3]];
        return px.map(([x, y]) => [r.left + x, r.top + y, view.frame.x_scale.invert(x), view.frame.y_scale.invert(y)]);""")
    p.mouse.move(corners[0][0], corners[0][1])
    p.mouse.down()
    for sx, sy, _, _ in corners[1:] + corners[:1]:
        p.mouse.move(sx, sy, steps=12)
    p.mouse.up()
    p.wait_for_function("document.querySelectorAll('#gallery figure').length > 0", timeout=5000)
    selected = map_js(p, "return src.selected.indices.length;")
    # Points inside the triangle (x0, y0) - (x1, y0) - (x0, y1) in data units: same-side test.
    (_, _, x0, y0), (_, _, x1, _), (_, _, _, y1) = corners
    u = (ic["map_x"] - x0) / (x1 - x0)
    v = (ic["map_y"] - y0) / (y1 - y0)
    inside = int(((u >= 0) & (v >= 0) & (u + v <= 1)).sum())
    assert inside > 0
    assert abs(selected - inside) <= 3
    assert p.locator("#gallery figure").count() == min(selected, 240)


def test_report_without_stage_tables_opens_clean(browser, tmp_path):
    out = synth.make_output_folder(tmp_path, 12, with_compare=False, with_contexts=False, with_attributes=False)
    page = Opened(browser, write_report(out))
    try:
        assert page.errors == []
        assert page.outside_requests() == []
        text = page.page.locator("#context-map").inner_text()
        assert "needs the contexts stage" in text
        assert page.page.locator("#brand-select option").count() == 4
    finally:
        page.close()


# --------------------------------------------------------------------------
# Manager-ready report (issue 17): findings, print, chart export, photo viewer


def _first_number(text: str) -> float:
    import re

    m = re.search(r"[−+-]?\d+(?:\.\d+)?", text.replace("\u2212", "-"))
    assert m, text
    return float(m.group(0).replace("−", "-"))


@pytest.mark.slow
def test_demo_findings_match_the_csv_and_print_to_pdf(browser, request, tmp_path):
    """Findings block: one entry per findings.csv row with the same number (and that number
    recomputed from the counts in signature_contexts / source_context_gaps); page.pdf on A4
    portrait and Letter landscape: every chart printed as one picture inside one page."""
    import pdfplumber

    out = Path(request.getfixturevalue("demo_run"))
    findings = pd.read_csv(out / "findings.csv")
    assert len(findings) > 0
    page = Opened(browser, out / "report.html")
    try:
        p = page.page
        p.wait_for_function("document.body.getAttribute('data-print-ready') === '1'", timeout=60_000)
        shown = p.evaluate("""() => Array.from(document.querySelectorAll('#findings .finding')).map(li => ({
            brand: li.closest('.finding-brand').dataset.brand, rank: +li.dataset.rank,
            value: li.dataset.value === undefined ? null : +li.dataset.value,
            text: li.querySelector('.finding-text').textContent}))""")
        assert len(shown) == len(findings)
        sig = pd.read_csv(out / "signature_contexts.csv")
        gaps = pd.read_csv(out / "source_context_gaps.csv")
        for item in shown:
            row = findings[(findings["brand"] == item["brand"]) & (findings["rank"] == item["rank"])].iloc[0]
            assert item["text"] == row["sentence"]
            assert item["value"] == pytest.approx(row["value"])
            digits = 1 if row["n"] >= 1000 else 0
            if row["kind"] in ("signature context", "unexpected context"):
                # The sentence opens with the share; recomputed here from the signature table's counts.
                src = sig[(sig["brand"] == row["brand"]) & (sig["context_id"] == row["context_id"]) & (sig["source"] == row["source"])].iloc[0]
                assert _first_number(item["text"]) == round(100 * src["count"] / src["brand_n"], digits)
            elif row["kind"] == "consumer vs owned context":
                src = gaps[(gaps["brand"] == row["brand"]) & (gaps["context_id"] == row["context_id"])].iloc[0]
                gap = src["consumer_count"] / src["consumer_n"] - src["owned_count"] / src["owned_n"]
                assert f"difference {100 * gap:+.{digits}f} points".replace("-", "\u2212") in item["text"]
        # "see the photos" opens that brand's photos of that context.
        p.locator("#findings .finding-photos").first.click()
        p.locator("#photo-dialog").wait_for(state="visible", timeout=5000)
        assert findings.sort_values(["brand", "rank"]).iloc[0]["brand"] in p.locator("#photo-dialog-title").inner_text()
        p.locator("#photo-dialog-close").click()

        n_charts = p.locator(".chart[data-chart]").count()
        assert n_charts >= 5
        pages = {}
        for fmt, landscape in (("A4", False), ("Letter", True)):
            pdf_path = tmp_path / f"demo-{fmt}-{'landscape' if landscape else 'portrait'}.pdf"
            p.pdf(path=str(pdf_path), format=fmt, landscape=landscape, print_background=True)
            with pdfplumber.open(pdf_path) as pdf:
                pages[(fmt, landscape)] = len(pdf.pages)
                charts = []
                for number, pg in enumerate(pdf.pages):
                    for im in pg.images:
                        # Charts print as PNGs of at least 300 px; thumbnails are at most thumbnail_px (112).
                        if im["srcsize"][0] > 300:
                            charts.append((number, im))
                # Each chart exactly once: a chart split over two pages would be drawn on both.
                assert len(charts) == n_charts, (fmt, landscape, len(charts), n_charts)
                for number, im in charts:
                    pg = pdf.pages[number]
                    assert im["x0"] >= -0.5 and im["x1"] <= pg.width + 0.5, (fmt, number, im["x0"], im["x1"], pg.width)
                    assert im["top"] >= -0.5 and im["bottom"] <= pg.height + 0.5, (fmt, number, im["top"], im["bottom"])
        # Stated in the README: the demo prints on 15-25 pages (one section or more per page).
        assert all(10 <= n <= 30 for n in pages.values()), pages
        print(f"demo PDF pages: {pages}")
        assert page.errors == []
        assert page.outside_requests() == []
    finally:
        page.close()


def test_chart_png_export_and_photo_viewer(opened, synthetic_report):
    """Save PNG on the heatmap downloads a PNG (checked by Pillow); clicking a context exemplar
    opens the viewer with its larger copy and its brand, source and context."""
    from PIL import Image

    out, _ = synthetic_report
    p = opened.page
    with p.expect_download() as info:
        p.locator('button.save-png[data-chart="context_heatmap"]').click()
    data = Path(info.value.path()).read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    im = Image.open(io.BytesIO(data))
    assert im.width > 300 and im.height > 150
    # Not a blank canvas: the heatmap's cells give many colours.
    assert len(im.convert("RGB").getcolors(maxcolors=1 << 20)) > 20
    with p.expect_download() as info:
        p.locator('button.save-svg[data-chart="context_heatmap"]').click()
    assert Path(info.value.path()).read_text(encoding="utf-8").lstrip().startswith("<svg")
    # Photo viewer.
    images = pd.read_parquet(out / "images.parquet").set_index("image_id")
    thumb = p.locator("#contexts .thumbs img.zoomable").first
    image_id = thumb.get_attribute("data-id")
    thumb.click()
    box = p.locator("#lightbox")
    box.wait_for(state="visible", timeout=5000)
    facts = p.locator("#lightbox-facts").inner_text()
    assert images.loc[image_id, "brand"] in facts and images.loc[image_id, "source"] in facts
    assert "context" in facts
    src = p.locator("#lightbox-img").get_attribute("src")
    large = p.evaluate(f"JSON.parse(document.getElementById('explore-large').textContent)['{image_id}']")
    assert large and src == "data:image/webp;base64," + large  # exemplars show their larger copy
    p.keyboard.press("Escape")
    box.wait_for(state="hidden", timeout=5000)
    assert opened.errors == []
    assert opened.outside_requests() == []

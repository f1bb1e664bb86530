"""The report writer, without a browser: one file, escaping, thumbnails, missing sections.

Browser checks (console, network, map, hover, selection) are in test_report_browser.py.
Fixtures are synthetic output folders written by tests/report_synthetic.py.
"""

from __future__ import annotations

import base64
import html.parser
import io
import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import report_synthetic as synth
from explore.report import ReportError, write_report
from explore.report.page import script_json
from explore.report.thumbnails import choose_thumbnail_ids


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    out = synth.make_output_folder(tmp_path_factory.mktemp("rep"), 90)
    path = write_report(out)
    return out, path, path.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def hostile(tmp_path_factory):
    out = synth.make_output_folder(tmp_path_factory.mktemp("hostile"), 40, hostile=True)
    path = write_report(out)
    return out, path, path.read_text(encoding="utf-8")


def _embedded(text: str, element_id: str):
    m = re.search(rf'<script type="application/json" id="{element_id}">(.*?)</script>', text, re.S)
    assert m, f"no {element_id} block"
    return json.loads(m.group(1))


class _Collector(html.parser.HTMLParser):
    """Every tag and attribute of the page, as a standard HTML parser sees them (Python's html.parser)."""

    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def test_report_is_written_next_to_the_tables(built):
    out, path, text = built
    assert path == out / "report.html"
    assert text.startswith("<!DOCTYPE html>")
    for section in ("overview", "brand-view", "context-map", "contexts", "brand-by-context", "attributes", "comparisons"):
        assert f'id="{section}"' in text


def test_report_is_one_file(built):
    _, _, text = built
    # Nothing loaded from elsewhere: no external script, stylesheet, frame or image.
    assert not re.search(r"<script[^>]*\ssrc\s*=", text, re.I)
    assert not re.search(r"<link[^>]*\shref\s*=", text, re.I)
    parser = _Collector()
    parser.feed(text)
    for tag, attrs in parser.tags:
        for key in ("src", "href", "data", "action", "poster"):
            value = (attrs.get(key) or "").strip()
            if value:
                assert value.startswith(("#", "data:")), f"<{tag} {key}={value!r}> points outside the file"
    # url(...) in the page's own markup and styles may only point at data: URIs or fragments.
    outside_scripts = re.sub(r"<script\b[^>]*>.*?</script>", "", text, flags=re.S | re.I)
    for m in re.finditer(r"url\(\s*['\"]?([^'\")\s]*)", outside_scripts):
        assert m.group(1).startswith(("data:", "#")), f"url({m.group(1)}) points outside the file"
    # Inside scripts (bokeh's inlined library holds url() templates it only uses for icons we do not
    # load), nothing names an absolute or protocol-relative address; the browser test checks that no
    # request leaves the file at all.
    for m in re.finditer(r"url\(\s*['\"]?([^'\")\s]*)", text):
        assert not re.match(r"(https?:)?//", m.group(1)), f"url({m.group(1)}) points outside the file"
    # bokeh's own JavaScript is inlined, not fetched from a CDN.
    assert "cdn.bokeh.org" not in text.split("<script", 1)[0]
    assert "Bokeh" in text and len(text) > 1_000_000


def test_every_usable_image_gets_a_small_thumbnail(built):
    from PIL import Image

    out, _, text = built
    thumbs = _embedded(text, "explore-thumbs")
    images = pd.read_parquet(out / "images.parquet")
    usable = images[images["status"] == "ok"]
    assert set(thumbs) == set(usable["image_id"])
    # run.json of the fixture asks for 96 px thumbnails.
    for b64 in list(thumbs.values())[:10]:
        im = Image.open(io.BytesIO(base64.b64decode(b64)))
        assert im.format == "WEBP" and max(im.size) <= 96


def test_points_match_the_image_contexts_table(built):
    out, _, text = built
    data = _embedded(text, "explore-data")
    ic = pd.read_parquet(out / "image_contexts.parquet")
    assert data["points"]["id"] == ic["image_id"].tolist()
    assert data["points"]["c"] == ic["context_id"].tolist()
    ia = pd.read_parquet(out / "image_attributes.parquet")
    first = data["attributes"][0]
    probs = ia[ia["attribute"] == first].set_index("image_id")["probability"]
    assert data["points"]["p"][0] == pytest.approx(probs.loc[ic["image_id"]].round(3).tolist(), abs=1e-9)


def test_embedded_tables_equal_the_parquet_tables(built):
    out, _, text = built
    data = _embedded(text, "explore-data")
    for name in ("attribute_shares", "brand_contexts", "agreement", "skipped"):
        table = pd.read_parquet(out / f"{name}.parquet")
        embedded = pd.DataFrame(data["tables"][name]["rows"], columns=data["tables"][name]["columns"])
        assert list(embedded.columns) == list(table.columns)
        pd.testing.assert_frame_equal(embedded, table, check_dtype=False)


def test_overview_states_encoder_quality_and_cautions(built):
    _, _, text = built
    assert "lower fidelity than a CLIP model" in text
    assert synth.ENCODER_ID in text
    assert "personal data" in text
    assert "gender or age" in text and "hand labels" in text
    assert "2026-01-02 03:04:05 UTC" in text  # run date from run.json


def test_offline_fallback_report_says_what_bundled_sees_and_how_to_get_clip(tmp_path):
    # The run of an `auto` study that fell back to bundled: the report carries the notice
    # `load_encoder` printed, says what the offline encoder can and cannot see, and how to
    # get the clip model (explore fetch-model, README "Offline machines").
    from explore.encoders import fallback_notice

    out = synth.make_output_folder(tmp_path / "fallback", 20)
    notice = fallback_notice("ViT-B-32-256", "datacomp_s34b_b86k", "HF_HUB_OFFLINE is set", "the Hugging Face cache")
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    run["encoder_notice"] = notice
    (out / "run.json").write_text(json.dumps(run), encoding="utf-8")
    card = re.search(r'<div class="card card-encoder card-lower">(.*?)</div>', write_report(out).read_text(), re.S)
    assert card, "no lower-fidelity encoder card"
    card = html.unescape(card.group(1))
    assert "It can see objects, animals, food, drinks" in card
    assert "it cannot see mood, style, light, colour schemes, facial expressions, logos or text" in card
    assert "explore fetch-model" in card and "Offline machines" in card
    assert notice in card and "auto chose bundled" in card


def test_script_json_cannot_close_its_script_block():
    value = {"a": "</script><script>alert(1)</script>", "b": "x & y > z", "c": "line\u2028sep", "n": [1, 2.5, None]}
    text = script_json(value)
    assert "<" not in text and ">" not in text and "&" not in text and "\u2028" not in text
    # The escapes are plain JSON (RFC 8259 \uXXXX), so a standard parser reads the value back unchanged.
    assert json.loads(text) == value


def test_findings_csv_guards_formula_cells(hostile):
    # findings.csv is written by the report, not by the run: it must carry the same
    # formula guard as every table (OWASP "CSV Injection": a leading apostrophe).
    out, _, _ = hostile
    findings = pd.read_csv(Path(out) / "findings.csv", dtype=str, keep_default_na=False)
    assert "'" + synth.FORMULA_BRAND in set(findings["brand"])
    assert synth.FORMULA_BRAND in set(pd.read_parquet(Path(out) / "findings.parquet")["brand"])  # exact
    assert not findings["brand"].str.match(r"[=+@\t\r]").any()


def test_hostile_names_never_appear_as_markup(hostile):
    _, _, text = hostile
    for raw in (synth.HOSTILE_FILE, synth.HOSTILE_BRAND, synth.HOSTILE_ATTRIBUTE, synth.HOSTILE_PROMPT,
                synth.HOSTILE_CONTEXT, synth.HOSTILE_FOLDER, "<i>online</i>", "notes <b>x</b>"):
        assert raw not in text, f"unescaped: {raw}"
    # An HTML parser finds none of the injected elements or handlers.
    parser = _Collector()
    parser.feed(text)
    for tag, attrs in parser.tags:
        assert tag not in ("iframe", "svg", "u", "i") or not attrs, tag
        assert not any(k.startswith("on") for k in attrs), (tag, attrs)
        assert attrs.get("src") != "x"
    # ... but the names are there as text (escaped), and the data reads back exactly.
    assert "&lt;/script&gt;&lt;script&gt;alert(1)&lt;/script&gt;" in text
    data = _embedded(text, "explore-data")
    assert synth.HOSTILE_BRAND in data["brands"]
    assert any(f.endswith(synth.HOSTILE_FILE) for f in data["points"]["file"])


def test_thumbnail_cap_keeps_every_exemplar_and_is_seeded():
    ids = [f"img{i:04d}" for i in range(1000)]
    exemplars = ids[::97]
    a = choose_thumbnail_ids(ids, exemplars, cap=100, seed=3)
    b = choose_thumbnail_ids(ids, exemplars, cap=100, seed=3)
    c = choose_thumbnail_ids(ids, exemplars, cap=100, seed=4)
    assert a.sampled and a.ids == b.ids and a.ids != c.ids
    assert len(a.ids) == 100 and set(exemplars) <= set(a.ids)
    assert a.ids == [i for i in ids if i in set(a.ids)]  # table order kept
    assert "sample" in a.describe() and "1,000" in a.describe()
    under = choose_thumbnail_ids(ids, exemplars, cap=5000, seed=3)
    assert not under.sampled and under.ids == ids


def test_thumbnail_sample_is_stratified_so_small_groups_are_represented():
    # 1,000 images: one big stratum of 990 and ten of one image each; cap 50.
    ids = [f"img{i:04d}" for i in range(1000)]
    strata = ["big"] * 990 + [f"tiny{k}" for k in range(10)]
    choice = choose_thumbnail_ids(ids, [], cap=50, seed=1, strata=strata)
    picked = set(choice.ids)
    assert all(f"img{990 + k:04d}" in picked for k in range(10))  # every small stratum is represented
    # One each first, then the remaining 40 to the big stratum: the cap holds exactly.
    assert len(picked) == 50 and sum(1 for i in ids[:990] if i in picked) == 40
    # Proportional beyond the minimum: strata of 600 and 300 share 90 - 2 as 59 + 29 (+1 each).
    two = choose_thumbnail_ids(ids[:900], [], cap=90, seed=2, strata=["a"] * 600 + ["b"] * 300)
    assert sum(1 for i in two.ids if i < "img0600") == 60 and len(two.ids) == 90
    # Without strata a plain random sample of 50 would miss most of the ten (expected 0.5 of them).
    plain = set(choose_thumbnail_ids(ids, [], cap=50, seed=1).ids)
    assert sum(1 for i in ids[990:] if i in plain) < 10


def test_report_over_the_cap_says_it_sampled(tmp_path):
    out = synth.make_output_folder(tmp_path, 60)
    run = json.loads((out / "run.json").read_text())
    run["settings"]["report"]["max_thumbnails"] = 20
    (out / "run.json").write_text(json.dumps(run))
    text = write_report(out).read_text(encoding="utf-8")
    thumbs = _embedded(text, "explore-thumbs")
    exemplars = {i for e in pd.read_parquet(out / "contexts.parquet")["exemplars"] for i in e.split()}
    assert exemplars <= set(thumbs)
    assert len(thumbs) == max(20, len(exemplars))
    assert "random sample (seed 0)" in text
    data = _embedded(text, "explore-data")
    assert len(data["points"]["id"]) == 60  # every image is still on the map
    assert sum(data["points"]["t"]) == len(thumbs)


def test_sections_without_their_tables_say_so(tmp_path):
    out = synth.make_output_folder(tmp_path, 30, with_compare=False, with_contexts=False, with_attributes=False)
    text = write_report(out).read_text(encoding="utf-8")
    assert "table &#39;image_contexts&#39; was not written by this run" in text
    assert "table &#39;attribute_shares&#39; was not written by this run" in text
    assert "table &#39;brand_map&#39; was not written by this run" in text
    assert "table &#39;agreement&#39; was not written by this run" in text
    assert "Photos per brand and source" in text


def test_unreadable_table_is_reported_not_fatal(tmp_path):
    out = synth.make_output_folder(tmp_path, 30)
    (out / "agreement.parquet").write_bytes(b"not parquet")
    text = write_report(out).read_text(encoding="utf-8")
    assert "agreement.parquet: could not be read" in text


def test_not_an_output_folder(tmp_path):
    with pytest.raises(ReportError, match="not found"):
        write_report(tmp_path / "nowhere")
    with pytest.raises(ReportError, match="neither run.json nor images.parquet"):
        write_report(tmp_path)


def test_thumbnail_cache_makes_rebuilds_reuse_thumbnails(tmp_path):
    out = synth.make_output_folder(tmp_path, 20)
    first = _embedded(write_report(out).read_text(encoding="utf-8"), "explore-thumbs")
    from explore.report.page import blurred_suffix

    # Faces blurred by default; the file names the detector (a new one never reuses old blurring).
    cache = out / "cache" / f"thumbnails_96{blurred_suffix(True)}_webp.parquet"
    assert "_faces_" in cache.name
    assert cache.is_file() and len(pd.read_parquet(cache)) == 20
    # Remove the photos: a rebuild still has every thumbnail, from the cache.
    for p in pd.read_parquet(out / "images.parquet")["path"]:
        Path(p).unlink(missing_ok=True)
    second = _embedded(write_report(out).read_text(encoding="utf-8"), "explore-thumbs")
    assert second == first


def test_cli_report_command_on_an_output_folder(tmp_path):
    out = synth.make_output_folder(tmp_path, 20)
    done = subprocess.run([sys.executable, "-m", "explore.cli", "report", str(out)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    lines = done.stdout.strip().splitlines()
    assert lines[0] == f"report: {out / 'report.html'}"
    assert lines[1].startswith("findings (only results that pass the study's tests")
    bad = subprocess.run([sys.executable, "-m", "explore.cli", "report", str(tmp_path / "none.toml")],
                         capture_output=True, text=True)
    assert bad.returncode == 2 and "study file not found" in bad.stderr


def test_thumbnail_follows_exif_orientation_and_keeps_aspect(tmp_path):
    from PIL import Image

    from explore.report.thumbnails import make_thumbnail

    # A landscape 200 x 100 JPEG whose EXIF orientation tag (274) is 6: viewers show it rotated
    # by 90 degrees, i.e. portrait (EXIF 2.3, "Orientation"). The thumbnail must be portrait too.
    im = Image.new("RGB", (200, 100), (200, 30, 30))
    exif = Image.Exif()
    exif[274] = 6
    path = tmp_path / "turned.jpg"
    im.save(path, "JPEG", exif=exif)
    thumb = Image.open(io.BytesIO(make_thumbnail(path, 64)))
    assert thumb.size == (32, 64)
    assert make_thumbnail(tmp_path / "missing.jpg", 64) is None
    (tmp_path / "broken.jpg").write_bytes(b"\xff\xd8 not really a jpeg")
    assert make_thumbnail(tmp_path / "broken.jpg", 64) is None


def test_heatmap_marks_significant_cells_and_greys_untested_ones():
    from explore.report import figures

    bc = pd.DataFrame({
        "brand": ["A", "A", "B"], "context_id": [1, 2, 1], "context": ["beach", "gym", "beach"],
        "count": [30, 1, 5], "brand_n": [90, 90, 90], "share": [0.33, 0.01, 0.05],
        "category_share": [0.2, 0.01, 0.2], "index": [165.0, 100.0, 25.0],
        "q_value": [0.001, np.nan, 0.2],  # significant, untested (too few photos), tested and not significant
    })
    fig = figures.context_heatmap(bc, ["A", "B"], [(1, "beach"), (2, "gym")], fdr=0.05)
    from bokeh.models import ColumnDataSource

    data = next(s for s in fig.select({"type": ColumnDataSource}) if "judged" in s.data).data
    assert list(data["index_text"]) == ["165*", "–", "25"]
    assert list(data["judged"]) == ["significant after correction", "too few photos to test", "tested, not significant"]
    assert list(data["outline_alpha"]) == [1.0, 0.0, 0.0]
    assert data["color"][1] == "#e6e3dd" and data["color"][0] != data["color"][1]


def test_pdf_option_says_what_to_do_without_chromium(tmp_path):
    out = synth.make_output_folder(tmp_path, 20)
    env = {**__import__("os").environ, "EXPLORE_CHROMIUM": str(tmp_path / "no-such-chromium")}
    done = subprocess.run([sys.executable, "-m", "explore.cli", "report", str(out), "--pdf"],
                          capture_output=True, text=True, env=env)
    assert done.returncode == 2
    assert "headless Chromium was not found" in done.stderr and "apt-get install -y chromium" in done.stderr
    assert (out / "report.html").is_file() and not (out / "report.pdf").exists()


@pytest.mark.skipif(not Path("/usr/bin/chromium").exists(), reason="Debian's chromium is not installed (/usr/bin/chromium)")
def test_pdf_option_prints_every_chart_as_one_picture(tmp_path):
    pdfplumber = pytest.importorskip("pdfplumber")
    out = synth.make_output_folder(tmp_path, 40)
    done = subprocess.run([sys.executable, "-m", "explore.cli", "report", str(out), "--pdf", "--paper", "Letter-landscape"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == f"pdf: {out / 'report.pdf'}"
    n_charts = (out / "report.html").read_text(encoding="utf-8").count('<div class="chart" data-chart=')
    with pdfplumber.open(out / "report.pdf") as pdf:
        first = pdf.pages[0]
        assert round(first.width) == 792 and round(first.height) == 612  # Letter landscape, in points
        charts = [im for pg in pdf.pages for im in pg.images if im["srcsize"][0] > 300]
    assert len(charts) == n_charts > 0
    assert not list(out.glob(".*.print.html"))  # the staged copy is removed

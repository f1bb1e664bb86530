"""Faces blurred in the report, seen in a real browser (Debian's Chromium via playwright).

An outside photo with a face (scikit-image's sample ``astronaut``) replaces
one image of a synthetic output folder. Hovering its point shows its
thumbnail; the browser draws that thumbnail on a canvas and the pixel variance
in the middle of the detected face box is compared between a report with blurring (the
default) and one with ``blur_faces=False``. The privacy card says which.
Skipped when /usr/bin/chromium is absent.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

import report_synthetic as synth
from explore.report import write_report

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).resolve().parent.parent / "outputs" / "test-artifacts"

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium is not installed (/usr/bin/chromium)"),
]

VARIANCE_JS = """([x, y, w, h]) => new Promise((done, fail) => {
  const src = document.querySelector('#hover-card img').getAttribute('src');
  const img = new Image();
  img.onload = () => {
    const c = document.createElement('canvas'); c.width = img.naturalWidth; c.height = img.naturalHeight;
    const g = c.getContext('2d'); g.drawImage(img, 0, 0);
    const s = c.width / %d;
    const d = g.getImageData(Math.round(x * s), Math.round(y * s), Math.round(w * s), Math.round(h * s)).data;
    let n = 0, sum = 0, sq = 0;
    for (let i = 0; i < d.length; i += 4) { const v = (d[i] + d[i + 1] + d[i + 2]) / 3; n++; sum += v; sq += v * v; }
    done(sq / n - (sum / n) ** 2);
  };
  img.onerror = () => fail('thumbnail did not decode');
  img.src = src;
})"""


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    skdata = pytest.importorskip("skimage.data")
    pytest.importorskip("cv2")
    from explore.report import faces

    out = synth.make_output_folder(tmp_path_factory.mktemp("faces"), 24, seed=3, thumbnail_px=128)
    ic = pd.read_parquet(out / "image_contexts.parquet")
    images = pd.read_parquet(out / "images.parquet").set_index("image_id")
    xy = ic[["map_x", "map_y"]].to_numpy()
    k = int(np.argmax(np.linalg.norm(xy - xy.mean(axis=0), axis=1)))  # least covered point
    image_id = ic["image_id"].iloc[k]
    photo = Image.fromarray(skdata.astronaut())
    photo.save(images.loc[image_id, "path"], "JPEG", quality=92)
    (found,) = faces._distinct(faces.detect_faces(photo))
    # The middle of the detected box (eyes, nose, mouth): its corners hold hair and
    # background, which the elliptical blur leaves partly as they were.
    inset = found.w // 5
    box = faces.Box(found.x + inset, found.y + inset, found.w - 2 * inset, found.h - 2 * inset)
    return out, xy[k], box, photo.size[0]


def hover_variance(browser, report: Path, point, box, width: int) -> tuple[float, str]:
    context = browser.new_context(viewport={"width": 1400, "height": 950})
    page = context.new_page()
    try:
        page.goto(report.resolve().as_uri())
        page.wait_for_function("window.Bokeh && Bokeh.documents.length > 0 && Bokeh.documents[0].is_idle", timeout=60_000)
        page.locator("#map-frame").scroll_into_view_if_needed()
        sx, sy = page.evaluate(
            """([x, y]) => { const doc = Bokeh.documents[0];
            const fig = doc.get_model_by_name('context_map'); const view = Bokeh.index.get_one(fig);
            const r = view.canvas_view.el.getBoundingClientRect();
            return [r.left + view.frame.x_scale.compute(x), r.top + view.frame.y_scale.compute(y)]; }""",
            [float(point[0]), float(point[1])],
        )
        page.mouse.move(sx - 30, sy - 30)
        page.mouse.move(sx, sy, steps=5)
        page.locator("#hover-card").wait_for(state="visible", timeout=5000)
        ARTIFACTS.mkdir(parents=True, exist_ok=True)
        page.locator("#hover-card").screenshot(path=str(ARTIFACTS / f"faces-{report.parent.name}-hover.png"))
        variance = page.evaluate(VARIANCE_JS % width, [box.x, box.y, box.w, box.h])
        return float(variance), page.locator("#faces-note").inner_text()
    finally:
        context.close()


def test_thumbnail_face_blurred_by_default_and_not_when_off(folder, tmp_path):
    sync_api = pytest.importorskip("playwright.sync_api")
    out, point, box, width = folder
    blurred_report = write_report(out)
    blurred_copy = tmp_path / "blurred"
    blurred_copy.mkdir()
    blurred_html = blurred_copy / "report.html"
    blurred_html.write_bytes(blurred_report.read_bytes())
    plain_report = write_report(out, blur_faces=False)
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=["--no-sandbox"])
        try:
            blurred, blurred_note = hover_variance(browser, blurred_html, point, box, width)
            plain, plain_note = hover_variance(browser, plain_report, point, box, width)
        finally:
            browser.close()
    assert plain > 200  # a face with eyes, mouth and hair edges is far from flat
    assert blurred < 0.3 * plain
    assert "blurred where detected: 1 face(s)" in blurred_note
    assert "NOT blurred" in plain_note

"""Report file size and build time for 1,000, 5,000 and 20,000 images (synthetic).

Writes a synthetic output folder per size (generated 256 x 192 photos with
shapes and grain, 112 px thumbnails (the default), fictional brands, tables with the documented columns; see
tests/report_synthetic.py), then times ``write_report`` twice: a cold build
(every thumbnail decoded and encoded) and a warm rebuild (thumbnails from the
cache in the output folder). Prints one line per size.

With ``--browser`` (needs /usr/bin/chromium) each report is also opened in
headless Chromium: seconds until bokeh is idle, and milliseconds for a colour
change and for selecting every point (gallery filled), measured in the page.

    .venv/bin/python benchmarks/report_size.py [SIZES ...] [--keep DIR] [--browser]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

import report_synthetic  # noqa: E402

from explore.report import write_report  # noqa: E402
from explore.study import ReportSettings  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("sizes", nargs="*", type=int, default=[1000, 5000, 20000])
    parser.add_argument("--keep", type=Path, help="keep the folders (and reports) under this folder")
    parser.add_argument("--browser", action="store_true", help="also time opening and using each report in Chromium")
    args = parser.parse_args()
    base = args.keep or Path(tempfile.mkdtemp(prefix="report_size_"))
    print(f"{'images':>8} {'file MB':>8} {'thumbs':>7} {'cold build s':>13} {'warm build s':>13} {'make data s':>12}")
    try:
        for n in args.sizes:
            folder = base / f"n{n}"
            shutil.rmtree(folder, ignore_errors=True)
            t0 = time.perf_counter()
            out = report_synthetic.make_output_folder(folder, n, image_px=256, textured=True, seed=n, thumbnail_px=112,
                                                         max_thumbnails=ReportSettings().max_thumbnails)
            made = time.perf_counter() - t0
            t0 = time.perf_counter()
            path = write_report(out)
            cold = time.perf_counter() - t0
            t0 = time.perf_counter()
            path = write_report(out)
            warm = time.perf_counter() - t0
            text = path.read_text(encoding="utf-8")
            thumbs = text.count('":"UklGR')  # base64 WebP (RIFF) images start with UklGR
            size = path.stat().st_size / 1e6
            print(f"{n:>8,} {size:>8.1f} {thumbs:>7,} {cold:>13.1f} {warm:>13.1f} {made:>12.1f}", flush=True)
            if args.browser:
                print("         browser: " + browser_times(path), flush=True)
    finally:
        if not args.keep:
            shutil.rmtree(base, ignore_errors=True)
    return 0


def browser_times(path: Path) -> str:
    """Open the report in headless Chromium and time load, recolouring and a full selection."""
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path="/usr/bin/chromium",
                              args=["--no-sandbox", "--disable-background-networking", "--disable-component-update"])
        page = b.new_page(viewport={"width": 1400, "height": 950})
        t0 = time.perf_counter()
        page.goto(path.resolve().as_uri())
        page.wait_for_function("window.Bokeh && Bokeh.documents.length > 0 && Bokeh.documents[0].is_idle",
                               timeout=300_000)
        load = time.perf_counter() - t0
        ms = page.evaluate("""async () => {
            const src = Bokeh.documents[0].get_model_by_name('map_source');
            const frame = () => new Promise(r => requestAnimationFrame(() => r()));
            let t = performance.now(); window.ExploreReport.setColour('brand'); await frame();
            const colour = performance.now() - t;
            const all = Array.from({length: src.get_length()}, (_, i) => i);
            t = performance.now(); src.selected.indices = all;  // the gallery fills from bokeh's change event
            while (!document.querySelector('#gallery figure')) await new Promise(r => setTimeout(r, 2));
            await frame();
            const select = performance.now() - t;
            return [colour, select, document.querySelectorAll('#gallery figure').length];
        }""")
        b.close()
    return f"load {load:.1f} s, recolour {ms[0]:.0f} ms, select all {ms[1]:.0f} ms ({ms[2]} thumbnails drawn)"


if __name__ == "__main__":
    sys.exit(main())

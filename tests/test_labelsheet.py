"""The labelling sheet: the sampler, and the page end to end in Debian's Chromium.

Browser part: `explore label` on a copy of the demo run's output, then in the
page: answer with the keyboard and by clicking (the planted truth answering),
reload (answers kept in local storage), export (a real download), and run
`explore check` on the exported file.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from explore.attributes.sampling import allocate, random_sample

REPO = Path(__file__).resolve().parent.parent
CHROMIUM = Path("/usr/bin/chromium")


def _images(sizes: dict) -> pd.DataFrame:
    rows = []
    for (brand, source), n in sizes.items():
        rows += [dict(image_id=f"{brand}-{source}-{k}", brand=brand, category="c", source=source, status="ok")
                 for k in range(n)]
    return pd.DataFrame(rows)


def test_allocation_is_proportional_with_a_floor():
    # Largest-remainder proportional allocation (common survey practice), at least 2 per stratum.
    assert allocate([45] * 12, 100) == [9, 9, 9, 9, 8, 8, 8, 8, 8, 8, 8, 8]
    assert allocate([100, 10, 3], 20) == [16, 2, 2]  # quotas 17.7, 1.8, 0.5; the small one raised to 2
    assert allocate([1, 50], 10) == [1, 9]
    assert sum(allocate([7, 9, 400, 33], 50)) == 50


def test_random_sample_is_seeded_stratified_and_records_its_design():
    images = _images({("A", "consumer"): 40, ("A", "owned"): 20, ("B", "consumer"): 30, ("B", "owned"): 10})
    one = random_sample(images, 20, seed=3)
    assert len(one) == 20 and one["image_id"].is_unique
    assert one.equals(random_sample(images, 20, seed=3))
    assert set(one["image_id"]) != set(random_sample(images, 20, seed=4)["image_id"])
    per = one.groupby("stratum").agg(n=("image_id", "size"), size=("stratum_size", "first"), drawn=("drawn", "first"))
    assert per.loc["A | consumer"].tolist() == [8, 40, 8] and per.loc["B | owned"].tolist() == [2, 10, 2]
    assert (one["sample"] == "random").all() and (one["seed"] == 3).all()
    # every image of a stratum is equally likely: over many draws each is picked about n/N of the time
    # (100 draws: each A-consumer image is expected 100 x 8/40 = 20 times; sd about 4)
    counts = pd.concat([random_sample(images, 20, seed=s) for s in range(100)])["image_id"].value_counts()
    a = counts[counts.index.str.startswith("A-consumer")]
    assert len(a) == 40 and a.sum() == 800 and 5 < a.min() and a.max() < 40


def _demo_copy(demo_run: Path, tmp: Path) -> Path:
    """A study like the demo whose output folder is a copy of the demo run's (tables and cache)."""
    out = tmp / "out"
    out.mkdir()
    for name in ("images", "attribute_definitions", "image_attributes"):
        shutil.copy(demo_run / f"{name}.parquet", out / f"{name}.parquet")
    shutil.copytree(demo_run / "cache", out / "cache", ignore=shutil.ignore_patterns("lock", "thumbnails_*"))
    text = (REPO / "demo_images" / "study.toml").read_text(encoding="utf-8")
    text = text.replace('output = "../outputs/demo"', f'output = "{out}"')
    text = text.replace('manifest = "manifest.csv"', f'manifest = "{REPO / "demo_images" / "manifest.csv"}"')
    text = text.replace('file = "survey.csv"', f'file = "{REPO / "demo_images" / "survey.csv"}"')
    study = tmp / "study.toml"
    study.write_text(text, encoding="utf-8")
    return study


@pytest.mark.browser
@pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium is not installed (/usr/bin/chromium)")
def test_sheet_label_reload_export_check(demo_run, tmp_path, capsys):
    sync_api = pytest.importorskip("playwright.sync_api", reason="playwright is not installed")
    from explore.cli import main

    study = _demo_copy(Path(demo_run), tmp_path)
    sheet = tmp_path / "sheet.html"
    assert main(["--quiet", "label", str(study), "--size", "24", "--seed", "11", "--boundary", "1",
                 "--graded", "--out", str(sheet)]) == 0
    said = capsys.readouterr().out
    assert "24 images drawn at random within 12 brand x source strata (seed 11)" in said

    images = pd.read_parquet(tmp_path / "out" / "images.parquet")
    truth = pd.read_csv(REPO / "demo_images" / "truth_images.csv")
    truth = images[["image_id", "relpath"]].merge(truth, left_on="relpath", right_on="path").set_index("image_id")

    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=["--no-sandbox"])
        context = browser.new_context(accept_downloads=True, viewport={"width": 1200, "height": 900})
        page = context.new_page()
        errors, requests = [], []
        page.on("pageerror", lambda e: errors.append(str(e)))
        page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
        page.on("request", lambda r: requests.append(r.url))
        page.goto(sheet.resolve().as_uri())
        data = page.evaluate("() => JSON.parse(document.getElementById('sheet-data').textContent)")
        ids = [it["id"] for it in data["items"]]
        names = [a["name"] for a in data["attributes"]]
        assert len(ids) == 24 + sum(it["sample"] == "boundary" for it in data["items"]) and len(names) == 6
        total = len(ids) * len(names)
        assert page.locator("#progress").inner_text() == f"0 of {total} answered"
        # The first half by keyboard (the planted truth answers; one "can't tell"), in page order.
        half = len(ids) // 2
        for i in range(half):
            for name in names:
                key = "u" if (i, name) == (0, names[0]) else ("y" if truth.at[ids[i], name] == 1 else "n")
                page.keyboard.press(key)
        assert page.locator("#progress").inner_text() == f"{half * 6} of {total} answered"
        # A grade by click, a photo enlarged by click and closed with Esc.
        page.locator("#item-1 .q[data-attr='0'] button[data-grade='6']").click()
        page.locator("#item-2 img").click()
        assert page.locator("#zoom.open").count() == 1
        page.keyboard.press("Escape")
        assert page.locator("#zoom.open").count() == 0
        # Reload: the answers are still there.
        page.reload()
        assert page.locator("#progress").inner_text() == f"{half * 6} of {total} answered"
        assert page.locator("#item-1 .q[data-attr='0'] button[data-grade='6'].on").count() == 1
        # The rest by clicking.
        for i in range(half, len(ids)):
            for a, name in enumerate(names):
                value = "yes" if truth.at[ids[i], name] == 1 else "no"
                page.locator(f"#item-{i} .q[data-attr='{a}'] button[data-value='{value}']").click()
        assert page.locator("#progress").inner_text() == f"{total} of {total} answered"
        with page.expect_download() as info:
            page.locator("#export").click()
        exported = tmp_path / info.value.suggested_filename
        info.value.save_as(exported)
        assert errors == []
        assert [u for u in requests if not u.startswith(("file://", "data:", "blob:"))] == []
        browser.close()

    got = pd.read_csv(exported, dtype=str, keep_default_na=False)
    assert list(got.columns) == ["image", "attribute", "label", "grade", "sample", "stratum", "stratum_size",
                                 "drawn", "seed", "sheet"]
    assert len(got) == total and (got["label"] == "unsure").sum() == 1
    assert set(got["sample"]) == {"random", "boundary"} and (got["seed"] == "11").all()
    random = got[got["sample"] == "random"]
    assert set(random["stratum_size"]) == {"45"} and set(random["drawn"]) == {"2"}
    answered = got[got["label"] != "unsure"]
    expect = [str(int(truth.at[i, a])) for i, a in zip(answered["image"], answered["attribute"])]
    assert answered["label"].tolist() == expect
    assert got.loc[(got["image"] == ids[1]) & (got["attribute"] == names[0]), "grade"].tolist() == ["6"]

    assert main(["--quiet", "check", str(study), "--labels", str(exported), "--encoder", "bundled"]) == 0
    printed = capsys.readouterr().out
    assert "1 answer 'can't tell' left out" in printed
    table = pd.read_csv(tmp_path / "out" / "attribute_check.csv")
    assert set(table["attribute"]) == set(names)
    assert table["sampled"].str.contains("random within brand x source (12 strata, seed 11", regex=False).all()
    assert table["sampled"].str.contains("near the decision boundary").all()
    # The check counts only the random labels (24 per attribute, one unsure left out of the first).
    assert sorted(table["n"].tolist()) == [23] + [24] * 5


@pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian chromium is not installed (apt-get install chromium)")
def test_export_guards_formulas_and_the_reader_takes_the_guard_off(tmp_path):
    # A brand or attribute named like a spreadsheet formula must not run when the
    # exported CSV is opened in a spreadsheet (OWASP "CSV Injection": a leading
    # apostrophe), and explore's label reader must still match the names.
    sync_api = pytest.importorskip("playwright.sync_api", reason="playwright is not installed")
    import json
    from importlib import resources

    from explore.attributes.labels import read_labels

    attribute, stratum = "=HYPERLINK(\"http://x\",\"y\")", "+Brand | consumer"
    data = {"sheet": "s1", "seed": 3, "graded": False,
            "items": [{"id": "img1", "name": "a.jpg", "brand": "+Brand", "source": "consumer", "sample": "random",
                       "stratum": stratum, "stratumSize": 5, "drawn": 1, "src": ""}],
            "attributes": [{"name": attribute, "positive": ["p"], "negative": ["n"]}]}
    template = resources.files("explore").joinpath("data/labelsheet.html").read_text(encoding="utf-8")
    page_path = tmp_path / "sheet.html"
    page_path.write_text(template.replace("/*SHEET_DATA*/null", json.dumps(data).replace("<", "\\u003c")),
                         encoding="utf-8")
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=["--no-sandbox"])
        page = browser.new_context(accept_downloads=True).new_page()
        page.goto(page_path.as_uri())
        page.keyboard.press("y")
        with page.expect_download() as info:
            page.locator("#export").click()
        exported = tmp_path / "labels.csv"
        info.value.save_as(exported)
        browser.close()
    raw = pd.read_csv(exported, dtype=str, keep_default_na=False)
    assert raw.loc[0, "attribute"] == "'" + attribute and raw.loc[0, "stratum"] == "'" + stratum
    images = pd.DataFrame([dict(image_id="img1", path=str(tmp_path / "a.jpg"), relpath="a.jpg", brand="+Brand",
                                source="consumer", status="ok")])
    labels, warnings = read_labels(raw, images, [attribute], where="labels.csv")
    assert warnings == []
    assert labels["attribute"].tolist() == [attribute] and labels["stratum"].tolist() == [stratum]
    assert labels["label"].tolist() == [1]

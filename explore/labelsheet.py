"""The labelling sheet (``explore label``): a sample of images to label, as one offline HTML page.

From a completed run's output folder it draws a seeded random sample within
brand x source (:func:`explore.attributes.sampling.random_sample`) and,
optionally, an extra sample near each attribute's decision boundary (marked
``boundary``: for thresholds and probes, never for shares). It writes one
self-contained page (photos embedded, no network): yes / no / can't tell per
image and attribute, optional graded answers 1-7, keyboard shortcuts, a
progress count, answers kept in the browser's local storage, and an export
button that saves the labels CSV ``explore check`` and ``explore run
--labels`` read, with the sample design in every row.
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
from importlib import resources
from pathlib import Path

import pandas as pd

from explore.study import StudyError

#: Longest side of the embedded photos (shown smaller; a click shows them at this size).
PHOTO_PX = 640
JPEG_QUALITY = 80


def _json_for_script(value) -> str:
    text = json.dumps(value, ensure_ascii=False, separators=(",", ":"))
    for a, b in (("<", "\\u003c"), (">", "\\u003e"), ("&", "\\u0026"), ("\u2028", "\\u2028"), ("\u2029", "\\u2029")):
        text = text.replace(a, b)
    return text


def _photo(path: str) -> str:
    from explore.collect import open_rgb

    try:
        image = open_rgb(path, draft_size=PHOTO_PX)
    except Exception:  # an unreadable photo gets an empty box, the row stays
        return ""
    image.thumbnail((PHOTO_PX, PHOTO_PX))
    buffer = io.BytesIO()
    image.save(buffer, format="JPEG", quality=JPEG_QUALITY)
    return "data:image/jpeg;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def draw_sheet_sample(
    folder: Path, size: int, seed: int, attributes: list[str] | None = None, boundary: int = 0
) -> tuple[pd.DataFrame, list[str], pd.DataFrame]:
    """The images of a sheet: (sample rows, attribute names, attribute_definitions rows)."""
    from explore.attributes.sampling import boundary_sample, random_sample

    folder = Path(folder)
    need = ["images", "attribute_definitions"] + (["image_attributes"] if boundary else [])
    for name in need:
        if not (folder / f"{name}.parquet").is_file():
            raise StudyError(f"{folder}: no {name}.parquet; run `explore run STUDY` first (the sheet samples its images)")
    images = pd.read_parquet(folder / "images.parquet")
    definitions = pd.read_parquet(folder / "attribute_definitions.parquet")
    known = list(definitions["attribute"].astype(str))
    names = attributes or known
    unknown = [a for a in names if a not in known]
    if unknown:
        raise StudyError(f"--attribute: unknown attribute(s) {', '.join(unknown)} (known: {', '.join(known)})")
    if size < 1:
        raise StudyError("--size must be at least 1")
    sample = random_sample(images, size, seed)
    if boundary:
        scored = pd.read_parquet(folder / "image_attributes.parquet")
        thresholds = dict(zip(definitions["attribute"].astype(str), definitions["threshold"].astype(float)))
        extra = boundary_sample(images, scored, {a: thresholds[a] for a in names}, boundary,
                                exclude=set(sample["image_id"]))
        extra = extra.drop_duplicates("image_id").drop(columns="attribute")
        extra["stratum_size"], extra["drawn"], extra["seed"] = float("nan"), float("nan"), seed
        sample = pd.concat([sample, extra], ignore_index=True)
    paths = images.set_index("image_id")
    sample["path"] = [str(paths.at[i, "path"]) for i in sample["image_id"]]
    sample["relpath"] = [str(paths.at[i, "relpath"]) if "relpath" in paths else "" for i in sample["image_id"]]
    return sample, names, definitions.set_index("attribute").loc[names].reset_index()


def write_sheet(
    folder: Path,
    out_path: Path,
    *,
    size: int,
    seed: int,
    attributes: list[str] | None = None,
    boundary: int = 0,
    graded: bool = False,
    progress: bool = True,
) -> tuple[Path, dict]:
    """Write the labelling page; returns (path, facts: sheet id, counts)."""
    sample, names, definitions = draw_sheet_sample(folder, size, seed, attributes, boundary)
    sheet_id = hashlib.sha1(
        (f"{seed}|{size}|{boundary}|" + " ".join(sample["image_id"]) + "|" + " ".join(names)).encode()
    ).hexdigest()[:10]
    items = []
    rows = sample.to_dict("records")
    try:
        from tqdm import tqdm

        rows_iter = tqdm(rows, desc="photos", disable=not progress)
    except ImportError:  # pragma: no cover
        rows_iter = rows
    for r in rows_iter:
        items.append({
            "id": str(r["image_id"]), "name": str(r["relpath"] or Path(r["path"]).name),
            "brand": str(r["brand"]), "source": str(r["source"]), "sample": str(r["sample"]),
            "stratum": str(r["stratum"]),
            "stratumSize": None if pd.isna(r["stratum_size"]) else int(r["stratum_size"]),
            "drawn": None if pd.isna(r["drawn"]) else int(r["drawn"]),
            "src": _photo(str(r["path"])),
        })
    data = {
        "sheet": sheet_id, "seed": int(seed), "graded": bool(graded), "items": items,
        "attributes": [{"name": str(d["attribute"]),
                        "positive": str(d.get("positive_descriptions", "")).split(" | "),
                        "negative": str(d.get("negative_descriptions", "")).split(" | ")}
                       for d in definitions.to_dict("records")],
    }
    template = resources.files("explore").joinpath("data/labelsheet.html").read_text(encoding="utf-8")
    page = template.replace("/*SHEET_DATA*/null", _json_for_script(data))
    out_path = Path(out_path)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    out_path.write_text(page, encoding="utf-8")
    facts = {"sheet": sheet_id, "images": len(items), "random": int((sample["sample"] == "random").sum()),
             "boundary": int((sample["sample"] == "boundary").sum()), "attributes": names,
             "strata": int(sample.loc[sample["sample"] == "random", "stratum"].nunique())}
    return out_path, facts

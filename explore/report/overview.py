"""Report overview: encoder quality, settings, faces sentence, counts, caveats, test sentences."""

from __future__ import annotations

import pandas as pd

from explore.report.data import OutputFolder
from explore.report.format import PER_IMAGE_TABLES, html_table
from explore.report.thumbnails import (
    ThumbnailChoice,
)


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

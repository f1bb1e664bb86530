"""Report section: photos left out or flagged (reposts, near-duplicates, commercial posts), with thumbnails.

Reposts are the brand's own photos found in its consumer set: the same file
(collect) or a near-copy (content hash and image vectors, ``explore.duplicates``).

Counts per brand x source of each kind, what was excluded and by which study
key (and its default), and a few example pictures of each kind.
"""

from __future__ import annotations

import pandas as pd

from explore.collect.flags import is_near_copy, repost_description
from explore.collect.hashing import NEAR_DUPLICATE_BITS
from explore.duplicates import MIN_COSINE

#: Kinds shown: (name, rows selected, study key, its default, what the default does).
KINDS = (
    ("repost", "the brand's own photos re-posted in its consumer set: the same file, or a near-copy "
     f"(recompressed, resized or cropped: content hash within {NEAR_DUPLICATE_BITS} bits of 64 and image vectors "
     f"agreeing, cosine >= {MIN_COSINE})", "images.reposts"),
    ("near_duplicate", "near-identical copies within a brand and source (vectors confirmed)", "images.near_duplicates"),
    ("commercial", "consumer photos that look like shop listings, product shots, screenshots or adverts",
     "images.commercial_posts"),
)
#: Example pictures per kind.
EXAMPLES = 6


def _flagged_kept(images: pd.DataFrame, kind: str) -> pd.Series:
    """Rows flagged as ``kind`` but still counted (the study said keep)."""
    ok = images["status"] == "ok"
    if kind == "repost" and "repost_of" in images:
        return ok & (images["repost_of"].fillna("").astype(str) != "")
    if kind == "near_duplicate" and "near_duplicate_of" in images:
        return ok & (images["near_duplicate_of"].fillna("").astype(str) != "")
    if kind == "commercial" and "commercial_flagged" in images:
        return ok & images["commercial_flagged"].fillna(False).astype(bool)
    return pd.Series(False, index=images.index)


def dropped_section(images: pd.DataFrame, settings: dict) -> dict:
    """Section data: per kind, counts per brand x source (excluded, flagged but kept) and example ids."""
    kinds = []
    if images is None or "status" not in images or not len(images):
        return {"kinds": [], "example_ids": []}
    image_settings = (settings or {}).get("images") or {}
    example_ids = []
    for kind, what, key in KINDS:
        excluded = images["status"] == kind
        kept = _flagged_kept(images, kind)
        if not excluded.any() and not kept.any():
            kinds.append({"kind": kind, "what": what, "key": key, "setting": image_settings.get(key.split(".")[1], "exclude"),
                          "rows": [], "examples": []})
            continue
        hit = images[excluded | kept].copy()
        hit["_excluded"] = excluded[excluded | kept]
        rows = []
        for (brand, source), g in hit.groupby(["brand", "source"], sort=True):
            rows.append({"brand": brand, "source": source, "excluded": int(g["_excluded"].sum()),
                         "kept": int((~g["_excluded"]).sum())})
        examples = []
        path_of = images.set_index("image_id")["relpath"].to_dict() if "relpath" in images else {}
        for r in hit.head(EXAMPLES).to_dict("records"):
            if r["_excluded"]:
                reason = str(r.get("reason") or "")
            elif kind == "repost":
                reason = repost_description(r, path_of) + ", counted"
            else:
                reason = str(r.get("commercial_reason") or "flagged, counted")
            examples.append({"image_id": str(r["image_id"]), "relpath": str(r.get("relpath", "")), "brand": str(r["brand"]),
                             "source": str(r["source"]), "reason": reason,
                             "excluded": bool(r["_excluded"])})
            example_ids.append(str(r["image_id"]))
        note = ""
        if kind == "repost":
            near = int(is_near_copy(hit).sum())
            note = (f"Of these {len(hit)}: {near} near-cop{'y' if near == 1 else 'ies'} (not the same file), "
                    f"{len(hit) - near} the same file as the owned photo.")
        kinds.append({"kind": kind, "what": what, "key": key,
                      "setting": image_settings.get(key.split(".")[1], "exclude"),
                      "rows": rows, "examples": examples, "note": note})
    return {"kinds": kinds, "example_ids": example_ids}

"""Collect: flagging duplicates, reposts, near-duplicate proposals and photos over the poster cap."""

from __future__ import annotations

import zlib

import numpy as np
import pandas as pd

from explore.collect.hashing import near_duplicate_partners

def _cap_posters(table: pd.DataFrame, cap: int, seed: int) -> None:
    """Keep at most ``cap`` usable photos per poster within each brand x source (seeded)."""
    if cap <= 0:
        return
    ok = (table["status"] == "ok") & (table["poster"] != "")
    for key, frame in table[ok].groupby(["brand", "source", "poster"], sort=True):
        if len(frame) <= cap:
            continue
        rng = np.random.default_rng([int(seed) & 0xFFFFFFFF, zlib.crc32(repr(key).encode("utf-8"))])
        keep = set(rng.choice(frame.index.to_numpy(), size=cap, replace=False).tolist())
        drop = [i for i in frame.index if i not in keep]
        table.loc[drop, "status"] = "over_poster_cap"
        table.loc[drop, "reason"] = (
            f"poster '{key[2]}' has {len(frame)} usable photos of {key[0]} ({key[1]}); "
            f"images.max_per_poster = {cap} keeps a seeded sample of {cap}"
        )


def _flag_duplicates(table: pd.DataFrame) -> None:
    """Later copies of one content within one brand x source become ``duplicate`` (vectorised)."""
    usable = table.loc[table["status"].to_numpy() == "ok", ["brand", "source", "sha256", "image_id", "relpath"]]
    keys = ["brand", "source", "sha256"]
    later = usable.duplicated(keys, keep="first").to_numpy()
    if not later.any():
        return
    first = usable[~later].set_index(keys)
    index = pd.MultiIndex.from_frame(usable.loc[later, keys])
    rows = usable.index[later]
    table.loc[rows, "status"] = "duplicate"
    table.loc[rows, "duplicate_of"] = first.loc[index, "image_id"].to_numpy()
    table.loc[rows, "reason"] = [f"same content as {p} (kept once)" for p in first.loc[index, "relpath"]]


def _flag_reposts(table: pd.DataFrame, exclude: bool) -> None:
    """Mark consumer rows whose content is one of the same brand's owned photos."""
    ok = table["status"] == "ok"
    owned = table[ok & (table["source"] == "owned")]
    first_owned = owned.drop_duplicates(["brand", "sha256"]).set_index(["brand", "sha256"])
    for i in np.flatnonzero((ok & (table["source"] == "consumer")).to_numpy()):
        key = (table.at[i, "brand"], table.at[i, "sha256"])
        if key not in first_owned.index:
            continue
        kept = first_owned.loc[key]
        table.at[i, "repost_of"] = kept["image_id"]
        if exclude:
            table.at[i, "status"] = "repost"
            table.at[i, "reason"] = (
                f"the brand's own photo {kept['relpath']} re-posted in its consumer set; left out "
                "of consumer shares (study key images.reposts = 'keep' counts it)"
            )


def repost_summary(table: pd.DataFrame, examples: int = 3) -> pd.DataFrame:
    """Per brand: how many consumer photos are reposts of its owned photos, with examples.

    Columns: ``brand``, ``category``, ``reposts``, ``consumer_files`` (consumer
    rows that are ``ok`` or ``repost``), ``repost_share`` (reposts /
    consumer_files), ``excluded`` (status ``repost``: left out of consumer
    shares), ``examples`` (up to ``examples`` consumer paths, `` | ``-separated,
    each with the owned path it repeats). Brands without reposts have no row.
    """
    columns = ["brand", "category", "reposts", "consumer_files", "repost_share", "excluded", "examples"]
    if "repost_of" not in table or not (table["repost_of"].fillna("") != "").any():
        return pd.DataFrame(columns=columns)
    path_of = table.set_index("image_id")["relpath"].to_dict()
    consumer = table[(table["source"] == "consumer") & table["status"].isin(["ok", "repost"])]
    rows = []
    for brand, group in consumer.groupby("brand", sort=True):
        hits = group[group["repost_of"].fillna("") != ""]
        if not len(hits):
            continue
        shown = [f"{r.relpath} (= {path_of.get(r.repost_of, r.repost_of)})" for r in hits.head(examples).itertuples()]
        rows.append(
            dict(
                brand=brand,
                category=str(group["category"].iloc[0]),
                reposts=len(hits),
                consumer_files=len(group),
                repost_share=len(hits) / len(group),
                excluded=bool((hits["status"] == "repost").all()),
                examples=" | ".join(shown),
            )
        )
    return pd.DataFrame(rows, columns=columns)


def _flag_near_duplicates(table: pd.DataFrame, hashes: dict[int, int], max_bits: int) -> None:
    """Point each used image at the first earlier used image of its brand x source within ``max_bits``.

    These are proposals: ``explore.duplicates`` confirms them with the image vectors after embed.
    """
    used = [i for i in np.flatnonzero(table["status"].to_numpy() == "ok") if i in hashes]
    if len(used) < 2 or max_bits < 0:
        return
    ids = table["image_id"].to_numpy()
    cells: dict[tuple, list[int]] = {}
    for i in used:
        cells.setdefault((table.at[i, "brand"], table.at[i, "source"]), []).append(i)
    for rows in cells.values():
        if len(rows) < 2:
            continue
        values = np.array([hashes[i] for i in rows], dtype=np.uint64)
        partner = near_duplicate_partners(values, max_bits)
        for k in np.flatnonzero(partner >= 0):
            table.at[rows[k], "near_duplicate_of"] = ids[rows[partner[k]]]

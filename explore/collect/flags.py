"""Collect: flagging duplicates, reposts, near-duplicate and near-copy repost proposals, photos over the poster cap."""

from __future__ import annotations

import zlib

import numpy as np
import pandas as pd

from explore.collect.hashing import near_duplicate_partners, nearest_partners


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


def is_near_copy(table: pd.DataFrame) -> pd.Series:
    """Rows that are reposts by a confirmed near-copy, not the same file (``repost_of`` = ``near_repost_of``)."""
    if "repost_of" not in table or "near_repost_of" not in table:
        return pd.Series(False, index=table.index)
    repost_of = table["repost_of"].fillna("").astype(str)
    return (repost_of != "") & (repost_of == table["near_repost_of"].fillna("").astype(str))


def repost_description(row, path_of: dict) -> str:
    """How one consumer row repeats the brand's own photo: the same file, or a near-copy with its evidence."""
    owned = path_of.get(row["repost_of"], row["repost_of"])
    if str(row.get("near_repost_of", "") or "") == row["repost_of"]:
        cosine = row.get("near_repost_cosine", float("nan"))
        return f"near-copy of {owned} (hash distance {int(row['near_repost_bits'])} bits, cosine {float(cosine):.2f})"
    return f"same file as {owned}"


def repost_summary(table: pd.DataFrame, examples: int = 3) -> pd.DataFrame:
    """Per brand: how many consumer photos are reposts of its owned photos, with examples.

    A repost is a consumer photo that is the same file as one of the brand's
    owned photos (sha256, found by collect) or a near-copy of one (content hash
    within ``NEAR_DUPLICATE_BITS`` and confirmed by the image vectors after
    embed, ``explore.duplicates``). Columns: ``brand``, ``category``,
    ``reposts``, ``same_file`` and ``near_copies`` (the two kinds),
    ``consumer_files`` (consumer rows that are ``ok`` or ``repost``),
    ``repost_share`` (reposts / consumer_files), ``excluded`` (status
    ``repost``: left out of consumer shares), ``examples`` (up to ``examples``
    consumer paths, `` | ``-separated, each with the owned path it repeats:
    ``(= owned)`` for the same file, ``(near-copy of owned, ...)``). Brands
    without reposts have no row.
    """
    columns = ["brand", "category", "reposts", "same_file", "near_copies", "consumer_files", "repost_share",
               "excluded", "examples"]
    if "repost_of" not in table or not (table["repost_of"].fillna("") != "").any():
        return pd.DataFrame(columns=columns)
    path_of = table.set_index("image_id")["relpath"].to_dict()
    near = is_near_copy(table)
    consumer = table[(table["source"] == "consumer") & table["status"].isin(["ok", "repost"])]
    rows = []
    for brand, group in consumer.groupby("brand", sort=True):
        hits = group[group["repost_of"].fillna("") != ""]
        if not len(hits):
            continue
        shown = []
        for _, r in hits.head(examples).iterrows():
            if near[r.name]:
                shown.append(f"{r['relpath']} ({repost_description(r, path_of)})")
            else:
                shown.append(f"{r['relpath']} (= {path_of.get(r['repost_of'], r['repost_of'])})")
        n_near = int(near[hits.index].sum())
        rows.append(
            dict(
                brand=brand,
                category=str(group["category"].iloc[0]),
                reposts=len(hits),
                same_file=len(hits) - n_near,
                near_copies=n_near,
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


def _propose_near_reposts(table: pd.DataFrame, hashes: dict[int, int], max_bits: int) -> None:
    """Point each used consumer photo at the closest used owned photo of its brand within ``max_bits``.

    Proposals only (``near_repost_of``, ``near_repost_bits``): a re-share is
    seldom byte-identical (platforms recompress, resize, crop), so the exact
    test of ``_flag_reposts`` misses it. ``explore.duplicates`` confirms a
    proposal with the image vectors after embed, by the near-duplicate rule.
    Consumer rows already marked as exact reposts are not proposed again. Ties
    in hash distance go to the owned photo first in table order.
    """
    if max_bits < 0:
        return
    ok = table["status"].to_numpy() == "ok"
    source = table["source"].to_numpy()
    exact = table["repost_of"].fillna("").to_numpy() != ""
    ids = table["image_id"].to_numpy()
    for brand in sorted(set(table.loc[ok, "brand"])):
        mine = ok & (table["brand"].to_numpy() == brand)
        consumer = [i for i in np.flatnonzero(mine & (source == "consumer") & ~exact) if i in hashes]
        owned = [i for i in np.flatnonzero(mine & (source == "owned")) if i in hashes]
        if not consumer or not owned:
            continue
        index, bits = nearest_partners(
            np.array([hashes[i] for i in consumer], dtype=np.uint64),
            np.array([hashes[i] for i in owned], dtype=np.uint64),
            max_bits,
        )
        for k in np.flatnonzero(index >= 0):
            table.at[consumer[k], "near_repost_of"] = ids[owned[index[k]]]
            table.at[consumer[k], "near_repost_bits"] = int(bits[k])

"""Near-duplicates, confirmed with the image vectors (the stage right after embed).

collect proposes, within each brand x source, a near-identical earlier image
for each used image: a difference hash (Krawetz, "Kind of Like That", 2013)
of the picture's content box (a uniform background border cropped away,
``collect.content_hash``) within ``CANDIDATE_BITS`` bits. Two unrelated
objects on white share most plain-hash bits (that is how a baby bottle once
matched a penguin); cropping the background removes that, and this stage
keeps a proposed pair only when the encoder's ``cluster`` vectors agree too
(cosine >= ``MIN_COSINE``). Both thresholds were chosen on an outside set
with known duplicates (``benchmarks/near_duplicates.py``: derived copies of
scikit-image photos and openclipart drawings on white) and never on the demo.

A confirmed near-duplicate counts once: by default (study key
``images.near_duplicates = "exclude"``) every later member of a group gets
status ``near_duplicate`` and leaves the vectors passed to the later stages;
the representative kept is the group's first row in table order (the table is
sorted by path, or follows the manifest), so reruns keep the same one.

Near-copy reposts. A consumer re-share of a brand's own photo is seldom
byte-identical (platforms recompress, resize, crop), so collect's exact test
(same sha256) misses it, and the near-duplicate search above stays within one
source. collect therefore also proposes, for each used consumer photo that is
not an exact repost, the closest used owned photo of the same brand within
``CANDIDATE_BITS`` (``near_repost_of``, ``near_repost_bits``); this stage
confirms it by the same rule (``near_duplicate_rule``, same thresholds) and the
consumer row becomes a repost like an exact one: ``repost_of`` = the owned
image id, and with ``images.reposts = "exclude"`` (default) status ``repost``.

Order, fixed: reposts are decided first, then near-duplicates among the rows
still ``ok``. A row that became a repost (status ``repost``) keeps no
near-duplicate proposal; under ``images.reposts = "keep"`` it stays ``ok`` and
may still be a near-duplicate of an earlier row. A near-duplicate proposal
whose earlier partner became a repost is still judged by its cosine (the pair
is near-identical either way): under ``exclude`` both then leave the shares,
the later one as ``near_duplicate`` of the repost.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from explore.collect import NEAR_DUPLICATE_BITS

#: Content-hash distance (bits of 64) up to which collect proposes a pair.
#: Chosen on the outside set (benchmarks/near_duplicates.py).
CANDIDATE_BITS = NEAR_DUPLICATE_BITS

#: Cosine of the ``cluster`` vectors a proposed pair needs to be confirmed.
#: Chosen on the outside set (benchmarks/near_duplicates.py) with the bundled encoder.
MIN_COSINE = 0.87


def near_duplicate_rule(bits, cosine, max_bits: int = CANDIDATE_BITS, min_cosine: float = MIN_COSINE):
    """Boolean array: pairs with content-hash distance ``<= max_bits`` and cosine ``>= min_cosine``."""
    return (np.asarray(bits) <= max_bits) & (np.asarray(cosine) >= min_cosine)


def confirm_near_duplicates(
    images: pd.DataFrame,
    embeddings,
    min_cosine: float = MIN_COSINE,
    exclude: bool = True,
    exclude_reposts: bool = True,
):
    """Keep collect's near-duplicate and near-copy repost proposals whose vectors agree.

    Parameters
    ----------
    images : the images table (``near_duplicate_of`` and ``near_repost_of``
        hold collect's proposals).
    embeddings : ``embed.Embeddings`` of its usable rows.
    min_cosine : cosine of the ``cluster`` vectors needed to confirm a pair.
    exclude : give confirmed later members status ``near_duplicate`` and drop
        their vectors (``False``: keep them ``ok``, flag only).
    exclude_reposts : give confirmed near-copy reposts status ``repost`` and
        drop their vectors (``False``: keep them ``ok`` with ``repost_of``
        filled), as study key ``images.reposts`` does for exact reposts.

    Returns
    -------
    (images, embeddings, notes): a new table (unconfirmed near-duplicate
    proposals cleared, ``near_duplicate_cosine`` and ``near_repost_cosine``
    filled for proposals, ``repost_of`` for confirmed near-copies), the
    embeddings of the rows still ``ok``, and printable notes.
    """
    table = images.copy()
    if "near_duplicate_cosine" not in table:
        table["near_duplicate_cosine"] = np.nan
    row_of = {image_id: k for k, image_id in enumerate(embeddings.image_ids)}
    repost_note = _confirm_near_reposts(table, embeddings, row_of, min_cosine, exclude_reposts)
    proposals = table.index[(table["status"] == "ok") & (table["near_duplicate_of"].fillna("") != "")]
    confirmed, dropped = [], 0
    for i in proposals:
        a, b = row_of.get(table.at[i, "image_id"]), row_of.get(table.at[i, "near_duplicate_of"])
        if a is None or b is None:
            table.at[i, "near_duplicate_of"] = ""
            continue
        cosine = float(embeddings.cluster[a] @ embeddings.cluster[b])
        table.at[i, "near_duplicate_cosine"] = cosine
        if cosine >= min_cosine:
            confirmed.append(i)
        else:
            table.at[i, "near_duplicate_of"] = ""
            dropped += 1
    notes = [
        f"near-duplicates: {len(confirmed)} confirmed by the image vectors (cosine >= {min_cosine}), "
        f"{dropped} hash-only proposal(s) rejected"
    ]
    if exclude and confirmed:
        path_of = table.set_index("image_id")["relpath"].to_dict()
        for i in confirmed:
            table.at[i, "status"] = "near_duplicate"
            table.at[i, "reason"] = (
                f"near-identical to {path_of.get(table.at[i, 'near_duplicate_of'], '')} in the same brand and "
                "source (counted once; study key images.near_duplicates = 'keep' counts both)"
            )
        notes[0] += f"; {len(confirmed)} left out of the shares (each group counts once)"
    if repost_note:
        notes.append(repost_note)
    keep = set(table.loc[table["status"] == "ok", "image_id"])
    rows = [k for k, image_id in enumerate(embeddings.image_ids) if image_id in keep]
    if len(rows) == len(embeddings.image_ids):
        return table, embeddings, notes
    kept = replace(
        embeddings,
        image_ids=[embeddings.image_ids[k] for k in rows],
        cluster=embeddings.cluster[rows],
        joint=embeddings.joint[rows],
    )
    return table, kept, notes


def _confirm_near_reposts(table: pd.DataFrame, embeddings, row_of: dict, min_cosine: float, exclude: bool) -> str:
    """Confirm collect's near-copy repost proposals in place; the run note ("" when there were none)."""
    if "near_repost_of" not in table:
        return ""
    table["near_repost_cosine"] = np.nan
    proposed = table.index[(table["status"] == "ok") & (table["near_repost_of"].fillna("") != "")]
    if not len(proposed):
        return ""
    path_of = table.set_index("image_id")["relpath"].to_dict()
    confirmed, rejected = 0, 0
    for i in proposed:
        a, b = row_of.get(table.at[i, "image_id"]), row_of.get(table.at[i, "near_repost_of"])
        if a is None or b is None:  # not embedded (changed since collect): nothing to confirm with
            continue
        cosine = float(embeddings.cluster[a] @ embeddings.cluster[b])
        bits = int(table.at[i, "near_repost_bits"])
        table.at[i, "near_repost_cosine"] = cosine
        if not near_duplicate_rule(bits, cosine, min_cosine=min_cosine):
            rejected += 1
            continue
        confirmed += 1
        table.at[i, "repost_of"] = table.at[i, "near_repost_of"]
        if exclude:
            table.at[i, "status"] = "repost"
            table.at[i, "near_duplicate_of"] = ""  # a repost, not a near-duplicate (decided first)
            table.at[i, "reason"] = (
                f"near-copy of the brand's own photo {path_of.get(table.at[i, 'near_repost_of'], '')} "
                f"(hash distance {bits} bits, cosine {cosine:.2f}) re-posted in its consumer set; left out "
                "of consumer shares (study key images.reposts = 'keep' counts it)"
            )
    return (
        f"reposts: {confirmed} consumer photo(s) confirmed as near-copies of the brand's own photos "
        f"(content hash within {CANDIDATE_BITS} bits and cosine >= {min_cosine}), {rejected} hash-only "
        "proposal(s) rejected; "
        + ("left out of consumer shares" if exclude else "kept in consumer shares (images.reposts = 'keep')")
    )

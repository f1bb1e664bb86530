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


def confirm_near_duplicates(images: pd.DataFrame, embeddings, min_cosine: float = MIN_COSINE, exclude: bool = True):
    """Keep collect's near-duplicate proposals whose vectors agree; count each group once.

    Parameters
    ----------
    images : the images table (``near_duplicate_of`` holds collect's proposals).
    embeddings : ``embed.Embeddings`` of its usable rows.
    min_cosine : cosine of the ``cluster`` vectors needed to confirm a pair.
    exclude : give confirmed later members status ``near_duplicate`` and drop
        their vectors (``False``: keep them ``ok``, flag only).

    Returns
    -------
    (images, embeddings, notes): a new table (unconfirmed proposals cleared,
    ``near_duplicate_cosine`` filled for proposals), the embeddings of the rows
    still ``ok``, and printable notes.
    """
    table = images.copy()
    if "near_duplicate_cosine" not in table:
        table["near_duplicate_cosine"] = np.nan
    row_of = {image_id: k for k, image_id in enumerate(embeddings.image_ids)}
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
    if not exclude or not confirmed:
        return table, embeddings, notes
    path_of = table.set_index("image_id")["relpath"].to_dict()
    for i in confirmed:
        table.at[i, "status"] = "near_duplicate"
        table.at[i, "reason"] = (
            f"near-identical to {path_of.get(table.at[i, 'near_duplicate_of'], '')} in the same brand and "
            "source (counted once; study key images.near_duplicates = 'keep' counts both)"
        )
    keep = set(table.loc[table["status"] == "ok", "image_id"])
    rows = [k for k, image_id in enumerate(embeddings.image_ids) if image_id in keep]
    kept = replace(
        embeddings,
        image_ids=[embeddings.image_ids[k] for k in rows],
        cluster=embeddings.cluster[rows],
        joint=embeddings.joint[rows],
    )
    notes[0] += f"; {len(confirmed)} left out of the shares (each group counts once)"
    return table, kept, notes

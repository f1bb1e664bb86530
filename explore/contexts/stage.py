"""The contexts stage: find, name, index, and list the findings (:func:`run_contexts`)."""

from __future__ import annotations

import time

import numpy as np
import pandas as pd

from explore.contexts.common import UNASSIGNED, UNASSIGNED_ID, _name, _require
from explore.contexts.fit import STABILITY_COLUMNS, context_stability, find_contexts
from explore.contexts.naming import exemplars, load_vocabulary, name_contexts
from explore.contexts.tables import brand_context_table, signature_contexts, source_context_gaps, unexpected_contexts
from explore.study import ContextSettings


def run_contexts(
    images: pd.DataFrame,
    image_ids: list[str],
    cluster: np.ndarray,
    joint: np.ndarray | None,
    settings: ContextSettings,
    *,
    seed: int = 0,
    encode_texts=None,
    encoder_id: str = "",
    seconds: dict | None = None,
    stability: bool = True,
) -> dict[str, pd.DataFrame]:
    """The whole contexts stage: find, name, index, and list the findings.

    Parameters
    ----------
    images : the images table (at least image_id, brand, category, source);
        rows are matched to ``image_ids``.
    image_ids : the ids of the embedded images, row-aligned with the vectors.
    cluster : (n, d_c) cluster vectors; joint : (n, d_j) joint vectors or None.
    settings : the study's context settings; seed : the study seed.
    encode_texts : callable phrases -> (m, d_j) vectors in the joint space
        (the encoder's ``encode_texts``); without it contexts are numbered.
    encoder_id : recorded in the contexts table.
    seconds : optional dict that receives the wall time of each step.
    stability : refit on another seed and report the agreement
        (:func:`context_stability`; table ``context_stability``).

    Returns
    -------
    dict of tables: image_contexts, contexts, brand_contexts,
    signature_contexts, unexpected_contexts, source_context_gaps, and
    context_stability (empty when ``stability`` is False).
    """
    _require(images, ["image_id", "brand", "category", "source"], "images")
    cluster = np.asarray(cluster)
    if len(image_ids) != len(cluster):
        raise ValueError(f"contexts: {len(image_ids)} image ids but {len(cluster)} cluster vectors")
    if joint is not None and len(joint) != len(cluster):
        raise ValueError(f"contexts: {len(joint)} joint vectors but {len(cluster)} cluster vectors")
    by_id = images.drop_duplicates("image_id").set_index("image_id")
    missing = [i for i in image_ids if i not in by_id.index]
    if missing:
        raise ValueError(f"contexts: image ids not in the images table, e.g. {missing[:3]}")
    keep = ["brand", "category", "source"] + (["poster"] if "poster" in by_id.columns else [])
    rows = by_id.loc[list(image_ids), keep].reset_index()

    fit = find_contexts(cluster, settings, seed)
    labels, renames, edit_log = fit.labels, {}, pd.DataFrame(columns=["edit", "target", "action", "context_id", "result"])
    if settings.edits:
        from explore.context_names import apply_edits

        relpaths = (dict(zip(by_id.index.astype(str), by_id["relpath"].astype(str)))
                    if "relpath" in by_id.columns else None)
        labels, renames, edit_log = apply_edits(fit.labels, image_ids, settings.edits, relpaths)
    start = time.perf_counter()
    phrases = load_vocabulary(settings) if encode_texts is not None else None
    phrase_vectors = np.asarray(encode_texts(phrases), dtype=np.float32) if phrases else None
    named = name_contexts(joint, labels, phrases, phrase_vectors, renames=renames, seed=seed)
    names = dict(zip(named["context_id"], named["context"]))

    image_contexts = pd.DataFrame(
        {
            "image_id": list(image_ids),
            "context_id": labels,
            "context": [_name(c, names) for c in labels],
            "membership": fit.membership,
            "map_x": fit.map_xy[:, 0],
            "map_y": fit.map_xy[:, 1],
        }
    )

    near = exemplars(cluster, labels, settings.exemplars)
    ids = np.asarray(image_ids)
    contexts = named.copy()
    contexts["size"] = [int((labels == c).sum()) for c in contexts["context_id"]]
    contexts["exemplars"] = [" ".join(ids[near[int(c)]]) for c in contexts["context_id"]]
    unassigned = pd.DataFrame(
        [{"context_id": UNASSIGNED_ID, "context": UNASSIGNED, "suggested_name": "", "name_source": "none",
          "name_confidence": np.nan, "name_margin": np.nan, "runner_up": "", "candidates": "",
          "name_score": np.nan, "alternatives": "", "size": int((labels == UNASSIGNED_ID).sum()), "exemplars": ""}]
    )
    contexts = pd.concat([contexts, unassigned], ignore_index=True)
    contexts["share"] = contexts["size"] / len(labels)
    for key, value in settings_record(fit.parameters, settings, encoder_id, phrases).items():
        contexts[key] = value
    first = ["context_id", "context", "size", "share", "name_source", "suggested_name", "name_confidence",
             "name_margin", "runner_up", "candidates", "name_score", "alternatives", "exemplars"]
    contexts = contexts[first + [c for c in contexts.columns if c not in first]]

    after_naming = time.perf_counter()
    table = brand_context_table(rows, labels, names, min_margin=settings.min_count, seed=seed)
    result = {
        "image_contexts": image_contexts,
        "contexts": contexts,
        "brand_contexts": table,
        "signature_contexts": signature_contexts(table, settings),
        "unexpected_contexts": unexpected_contexts(table, settings),
        "source_context_gaps": source_context_gaps(rows, labels, settings, names, seed=seed),
        "context_edits": edit_log,
    }
    before_stability = time.perf_counter()
    result["context_stability"] = (
        context_stability(cluster, fit.labels, settings, seed) if stability and len(labels) >= 3
        else pd.DataFrame(columns=STABILITY_COLUMNS)
    )
    if seconds is not None:
        seconds["stability_refit"] = round(time.perf_counter() - before_stability, 2)
        seconds.update(fit.seconds)
        seconds["names_exemplars"] = round(after_naming - start, 2)
        seconds["brand_tables"] = round(before_stability - after_naming, 2)
    return result


def settings_record(parameters: dict, settings: ContextSettings, encoder_id: str = "", phrases=None) -> dict:
    """Flat record of what produced the contexts (written as columns of ``contexts``)."""
    record = {f"setting_{k}": v for k, v in parameters.items() if k not in ("contexts_found", "unassigned")}
    record.update(
        {
            "setting_fdr": settings.fdr,
            "setting_min_index": settings.min_index,
            "setting_min_count": settings.min_count,
            "setting_rare_category_share": settings.rare_category_share,
            "setting_dominance_ratio": settings.dominance_ratio,
            "setting_vocabulary_size": len(phrases) if phrases else 0,
            "encoder_id": encoder_id,
        }
    )
    return record


"""Run notes of the contexts stage (``contexts: ...`` lines in run.json)."""

from __future__ import annotations

import pandas as pd

from explore.contexts.common import UNASSIGNED_ID

#: Above this share of unassigned photos the notes and the brand view give advice.
UNASSIGNED_ADVICE_SHARE = 0.30
#: Below this adjusted Rand index the run notes advise reading the contexts with care.
STABILITY_ADVICE_ARI = 0.8


def describe(tables: dict[str, pd.DataFrame]) -> list[str]:
    """One-line notes for run.json: what was found and the settings used."""
    cx = tables["contexts"]
    real = cx[cx["context_id"] != UNASSIGNED_ID]
    unassigned = int(cx.loc[cx["context_id"] == UNASSIGNED_ID, "size"].sum())
    total = int(cx["size"].sum())
    settings = {k[len("setting_"):]: v for k, v in cx.iloc[0].items() if k.startswith("setting_")}
    gaps = tables["source_context_gaps"]
    return [
        f"contexts: {len(real)} contexts found in {total} images; {unassigned} unassigned "
        f"({unassigned / max(total, 1):.1%}), kept as context -1",
        "contexts: settings used " + ", ".join(f"{k}={_plain(v)}" for k, v in settings.items()),
        f"contexts: {_all(tables['signature_contexts'])} signature and "
        f"{_all(tables['unexpected_contexts'])} unexpected brand contexts over all photos "
        f"({len(tables['signature_contexts'])} and {len(tables['unexpected_contexts'])} counting the "
        f"consumer-only and owned-only rows), "
        f"{int(gaps['significant'].sum()) if len(gaps) else 0} consumer-vs-owned differences",
    ] + _naming_notes(tables) + _stability_notes(tables.get("context_stability"), unassigned / max(total, 1)) \
        + _test_notes(tables)


def _naming_notes(tables: dict[str, pd.DataFrame]) -> list[str]:
    """How sure the names are, and what the analyst's edits did."""
    from explore.context_names import NAME_RESAMPLES, WEAK_BELOW

    cx = tables["contexts"]
    real = cx[cx["context_id"] != UNASSIGNED_ID]
    notes = []
    if "name_source" in real.columns and len(real):
        weak = real[real["name_source"] == "zero-shot, weak"]
        named = real[real["name_source"].isin(["zero-shot", "zero-shot, weak"])]
        if len(named):
            notes.append(
                f"contexts: {len(named) - len(weak)} of {len(named)} zero-shot names hold in at least "
                f"{WEAK_BELOW:.0%} of {NAME_RESAMPLES} bootstrap resamples of their photos; "
                + (f"{len(weak)} weak, shown as 'context N' with candidates: "
                   + "; ".join(f"{r.context} ({r.candidates})" for r in weak.itertuples()) if len(weak) else "none weak")
            )
    edits = tables.get("context_edits")
    if edits is not None and len(edits):
        notes.append("contexts: study edits applied: " + "; ".join(edits["result"]))
    return notes


def _stability_notes(stability: pd.DataFrame | None, unassigned_share: float) -> list[str]:
    notes = []
    if stability is not None and len(stability):
        r = stability.iloc[0]
        line = (f"contexts: stability: {r['method']} found {int(r['refit_contexts'])} contexts "
                f"(main fit {int(r['main_contexts'])}); adjusted Rand index {r['ari']:.2f} on the "
                f"{int(r['both_assigned'])} images assigned in both ({r['ari_with_unassigned']:.2f} counting "
                "unassigned as a group)")
        if not r["ari"] >= STABILITY_ADVICE_ARI:
            line += (f"; below {STABILITY_ADVICE_ARI}: contexts change with the seed, so read small contexts "
                     "and their names with care")
        notes.append(line)
    if unassigned_share > UNASSIGNED_ADVICE_SHARE:
        notes.append(
            f"contexts: {unassigned_share:.0%} of the photos fit no context (above {UNASSIGNED_ADVICE_SHARE:.0%}): "
            "context shares describe only part of each brand's photos; more photos per brand, or a smaller "
            "min_cluster_size, usually assign more"
        )
    return notes


def _test_notes(tables: dict[str, pd.DataFrame]) -> list[str]:
    bc = tables.get("brand_contexts")
    if bc is None or "test" not in bc or not (bc["test"] != "").any():
        return []
    method = bc.loc[bc["test"] != "", "test"].iloc[0]
    return [f"contexts: brand x context tests: {method}; Benjamini-Hochberg over the rows with a category "
            "count of at least min_count"]


def _all(table: pd.DataFrame) -> int:
    return int((table["source"] == "all").sum()) if len(table) else 0


def _plain(value):
    return value.item() if hasattr(value, "item") else value


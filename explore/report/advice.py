"""Advice when results are thin: what is missing or too small to judge, and what to do about it.

``advice_lines(tables, run)`` is a pure function of the output tables and
run.json. The report shows the sentences beside the findings and the commands
print them after the findings.
"""

from __future__ import annotations

import math

import pandas as pd

#: Fewer photos than this in a brand x source cell: flagged. Rule of thumb
#: (common practice): below about 30 the 95 % interval of a share is wider than ±15 points.
MIN_PHOTOS = 30
#: Unassigned (noise) share above this: flagged.
MAX_UNASSIGNED = 0.30


def half_width(n: int, p: float = 0.5) -> float:
    """Half-width of the 95 % Wald interval of a share p on n photos (the worst case at p = 0.5)."""
    return 1.959963984540054 * math.sqrt(p * (1 - p) / n) if n > 0 else float("nan")


def advice_lines(tables: dict[str, pd.DataFrame], run: dict | None = None, findings: pd.DataFrame | None = None) -> list[str]:
    """Sentences of advice (empty when nothing is thin)."""
    run = run or {}
    settings = run.get("settings") or {}
    out: list[str] = []
    images = tables.get("images")
    usable = images[images["status"] == "ok"] if images is not None and "status" in images else images
    n_used = len(usable) if usable is not None else 0

    defs = tables.get("attribute_definitions")
    if (defs is None or not len(defs)) and not (settings.get("attributes") or []):
        out.append("No attributes were scored: add [[attributes]] entries to the study file (a name with positive "
                   "and negative descriptions) to get attribute shares and consumer vs owned gaps.")

    ctx = tables.get("contexts")
    if ctx is None or "context_id" not in ctx:
        out.append(f"No contexts: the contexts stage did not run on these {n_used:,} photos (it needs at least 3). "
                   "Contexts are groups of similar photos, so they need many photos per situation.")
    else:
        real = ctx[ctx["context_id"] >= 0]
        mcs = pd.to_numeric(ctx.get("setting_min_cluster_size", pd.Series(dtype=float)), errors="coerce").dropna()
        mcs_text = f" of at least {int(mcs.iloc[0])} similar photos" if len(mcs) else ""
        if not len(real):
            out.append(f"No contexts were found among {n_used:,} photos: a context is a group{mcs_text}. Add photos, "
                       "or lower [contexts] min_cluster_size in the study file.")
        un = ctx[ctx["context_id"] < 0]
        total = pd.to_numeric(ctx["size"], errors="coerce").sum() if "size" in ctx else 0
        if len(un) and total:
            share = float(pd.to_numeric(un["size"], errors="coerce").sum()) / float(total)
            if share > MAX_UNASSIGNED:
                out.append(f"{100 * share:.0f} % of photos fit no context (unassigned): context results describe only "
                           "the rest. More photos, a lower [contexts] min_samples, or cluster_selection = \"eom\" "
                           "usually assign more of them.")

    if usable is not None and len(usable) and {"brand", "source"} <= set(usable.columns):
        counts = usable.groupby(["brand", "source"]).size()
        for brand in sorted(set(usable["brand"].astype(str))):
            thin = [(s, int(counts.get((brand, s), 0))) for s in ("consumer", "owned")]
            thin = [(s, k) for s, k in thin if 0 < k < MIN_PHOTOS]
            for s, k in thin:
                out.append(f"{brand} has only {k} {s} photos: a share on so few photos has a 95 % interval up to "
                           f"±{100 * half_width(k):.0f} points wide, so only large differences can pass the tests. "
                           f"Aim for at least {MIN_PHOTOS} (rule of thumb).")
            missing = [s for s in ("consumer", "owned") if int(counts.get((brand, s), 0)) == 0]
            if len(missing) == 1:
                out.append(f"{brand} has no {missing[0]} photos, so it has no consumer vs owned comparison.")
    if findings is not None and usable is not None and "brand" in (usable.columns if usable is not None else []):
        have = set(findings["brand"].astype(str)) if len(findings) else set()
        none = [b for b in sorted(set(usable["brand"].astype(str))) if b not in have]
        if none:
            out.append("No result passed the tests for " + ", ".join(none) + "; the report's charts still show "
                       "their numbers, but none is different enough from the category to call a finding.")
    return out

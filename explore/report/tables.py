"""Readable tables: human column names with units, numbers rounded to what the data supports.

Shares are shown as percentages, whole percent when the row's photo count is
below 1,000 and one decimal above (a 95 % interval on fewer than 1,000 photos
is at least about ±3 points wide, so a decimal would be noise). p- and
q-values read "< 0.001" below 0.001. Counts get thousands separators. The CSV
downloads keep the raw columns and full precision.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from explore.report.findings import p_text, pct_digits

#: Raw column -> what the page shows (units in brackets).
LABELS = {
    "brand": "brand", "category": "category", "source": "source", "context": "context", "context_id": "context #",
    "attribute": "attribute", "count": "photos", "brand_n": "photos of the brand", "n": "photos",
    "share": "share (%)", "share_low": "share, low (%)", "share_high": "share, high (%)",
    "yes_rate": "model's yes-rate (%)", "yes_rate_low": "yes-rate, low (%)", "yes_rate_high": "yes-rate, high (%)",
    "category_share": "category share (%)", "rest_share": "rest of category (%)", "rest_count": "photos, rest of category",
    "rest_n": "photos in rest of category", "index": "index (100 = category)", "p_value": "p", "q_value": "q (BH)",
    "rank": "rank", "brand_rank": "rank in brand", "reason": "why unexpected", "dominant_category": "dominant category",
    "dominant_share": "dominant category's share (%)", "consumer_count": "consumer photos in context",
    "consumer_n": "consumer photos", "consumer_share": "consumer share (%)", "owned_count": "owned photos in context",
    "owned_n": "owned photos", "owned_share": "owned share (%)", "gap": "gap (points)", "significant": "significant",
    "direction": "direction", "relpath": "file", "status": "status", "duplicate_of": "duplicate of",
    "displacement": "consumer → owned move (map units)", "survey_displacement": "consumer → survey move (map units)",
    "owned_rank_gap": "mean rank gap, owned", "survey_rank_gap": "mean rank gap, survey",
    "vector_distance": "cosine distance, consumer vs owned", "vector_displacement": "move on the look-alike map",
    "row": "CSV line", "survey_category": "category in survey", "score": "survey score", "sample_size": "survey sample size",
    "consumer_yes_rate": "consumer yes-rate (%)", "owned_yes_rate": "owned yes-rate (%)",
    "yes_rate_gap": "yes-rate gap (points)", "yes_rate_index": "yes-rate index (100 = category)",
    "known_brand": "known brand", "known_attribute": "known attribute", "note": "note",
}

_PERCENT = {"share", "share_low", "share_high", "yes_rate", "yes_rate_low", "yes_rate_high", "category_share",
            "rest_share", "dominant_share", "consumer_share", "owned_share", "concordant_share",
            "consumer_yes_rate", "owned_yes_rate"}
_POINTS = {"gap", "gap_low", "gap_high", "yes_rate_gap", "yes_rate_gap_low", "yes_rate_gap_high"}
_N_COLUMNS = ("brand_n", "n", "consumer_n", "owned_n")


def label(column: str) -> str:
    """The human name of a raw column."""
    if column in LABELS:
        return LABELS[column]
    if column.endswith(("_p", "_p_value")):
        return column.rsplit("_p", 1)[0].replace("_", " ") + " p"
    if column.endswith(("_q", "_q_value")):
        return column.rsplit("_q", 1)[0].replace("_", " ") + " q (BH)"
    return column.replace("_", " ")


def _num(v) -> float | None:
    if v is None or isinstance(v, (bool, np.bool_, str)):
        return None
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return v


def cell(column: str, value, n=None) -> str:
    """One formatted cell; ``n`` is the row's photo count (decides the share decimals)."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    try:
        if not isinstance(value, (list, tuple, np.ndarray)) and pd.isna(value):
            return "–"
    except (TypeError, ValueError):
        pass
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    v = _num(value)
    if v is None:
        return str(value)
    if column in _PERCENT:
        return f"{100 * v:.{pct_digits(n)}f}"
    if column in _POINTS:
        return f"{100 * v:+.{pct_digits(n)}f}".replace("-", "\u2212")
    if column in ("p_value", "q_value") or column.endswith(("_p", "_q", "_p_value", "_q_value")):
        return p_text(v)
    if column in ("index", "yes_rate_index", "share_index"):
        return f"{v:.0f}"
    if v == int(v) and abs(v) < 1e15:
        return f"{int(v):,}"
    if abs(v) >= 100:
        return f"{v:,.0f}"
    return f"{v:.2f}"


def readable(table: pd.DataFrame, columns: list[str] | None = None, limit: int = 300) -> dict:
    """Rows of formatted cells and human headers for the template (escaped there)."""
    cols = [c for c in (columns or list(table.columns)) if c in table.columns]
    ncol = next((c for c in _N_COLUMNS if c in table.columns), None)
    rows = []
    for rec in table.head(limit).to_dict("records"):
        n = rec.get(ncol) if ncol else None
        if ncol in ("consumer_n",) and "owned_n" in rec:
            n = min(_num(rec.get("consumer_n")) or 0, _num(rec.get("owned_n")) or 0)
        rows.append([cell(c, rec.get(c), n) for c in cols])
    numeric = [pd.api.types.is_numeric_dtype(table[c]) and not pd.api.types.is_bool_dtype(table[c]) for c in cols]
    return {"columns": [label(c) for c in cols], "raw_columns": cols, "rows": rows, "numeric": numeric,
            "total": len(table), "shown": len(rows)}

"""Formatting for the report page: JSON safe inside <script>, table cells, numbers, p-values."""

from __future__ import annotations

import json
import math
from datetime import datetime

import numpy as np
import pandas as pd

from explore.report.tables import readable

#: Per-image tables: too large to embed as they are; the page offers the plotted
#: images (ids, brand, source, context, map position, attribute probabilities) instead.
PER_IMAGE_TABLES = ("images", "image_attributes", "image_contexts")
#: Most rows of a table written into the HTML itself (the CSV download has all).
MAX_HTML_ROWS = 300


def script_json(value) -> str:
    """JSON text that can sit inside ``<script type="application/json">``.

    ``<``, ``>`` and ``&`` (and the JavaScript line separators U+2028/2029) are
    written as unicode escapes; JSON.parse reads them back unchanged.
    """
    text = json.dumps(value, ensure_ascii=False, separators=(",", ":"), allow_nan=False, default=_json_default)
    return (
        text.replace("<", "\\u003c")
        .replace(">", "\\u003e")
        .replace("&", "\\u0026")
        .replace("\u2028", "\\u2028")
        .replace("\u2029", "\\u2029")
    )


def _json_default(value):
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, (np.ndarray, list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, (pd.Timestamp, datetime)):
        return value.isoformat()
    return str(value)


def _clean(v):
    """A scalar ready for JSON (NaN -> None, numpy -> Python)."""
    if v is None:
        return None
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return v if math.isfinite(v) else None
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.bool_):
        return bool(v)
    if isinstance(v, (str, bool, int)):
        return v
    if isinstance(v, (list, tuple, np.ndarray)):
        return [_clean(x) for x in v]
    try:
        if pd.isna(v):
            return None
    except (TypeError, ValueError):
        pass
    return str(v)


def table_json(table: pd.DataFrame) -> dict:
    """A table as {"columns": [...], "rows": [[...], ...]} for the page's CSV download."""
    return {
        "columns": [str(c) for c in table.columns],
        "rows": [[_clean(v) for v in row] for row in table.itertuples(index=False, name=None)],
    }


def fmt_number(v, digits: int = 3) -> str:
    """Readable text for a table cell (numbers rounded, NaN as an en dash)."""
    if v is None:
        return "–"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    if isinstance(v, (float, np.floating)):
        v = float(v)
        if not math.isfinite(v):
            return "–"
        if v == int(v) and abs(v) < 1e15:
            return f"{int(v):,}"
        return f"{v:.{digits}g}" if abs(v) < 1e-3 or abs(v) >= 1e4 else f"{v:,.{digits}f}".rstrip("0").rstrip(".")
    try:
        if pd.isna(v):
            return "–"
    except (TypeError, ValueError):
        pass
    return str(v)


def fmt_p(v) -> str:
    """A p- or q-value as text: "< 0.001" for tiny values (never "0"), else 3 decimals; "–" when missing."""
    from explore.compare import format_p

    return format_p(v)


def _is_p_column(name: str) -> bool:
    name = str(name)
    return name in ("p_value", "q_value") or name.endswith(("_p", "_q"))


def html_table(table: pd.DataFrame, columns: list[str] | None = None, limit: int = MAX_HTML_ROWS) -> dict:
    """Rows of readable cells (human headers, units, rounding) for the template, at most ``limit`` rows."""
    return readable(table, columns, limit)


def _pct(v) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return "–"
    return "–" if not math.isfinite(v) else f"{100 * v:.0f} %"


def fmt_pct_points(v) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return "–"
    return "–" if not math.isfinite(v) else f"{100 * v:+.1f}"


def _fmt_cell(column: str, value) -> str:
    if column in ("share", "category_share", "consumer_share", "owned_share") and value is not None:
        try:
            v = float(value)
            return "–" if not math.isfinite(v) else f"{100 * v:.1f} %"
        except (TypeError, ValueError):
            pass
    if column == "index" and value is not None:
        try:
            v = float(value)
            return "–" if not math.isfinite(v) else f"{v:.0f}"
        except (TypeError, ValueError):
            pass
    return fmt_number(value)

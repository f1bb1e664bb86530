"""What every file of the contexts stage shares: the unassigned context, names, checks."""

from __future__ import annotations

import numpy as np
import pandas as pd

UNASSIGNED_ID = -1
UNASSIGNED = "unassigned"


def _name(context_id, names: dict[int, str] | None) -> str:
    context_id = int(context_id)
    if context_id == UNASSIGNED_ID:
        return UNASSIGNED
    if names and context_id in names:
        return names[context_id]
    return f"context {context_id}"


def _normalise(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float32)
    return x / (np.linalg.norm(x, axis=1, keepdims=True) + 1e-12)


def _require(frame: pd.DataFrame, columns: list[str], what: str) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(f"contexts: {what} table lacks column(s) {', '.join(missing)}")


"""Read a study's output folder: the tables (``NAME.parquet``) and ``run.json``.

The report reads nothing else (besides the original image files, for
thumbnails), so it can be rebuilt without any model. Tables that a run did not
write are simply absent; every report section checks for its own tables and
columns and says plainly what is missing.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

#: Every table the report knows how to use, in the order of the data flow.
KNOWN_TABLES = (
    "images",
    "skipped",
    "image_attributes",
    "attribute_definitions",
    "attribute_shares",
    "attribute_gaps",
    "attribute_check",
    "attribute_check_descriptions",
    "image_contexts",
    "contexts",
    "brand_contexts",
    "signature_contexts",
    "unexpected_contexts",
    "source_context_gaps",
    "survey",
    "agreement",
    "brand_map",
    "brand_map_loadings",
    "brand_vector_map",
    "brand_displacement",
    "brand_map_bootstrap",
    "context_stability",
)


class ReportError(ValueError):
    """The output folder cannot be turned into a report; the message says why."""


@dataclass
class OutputFolder:
    """The tables and run record of one study's output folder."""

    folder: Path
    run: dict = field(default_factory=dict)
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)

    def has(self, name: str, *columns: str) -> bool:
        """True when table ``name`` exists, is not empty and holds ``columns``."""
        table = self.tables.get(name)
        return table is not None and len(table) > 0 and all(c in table.columns for c in columns)

    def missing(self, name: str, *columns: str) -> str:
        """A sentence saying why ``has(name, *columns)`` is false (empty when it is true)."""
        table = self.tables.get(name)
        if table is None:
            return f"table '{name}' was not written by this run"
        if len(table) == 0:
            return f"table '{name}' is empty"
        lacking = [c for c in columns if c not in table.columns]
        if lacking:
            return f"table '{name}' lacks column(s) {', '.join(lacking)}"
        return ""

    def get(self, name: str) -> pd.DataFrame | None:
        return self.tables.get(name)


def shown_names(table: pd.DataFrame) -> pd.DataFrame:
    """Text cells with control and bidi characters made visible (``explore.printable``).

    Names come from folder and file names; a right-to-left override would
    reverse what the report shows. ``path`` is kept exact (thumbnails read it).
    """
    from explore.printable import UNSAFE, printable

    for column in table.columns:
        kind = table[column]
        if column == "path" or not (pd.api.types.is_object_dtype(kind) or pd.api.types.is_string_dtype(kind)):
            continue
        values = table[column]
        try:
            unsafe = values.str.contains(UNSAFE.pattern, regex=True, na=False).astype(bool)
        except (AttributeError, TypeError):  # not a text column after all
            continue
        if unsafe.any():
            table[column] = values.where(~unsafe, values.map(lambda v: printable(v) if isinstance(v, str) else v))
    return table


def load_output(folder: str | Path) -> OutputFolder:
    """Load ``run.json`` and every known ``NAME.parquet`` present in ``folder``.

    Parameters
    ----------
    folder : the study's output folder (as written by ``explore run``).

    Returns
    -------
    OutputFolder. A table that cannot be read is recorded in ``problems``
    (naming the file) instead of stopping the report.

    Raises
    ------
    ReportError when the folder does not exist or holds neither ``run.json``
    nor an ``images`` table.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise ReportError(f"{folder}: output folder not found; run the study first (explore run STUDY)")
    out = OutputFolder(folder=folder)
    run_file = folder / "run.json"
    if run_file.is_file():
        try:
            out.run = json.loads(run_file.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            out.problems.append(f"{run_file}: could not be read ({exc})")
    for name in KNOWN_TABLES:
        path = folder / f"{name}.parquet"
        if not path.is_file():
            continue
        try:
            out.tables[name] = shown_names(pd.read_parquet(path))
        except Exception as exc:  # a damaged file must not stop the rest of the report
            out.problems.append(f"{path}: could not be read ({type(exc).__name__}: {exc})")
    if not out.run and "images" not in out.tables:
        raise ReportError(
            f"{folder}: neither run.json nor images.parquet found; is this a study's output folder?"
        )
    return out

"""Compare, survey input: read and validate the survey CSV, join it to the study,
and put the three brand metrics (consumer share, owned share, survey score) side by side."""

from __future__ import annotations

import difflib
import math
from pathlib import Path

import numpy as np
import pandas as pd

from explore.study import StudyError

#: The three brand metrics compared with each other, in a fixed order.
METRICS = ("consumer_share", "owned_share", "survey_score")

SURVEY_REQUIRED = ("brand", "attribute", "score")
SURVEY_OPTIONAL = ("category", "sample_size")


class SurveyError(StudyError):
    """The survey CSV is not valid; the message names the file, row and column.

    A survey is part of a study's input, so this is a kind of ``StudyError``
    (the command line prints it as such, without a traceback).
    """


# --------------------------------------------------------------------------
# Survey input


def read_survey(path: str | Path) -> pd.DataFrame:
    """Read and validate a survey CSV (our columns: brand, attribute, score).

    Optional columns: ``category`` (checked against the study's category of the
    brand) and ``sample_size`` (respondents behind the score, recorded only).
    Other columns are kept aside and named in a note by :func:`join_survey`.

    Parameters
    ----------
    path : the CSV file (UTF-8, a byte-order mark is accepted).

    Returns
    -------
    DataFrame with columns ``row`` (line number in the file, header = 1),
    ``brand``, ``attribute``, ``score`` (float), ``category`` (text, empty when
    not given), ``sample_size`` (float, NaN when not given); the attribute
    ``df.attrs["ignored_columns"]`` lists unknown columns.

    Raises
    ------
    SurveyError naming the file, the row and the column at fault.
    """
    path = Path(path)
    if not path.is_file():
        raise SurveyError(f"{path}: survey file not found")
    try:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise SurveyError(f"{path}: not a readable CSV file: {exc}") from exc
    raw.columns = [str(c).strip().lower() for c in raw.columns]
    missing = [c for c in SURVEY_REQUIRED if c not in raw.columns]
    if missing:
        raise SurveyError(
            f"{path}: missing column(s) {', '.join(missing)}; a survey needs brand, attribute, "
            f"score (optional: {', '.join(SURVEY_OPTIONAL)}); found: {', '.join(raw.columns)}"
        )
    ignored = [c for c in raw.columns if c not in SURVEY_REQUIRED + SURVEY_OPTIONAL]

    rows = []
    seen: dict[tuple[str, str], int] = {}
    for i, rec in enumerate(raw.to_dict("records")):
        line = i + 2
        where = f"{path}: row {line}"
        brand = rec["brand"].strip()
        attribute = rec["attribute"].strip()
        if not brand:
            raise SurveyError(f"{where}: column 'brand' is empty")
        if not attribute:
            raise SurveyError(f"{where}: column 'attribute' is empty")
        score = _number(rec["score"], where, "score")
        if score is None:
            raise SurveyError(f"{where}: column 'score' is empty; every row needs a score")
        size = _number(rec.get("sample_size", ""), where, "sample_size")
        if size is not None and (size <= 0 or size != int(size)):
            raise SurveyError(f"{where}: column 'sample_size' is {size!r}; expected a whole number above 0")
        key = (brand, attribute)
        if key in seen:
            raise SurveyError(
                f"{where}: brand '{brand}', attribute '{attribute}' already scored in row {seen[key]}"
            )
        seen[key] = line
        rows.append(
            {
                "row": line,
                "brand": brand,
                "attribute": attribute,
                "score": score,
                "category": rec.get("category", "").strip(),
                "sample_size": float("nan") if size is None else size,
            }
        )
    if not rows:
        raise SurveyError(f"{path}: the survey has a header but no rows")
    table = pd.DataFrame(rows)
    table.attrs["ignored_columns"] = ignored
    return table


def _number(text: str, where: str, column: str) -> float | None:
    text = (text or "").strip()
    if not text:
        return None
    try:
        value = float(text)
    except ValueError:
        raise SurveyError(f"{where}: column '{column}' is '{text}'; expected a number") from None
    if not math.isfinite(value):
        raise SurveyError(f"{where}: column '{column}' is '{text}'; expected a finite number")
    return value


def join_survey(
    survey: pd.DataFrame,
    brand_categories: dict[str, str],
    attributes: list[str],
) -> tuple[pd.DataFrame, list[str]]:
    """Join survey rows to the study's brands and attributes, flagging the rest.

    Nothing is dropped: every survey row stays in the returned table with a
    ``status`` saying whether it is used. Unknown brands and attributes are
    named in the notes, with the closest known name when one is close.

    Parameters
    ----------
    survey : output of :func:`read_survey`.
    brand_categories : the study's brands, brand -> category.
    attributes : the study's attribute names.

    Returns
    -------
    (table, notes). The table has the columns of ``survey`` plus
    ``survey_category`` (the category the survey gave), ``category`` (the
    study's), ``known_brand``, ``known_attribute``, ``status`` (``used``,
    ``unknown brand``, ``unknown attribute``, ``unknown brand and attribute``)
    and ``note``.
    """
    table = survey.copy()
    known_attrs = set(attributes)
    table["survey_category"] = table["category"].astype(str)
    table["known_brand"] = table["brand"].isin(brand_categories.keys())
    table["known_attribute"] = table["attribute"].isin(known_attrs)
    table["category"] = [brand_categories.get(b, "") for b in table["brand"]]
    status, row_notes = [], []
    for rec in table.to_dict("records"):
        if rec["known_brand"] and rec["known_attribute"]:
            status.append("used")
        elif rec["known_attribute"]:
            status.append("unknown brand")
        elif rec["known_brand"]:
            status.append("unknown attribute")
        else:
            status.append("unknown brand and attribute")
        note = []
        if not rec["known_brand"]:
            note.append(_did_you_mean(rec["brand"], brand_categories.keys()))
        if not rec["known_attribute"]:
            note.append(_did_you_mean(rec["attribute"], known_attrs))
        given = rec["survey_category"]
        if rec["known_brand"] and given and given != rec["category"]:
            note.append(f"survey says category '{given}', the study says '{rec['category']}'")
        row_notes.append("; ".join(n for n in note if n))
    table["status"] = status
    table["note"] = row_notes

    notes = []
    bad_brands = sorted(set(table.loc[~table["known_brand"], "brand"]))
    bad_attrs = sorted(set(table.loc[~table["known_attribute"], "attribute"]))
    if bad_brands:
        notes.append(
            "survey: brand(s) not in the study, rows not used: "
            + ", ".join(_with_hint(b, brand_categories.keys()) for b in bad_brands)
        )
    if bad_attrs:
        notes.append(
            "survey: attribute(s) not in the study, rows not used: "
            + ", ".join(_with_hint(a, known_attrs) for a in bad_attrs)
        )
    mismatched = sorted(
        set(
            table.loc[
                table["known_brand"]
                & (table["survey_category"] != "")
                & (table["survey_category"] != table["category"]),
                "brand",
            ]
        )
    )
    if mismatched:
        notes.append(
            "survey: category differs from the study for "
            + ", ".join(mismatched)
            + " (the study's category is used)"
        )
    used = table[table["status"] == "used"]
    unscored = sorted(set(brand_categories) - set(used["brand"]))
    if unscored:
        notes.append("survey: no scores for brand(s) " + ", ".join(unscored))
    ignored = survey.attrs.get("ignored_columns", [])
    if ignored:
        notes.append("survey: column(s) ignored: " + ", ".join(ignored))
    columns = [
        "row", "brand", "category", "survey_category", "attribute", "score", "sample_size",
        "known_brand", "known_attribute", "status", "note",
    ]
    return table[columns].reset_index(drop=True), notes


def _did_you_mean(name: str, known) -> str:
    close = difflib.get_close_matches(name, list(known), n=1, cutoff=0.6)
    if not close:
        lowered = {k.lower(): k for k in known}
        if name.lower() in lowered:
            close = [lowered[name.lower()]]
    return f"did you mean '{close[0]}'?" if close else ""


def _with_hint(name: str, known) -> str:
    hint = _did_you_mean(name, known)
    return f"'{name}' ({hint})" if hint else f"'{name}'"


# --------------------------------------------------------------------------
# Brand metrics side by side


def brand_metrics(
    attribute_shares: pd.DataFrame,
    survey: pd.DataFrame | None = None,
    *,
    value: str = "yes_rate",
) -> pd.DataFrame:
    """One row per brand and attribute with the three metrics side by side.

    Parameters
    ----------
    attribute_shares : the ``attribute_shares`` table (rows with ``level ==
        "brand"`` are used).
    survey : the joined survey (output of :func:`join_survey`); rows whose
        status is not ``used`` are left out. ``None``: no survey.
    value : which column of ``attribute_shares`` is the photo metric
        (``yes_rate``, the default: the corrected ``share`` where random hand
        labels give one, else the model's yes-rate, recorded per row in
        ``consumer_from`` / ``owned_from``; or ``mean_probability``).

    Returns
    -------
    DataFrame with columns ``category``, ``brand``, ``attribute``,
    ``consumer_share``, ``owned_share``, ``survey_score`` (NaN where missing).
    """
    need = {"level", "brand", "category", "source", "attribute", value}
    missing = need - set(attribute_shares.columns)
    if missing:
        raise ValueError(f"attribute_shares: missing column(s) {', '.join(sorted(missing))}")
    rows = attribute_shares[attribute_shares["level"] == "brand"]
    # The corrected share (from random hand labels) where it exists, else the model's yes-rate.
    corrected = value == "yes_rate" and "share" in rows
    if corrected:
        rows = rows.assign(_metric=rows["share"].where(rows["share"].notna(), rows["yes_rate"]),
                           _from=np.where(rows["share"].notna(), "share", "yes_rate"))
    wide = rows.pivot_table(
        index=["category", "brand", "attribute"], columns="source", values="_metric" if corrected else value,
        aggfunc="first",
    )
    out = pd.DataFrame(index=wide.index)
    for source in ("consumer", "owned"):
        out[f"{source}_share"] = wide[source] if source in wide.columns else np.nan
    if corrected:
        origin = rows.pivot_table(index=["category", "brand", "attribute"], columns="source", values="_from",
                                  aggfunc="first")
        for source in ("consumer", "owned"):
            out[f"{source}_from"] = origin[source].reindex(out.index) if source in origin.columns else ""
    out = out.reset_index()
    if survey is not None and len(survey):
        used = survey[survey["status"] == "used"][["brand", "attribute", "score"]]
        out = out.merge(used, on=["brand", "attribute"], how="left").rename(columns={"score": "survey_score"})
    else:
        out["survey_score"] = np.nan
    out["survey_score"] = out["survey_score"].astype(float)
    return out.sort_values(["category", "brand", "attribute"]).reset_index(drop=True)

"""Hand labels: parsing a labels CSV, validating it against the images table, its sample design.

A labels file has the columns ``image``, ``attribute``, ``label`` and, when it
comes from a labelling sheet (``explore label``), the sample design per row:
``sample`` (``random`` or ``boundary``), ``stratum`` (brand | source),
``stratum_size`` (images in the stratum when drawn), ``drawn`` (images drawn
from it), ``seed`` and ``sheet`` (the sheet's id); optionally ``grade`` (1-7).

Only ``random`` rows estimate prevalence (corrected shares) and the reported
AUC: a hand-picked or boundary-enriched sample says nothing about how common an
attribute is. ``boundary`` rows serve thresholds and probes only.

Bad rows never stop the rest: each gives a message naming its row, and the
good rows are kept.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from explore.study import StudyError

#: Required columns of a labels CSV.
LABEL_COLUMNS = ("image", "attribute", "label")
#: Sample-design columns written by the labelling sheet.
DESIGN_COLUMNS = ("sample", "stratum", "stratum_size", "drawn", "seed", "sheet")
#: Optional graded answer (1-7) for attributes that are a matter of degree.
GRADE_COLUMN = "grade"
#: Accepted label texts (case-insensitive).
YES = {"1", "1.0", "yes", "y", "true"}
NO = {"0", "0.0", "no", "n", "false"}
CANT_TELL = {"", "?", "unsure", "can't tell", "cant tell", "skip"}
SAMPLES = ("random", "boundary")


def parse_labels_text(text: str, where: str = "labels") -> pd.DataFrame:
    """Parse the text of a labels CSV into a table of strings.

    Handles a UTF-8 byte-order mark, a semicolon (or tab) separator and header
    case and spaces ("Image", " LABEL "). Raises ``StudyError`` naming the file
    for an empty file or missing columns.
    """
    text = text.lstrip("\ufeff")
    if not text.strip():
        raise StudyError(f"{where}: the labels file is empty; expected a header row {','.join(LABEL_COLUMNS)}")
    first = text.splitlines()[0]
    try:
        delimiter = csv.Sniffer().sniff(first, delimiters=",;\t").delimiter
    except csv.Error:
        delimiter = ","
    try:
        table = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False, sep=delimiter)
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise StudyError(f"{where}: not a readable CSV file: {exc}") from exc
    table.columns = [str(c).strip().lower() for c in table.columns]
    missing = [c for c in LABEL_COLUMNS if c not in table.columns]
    if missing:
        raise StudyError(
            f"{where}: missing column(s) {', '.join(missing)}; expected columns: {', '.join(LABEL_COLUMNS)}"
            f" (found: {', '.join(table.columns) or 'none'}; separator read as {delimiter!r})"
        )
    return table


#: Statuses whose labels are dropped with their own sentence (rather than remapped to a kept image).
LEFT_OUT = {
    "commercial": "was left out as a commercial post (images.commercial_posts = 'exclude')",
    "repost": "is a repost of the brand's own photo (the same file or a near-copy), left out of consumer shares "
    "(images.reposts = 'exclude')",
}


def unguard(text: str) -> str:
    """A cell as written before the spreadsheet formula guard: ``'=x`` -> ``=x``.

    The labelling sheet's export and explore's CSV tables put an apostrophe
    before a text cell starting with = + - @ tab or CR (OWASP "CSV
    Injection"); reading it back, the apostrophe is taken off again so that an
    attribute or brand named "=..." still matches.
    """
    if len(text) > 1 and text[0] == "'" and text[1] in "=+-@\t\r":
        return text[1:]
    return text


def read_labels(
    table: pd.DataFrame,
    images: pd.DataFrame,
    attribute_names: Sequence[str],
    where: str = "labels",
    base: Path | None = None,
) -> tuple[pd.DataFrame, list[str]]:
    """Validate a labels table and match its images to the images table.

    Columns: ``image`` (an image_id, a path relative to the images root as in
    ``images.relpath``, or a file path, absolute or relative to the labels
    file's folder ``base``), ``attribute`` (a name in the study) and ``label``
    (1/yes = the positive side applies, 0/no = it does not, empty/unsure/? =
    can't tell, left out); optional design columns and ``grade``.

    Returns
    -------
    labels : image_id, attribute, label (int), grade (float, NaN when none),
        sample ("random", "boundary" or "" when not recorded), stratum,
        stratum_size, drawn, seed, sheet, row (line in the file).
    warnings : one line per row left out (unknown image or attribute, label
        outside the allowed values, conflicting duplicates), naming the row.

    Raises
    ------
    StudyError naming the file for a missing column.
    """
    table = table.rename(columns={c: str(c).strip().lower() for c in table.columns})
    missing = [c for c in LABEL_COLUMNS if c not in table.columns]
    if missing:
        raise StudyError(
            f"{where}: missing column(s) {', '.join(missing)}; expected columns: {', '.join(LABEL_COLUMNS)}"
        )
    known = set(attribute_names)
    by_id = {str(i): str(i) for i in images["image_id"]}
    by_rel = {str(r): str(i) for r, i in zip(images.get("relpath", []), images["image_id"])}
    by_path = {str(Path(p).resolve()): str(i) for p, i in zip(images["path"], images["image_id"])}
    status = dict(zip(images["image_id"].astype(str), images["status"].astype(str)))
    kept = (
        dict(zip(images["image_id"].astype(str), images["duplicate_of"].fillna("").astype(str)))
        if "duplicate_of" in images.columns
        else {}
    )
    near = (
        dict(zip(images["image_id"].astype(str), images["near_duplicate_of"].fillna("").astype(str)))
        if "near_duplicate_of" in images.columns
        else {}
    )
    has_design = "sample" in table.columns
    out, warnings = [], []
    unsure = 0
    for row_number, row in enumerate(table.to_dict("records"), start=2):  # row 1 is the header
        image = unguard(str(row.get("image", "")).strip())
        attribute = unguard(str(row.get("attribute", "")).strip())
        raw_label = str(row.get("label", "")).strip().lower()
        if attribute not in known:
            warnings.append(
                f"{where}: row {row_number}: attribute '{attribute}' is not in the study "
                f"(known: {', '.join(sorted(known)) or 'none'}); row left out"
            )
            continue
        if raw_label in CANT_TELL:
            unsure += 1
            continue
        if raw_label not in YES | NO:
            warnings.append(
                f"{where}: row {row_number}: label '{raw_label}' must be 0 or 1 (yes/no; empty or "
                f"'unsure' for can't tell); row left out"
            )
            continue
        grade = np.nan
        raw_grade = str(row.get(GRADE_COLUMN, "")).strip()
        if raw_grade:
            try:
                grade = float(raw_grade)
            except ValueError:
                grade = -1.0
            if not (1 <= grade <= 7 and grade == int(grade)):
                warnings.append(f"{where}: row {row_number}: grade '{raw_grade}' must be a whole number 1-7; grade left out")
                grade = np.nan
        sample = str(row.get("sample", "")).strip().lower() if has_design else ""
        if sample and sample not in SAMPLES:
            warnings.append(
                f"{where}: row {row_number}: sample '{sample}' must be 'random' or 'boundary'; "
                f"the row is used for the check only"
            )
            sample = ""
        image_id = by_id.get(image) or by_rel.get(image)
        if image_id is None:
            candidate = Path(image).expanduser()
            if not candidate.is_absolute() and base is not None:
                candidate = base / candidate
            image_id = by_path.get(str(candidate.resolve()))
        if image_id is None:
            warnings.append(f"{where}: row {row_number}: image '{image}' is not in the study's images; row left out")
            continue
        if status.get(image_id) == "duplicate" and status.get(kept.get(image_id, "")) == "ok":
            image_id = kept[image_id]  # same content as a kept image: the label applies to it
        if status.get(image_id) == "near_duplicate" and status.get(near.get(image_id, "")) == "ok":
            image_id = near[image_id]  # near-identical, same brand and source: the label applies to the kept one
        if status.get(image_id) in LEFT_OUT:
            warnings.append(
                f"{where}: row {row_number}: image '{image}' {LEFT_OUT[status[image_id]]}; "
                "its label is not used for corrected shares (row left out)"
            )
            continue
        if status.get(image_id) != "ok":
            warnings.append(
                f"{where}: row {row_number}: image '{image}' is not usable ({status.get(image_id)}); row left out"
            )
            continue
        out.append((
            image_id, attribute, 1 if raw_label in YES else 0, grade, sample,
            unguard(str(row.get("stratum", "")).strip()), _number(row.get("stratum_size")), _number(row.get("drawn")),
            str(row.get("seed", "")).strip(), str(row.get("sheet", "")).strip(), row_number,
        ))
    columns = ["image_id", "attribute", "label", "grade", "sample", "stratum", "stratum_size", "drawn",
               "seed", "sheet", "row"]
    labels = pd.DataFrame(out, columns=columns)
    if unsure:
        warnings.append(f"{where}: {unsure} answer{'s' if unsure != 1 else ''} 'can't tell' left out")
    conflicted = labels.groupby(["image_id", "attribute"])["label"].transform("nunique") > 1
    if conflicted.any():
        for (image_id, attribute), g in labels[conflicted].groupby(["image_id", "attribute"], sort=False):
            warnings.append(
                f"{where}: rows {', '.join(map(str, g['row']))}: image '{image_id}' has both labels 0 and 1 "
                f"for attribute '{attribute}'; these rows are left out"
            )
        labels = labels[~conflicted]
    labels = labels.drop_duplicates(["image_id", "attribute"]).reset_index(drop=True)
    return labels, warnings


def _number(value) -> float:
    try:
        return float(str(value).strip())
    except (TypeError, ValueError):
        return float("nan")


def prevalence_labels(labels: pd.DataFrame, where: str = "labels") -> tuple[pd.DataFrame, list[str]]:
    """The rows that may estimate prevalence (``sample == "random"``), and notes on the rest.

    A file without the sample design (hand-written: image, attribute, label)
    gives no prevalence rows and a note saying why; boundary rows are noted as
    used for thresholds and probes only.
    """
    if labels.empty:
        return labels, []
    random = labels[labels["sample"] == "random"]
    notes = []
    if random.empty:
        notes.append(
            f"{where}: no random sample recorded (column 'sample'), so these labels are used to check "
            "the model, not to estimate shares: a hand-picked set's rate of positives says nothing about "
            "how common the attribute is. Draw a random sample with `explore label`"
        )
        return random, notes
    boundary = int((labels["sample"] == "boundary").sum())
    other = int((labels["sample"] == "").sum())
    if boundary:
        notes.append(f"{where}: {boundary} boundary-sample labels used for thresholds and probes only, "
                     "never for shares or the reported AUC")
    if other:
        notes.append(f"{where}: {other} labels without a sample design used for the check only")
    return random, notes


def describe_sample(labels: pd.DataFrame) -> str:
    """How one attribute's labels were sampled, in words (for the check and the report)."""
    if labels.empty or "sample" not in labels or not (labels["sample"] != "").any():
        return "sample design not recorded (hand-written labels)"
    parts = []
    random = labels[labels["sample"] == "random"]
    if len(random):
        seeds = sorted(set(random["seed"].astype(str)) - {""})
        sheets = sorted(set(random["sheet"].astype(str)) - {""})
        strata = random["stratum"].nunique()
        parts.append(
            f"{len(random)} random within brand x source ({strata} strata"
            + (f", seed {', '.join(seeds)}" if seeds else "")
            + (f", sheet {', '.join(sheets)}" if sheets else "") + ")"
        )
    boundary = int((labels["sample"] == "boundary").sum())
    if boundary:
        parts.append(f"{boundary} near the decision boundary (thresholds and probe only)")
    other = int((labels["sample"] == "").sum())
    if other:
        parts.append(f"{other} without a design")
    return "; ".join(parts)

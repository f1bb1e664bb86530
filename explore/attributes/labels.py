"""Hand labels: reading and validating a labels table against the images table."""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

import pandas as pd

from explore.study import StudyError

#: Columns of a labels CSV.
LABEL_COLUMNS = ("image", "attribute", "label")


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
    (1 = the positive side applies, 0 = it does not).

    Returns
    -------
    labels : image_id, attribute, label (int), one row per labelled pair.
    warnings : rows that could not be used (image unknown or not usable), one line each.

    Raises
    ------
    StudyError naming the file, row and column for a missing column, an
    unknown attribute, a label other than 0/1, or contradictory labels.
    """
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
    out, warnings = [], []
    for row_number, row in enumerate(table.itertuples(index=False), start=2):  # row 1 is the header
        image = str(getattr(row, "image")).strip()
        attribute = str(getattr(row, "attribute")).strip()
        raw_label = str(getattr(row, "label")).strip()
        if attribute not in known:
            raise StudyError(
                f"{where}: row {row_number}: attribute '{attribute}' is not in the study "
                f"(known: {', '.join(sorted(known)) or 'none'})"
            )
        if raw_label not in ("0", "1", "0.0", "1.0"):
            raise StudyError(f"{where}: row {row_number}: label '{raw_label}' must be 0 or 1")
        image_id = by_id.get(image) or by_rel.get(image)
        if image_id is None:
            candidate = Path(image).expanduser()
            if not candidate.is_absolute() and base is not None:
                candidate = base / candidate
            image_id = by_path.get(str(candidate.resolve()))
        if image_id is None:
            warnings.append(f"{where}: row {row_number}: image '{image}' is not in the study's images")
            continue
        if status.get(image_id) == "duplicate" and status.get(kept.get(image_id, "")) == "ok":
            image_id = kept[image_id]  # same content as a kept image: the label applies to it
        if status.get(image_id) != "ok":
            warnings.append(
                f"{where}: row {row_number}: image '{image}' is not usable ({status.get(image_id)})"
            )
            continue
        out.append((image_id, attribute, int(float(raw_label)), row_number))
    labels = pd.DataFrame(out, columns=["image_id", "attribute", "label", "row"])
    conflicts = labels.groupby(["image_id", "attribute"])["label"].nunique()
    conflicts = conflicts[conflicts > 1]
    if len(conflicts):
        image_id, attribute = conflicts.index[0]
        rows = labels[(labels.image_id == image_id) & (labels.attribute == attribute)]["row"].tolist()
        raise StudyError(
            f"{where}: rows {', '.join(map(str, rows))}: image '{image_id}' has both labels 0 and 1 "
            f"for attribute '{attribute}'"
        )
    labels = labels.drop_duplicates(["image_id", "attribute"]).drop(columns="row").reset_index(drop=True)
    return labels, warnings

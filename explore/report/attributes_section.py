"""Report attribute cards: what each card says about checking against hand labels."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from explore.report.data import OutputFolder
from explore.report.format import _pct, fmt_number


def _attribute_validation(out: OutputFolder, attr: str, shares: pd.DataFrame) -> dict:
    """What an attribute card says about checking: labels, AUC, accuracy, which number is shown, warnings."""
    view = {"checked": False, "lines": [], "warnings": [], "reword": [], "shares": None,
            "shown": "the model's yes-rate (no random hand labels, so not corrected for the model's errors)"}
    check = out.get("attribute_check") if out.has("attribute_check", "attribute", "n", "auc") else None
    row = None
    if check is not None:
        mine = check[check["attribute"].astype(str) == attr]
        row = mine.iloc[0].to_dict() if len(mine) else None
    if row is not None:
        view["checked"] = True
        sampled = str(row.get("sampled") or "sample design not recorded")
        view["lines"].append(
            f"labels: {fmt_number(row.get('n_positive'))} yes, {fmt_number(row.get('n_negative'))} no ({sampled})")
        if bool(row.get("enough")):
            auc, lo, hi = (float(row.get(k, np.nan)) for k in ("auc", "auc_low", "auc_high"))
            view["lines"].append(f"AUC {auc:.2f} (95 % interval {lo:.2f}–{hi:.2f}; 0.5 = chance, 1 = perfect)")
            acc, chance = float(row.get("accuracy", np.nan)), float(row.get("chance_accuracy", np.nan))
            view["lines"].append(
                f"accuracy {_pct(acc)} at the threshold used; always guessing the larger class: {_pct(chance)}")
            if not bool(row.get("better_than_chance")):
                view["warnings"].append("Not shown to be better than chance: the AUC interval includes 0.5. "
                                        "Do not read differences between brands from the model's numbers.")
            if math.isfinite(acc) and math.isfinite(chance) and acc < chance:
                view["warnings"].append("Accuracy is below always guessing the larger class: the yes/no calls "
                                        "are worse than no model at all.")
            if math.isfinite(auc) and auc < 0.5:
                view["warnings"].append("The descriptions work against their own side (AUC below 0.5): reword or remove.")
            gn = row.get("grade_n")
            if gn is not None and math.isfinite(float(gn)) and float(gn) > 0:
                view["lines"].append(
                    f"graded answers (1–7, {int(gn)} images): Spearman rho {fmt_number(row.get('grade_spearman'))}, "
                    f"Harrell's C {fmt_number(row.get('grade_harrell_c'))}")
        else:
            view["warnings"].append(str(row.get("warning") or "too few labels to say anything"))
        desc = out.get("attribute_check_descriptions") if out.has(
            "attribute_check_descriptions", "attribute", "side", "description", "auc") else None
        if desc is not None:
            bad = desc[(desc["attribute"].astype(str) == attr) & (desc["auc"].astype(float) < 0.5)]
            view["reword"] = [f"{r['side']}: “{r['description']}” (AUC {float(r['auc']):.2f})" for r in bad.to_dict("records")]
    else:
        view["lines"].append("not checked against hand labels (explore label, then explore run --labels)")
    if "share" in shares:
        mine = shares[(shares["attribute"] == attr) & (shares["level"] == "brand") & shares["share"].notna()]
        if len(mine):
            method = str(mine["share_method"].iloc[0])
            view["shown"] = (f"corrected shares below ({method}, from {int(mine['labels_used'].max())} random labels "
                             "per brand); the bars above are the model's yes-rate")
            rows = []
            for r in mine.sort_values(["brand", "source"]).to_dict("records"):
                rows.append([r["brand"], r["source"], f"{100 * r['share']:.0f} %",
                             f"{100 * r['share_low']:.0f}–{100 * r['share_high']:.0f} %",
                             f"{100 * r['labels_only_low']:.0f}–{100 * r['labels_only_high']:.0f} %",
                             fmt_number(r.get("labels_used"))])
            view["shares"] = {"columns": ["brand", "source", "share", "95 % interval", "labels alone", "labels"],
                              "rows": rows}
    return view


def _split_prompts(text) -> list[str]:
    if text is None:
        return []
    if isinstance(text, (list, tuple, np.ndarray)):
        return [str(t) for t in text]
    try:
        if pd.isna(text):
            return []
    except (TypeError, ValueError):
        pass
    return [t.strip() for t in str(text).split(" | ") if t.strip()]

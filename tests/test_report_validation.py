"""Attribute cards say how each attribute was validated (issue: shares an analyst can quote)."""

from __future__ import annotations

import html
import re

import numpy as np
import pandas as pd

import report_synthetic as synth
from explore.report import write_report


def _card(text: str, name: str) -> str:
    m = re.search(rf'<article class="attr-card"[^>]*>\s*<h3>{re.escape(name)}</h3>(.*?)</article>', text, re.S)
    assert m, f"no card for {name}"
    return html.unescape(re.sub(r"<[^>]+>", " ", m.group(1)))


def test_cards_show_checks_warnings_and_which_number_is_shown(tmp_path):
    out = synth.make_output_folder(tmp_path, 60, with_contexts=False, with_compare=False)
    check = pd.DataFrame([
        dict(attribute="rugged", n=100, n_positive=30, n_negative=70, enough=True, warning="", auc=0.84,
             auc_low=0.76, auc_high=0.92, better_than_chance=True, accuracy=0.81, chance_accuracy=0.70,
             sampled="100 random within brand x source (8 strata, seed 7, sheet s1)", grade_n=0),
        dict(attribute="glamorous", n=100, n_positive=20, n_negative=80, enough=True, warning="", auc=0.42,
             auc_low=0.30, auc_high=0.55, better_than_chance=False, accuracy=0.55, chance_accuracy=0.80,
             sampled="sample design not recorded (hand-written labels)", grade_n=0),
    ])
    check.to_parquet(out / "attribute_check.parquet")
    pd.DataFrame([dict(attribute="glamorous", side="positive", description="shiny gala night", auc=0.38),
                  dict(attribute="rugged", side="positive", description="muddy boots", auc=0.80)]
                 ).to_parquet(out / "attribute_check_descriptions.parquet")
    shares = pd.read_parquet(out / "attribute_shares.parquet")
    rugged = shares["attribute"] == "rugged"
    shares["share"] = np.where(rugged, 0.25, np.nan)
    shares["share_low"], shares["share_high"] = np.where(rugged, 0.1, np.nan), np.where(rugged, 0.4, np.nan)
    shares["labels_only_low"], shares["labels_only_high"] = np.where(rugged, 0.05, np.nan), np.where(rugged, 0.5, np.nan)
    shares["share_method"] = np.where(rugged, "PPI++ (stratified, brand x source)", "")
    shares["labels_used"] = np.where(rugged, 12, 0)
    shares.to_parquet(out / "attribute_shares.parquet")

    text = write_report(out).read_text(encoding="utf-8")
    good, bad, none = _card(text, "rugged"), _card(text, "glamorous"), _card(text, "playful")
    assert "checked against hand labels" in good and "30 yes, 70 no" in good and "seed 7" in good
    assert "AUC 0.84 (95 % interval 0.76–0.92" in good
    assert "accuracy 81 %" in good and "always guessing the larger class: 70 %" in good
    assert "Shown: corrected shares below (PPI++" in good and "25 %" in good and "10–40 %" in good
    assert "not shown to be better than chance" not in good.lower()
    assert "Not shown to be better than chance" in bad
    assert "below always guessing the larger class" in bad
    assert "reword or remove" in bad.lower() and "shiny gala night" in bad and "muddy boots" not in bad
    assert "Shown: the model's yes-rate" in bad
    assert "not checked" in none and "Shown: the model's yes-rate" in none

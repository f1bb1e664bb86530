"""Findings, readable table cells and advice (explore/report/findings.py, tables.py, advice.py).

Intervals are checked against published worked examples (Newcombe 1998) and by
simulation (coverage at the stated 95 %); findings against hand-made tables
whose answer is known; reproducibility by rebuilding findings.csv from the
CSV tables of a synthetic output folder.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import report_synthetic as synth
from explore.report import write_report
from explore.report.advice import advice_lines
from explore.report.findings import findings_table, newcombe, summary_lines, wilson
from explore.report.tables import cell


def test_wilson_matches_newcombe_1998_worked_example():
    # Newcombe (1998), "Two-sided confidence intervals for the single proportion", Statistics in
    # Medicine 17:857-872, Table I: 81/263, score method: 0.2553 to 0.3662 (values from memory).
    lo, hi = wilson(81, 263)
    assert lo == pytest.approx(0.2553, abs=5e-5) and hi == pytest.approx(0.3662, abs=5e-5)


def test_newcombe_difference_matches_newcombe_1998_worked_example():
    # Newcombe (1998), "Interval estimation for the difference between independent proportions",
    # Statistics in Medicine 17:873-890, Table II example (a): 56/70 - 48/80, method 10 (hybrid
    # score): 0.0524 to 0.3339 (values from memory).
    lo, hi = newcombe(56, 70, 48, 80)
    assert lo == pytest.approx(0.0524, abs=5e-4) and hi == pytest.approx(0.3339, abs=5e-4)


def test_wilson_interval_covers_the_truth_at_about_95_percent():
    # Simulation with a known share: the interval a finding quotes must cover it ~95 % of the time.
    rng = np.random.default_rng(11)
    truth, n, draws = 0.3, 90, 2000
    counts = rng.binomial(n, truth, size=draws)
    covered = 0
    for k in counts:
        lo, hi = wilson(int(k), n)
        covered += lo <= truth <= hi
    assert 0.93 <= covered / draws <= 0.97, covered / draws


def _signature(brand="Alder", count=30, n=90, rest_count=12, rest_n=180, q=0.001, source="all", cid=2):
    return dict(brand=brand, category="drinks", source=source, context_id=cid, context="beach picnic",
                count=count, brand_n=n, share=count / n, category_share=(count + rest_count) / (n + rest_n),
                index=100 * (count / n) / ((count + rest_count) / (n + rest_n)), rest_count=rest_count,
                rest_n=rest_n, rest_share=rest_count / rest_n, p_value=q / 2, q_value=q, rank=1)


def test_signature_context_finding_carries_share_interval_and_counts():
    tables = {"signature_contexts": pd.DataFrame([_signature()])}
    f = findings_table(tables)
    assert len(f) == 1
    row = f.iloc[0]
    assert row["kind"] == "signature context"
    assert row["value"] == pytest.approx(30 / 90)
    lo, hi = wilson(30, 90)
    assert (row["value_low"], row["value_high"]) == pytest.approx((lo, hi))
    # The sentence shows the share the counts give (whole percent below 1,000 photos), and the rest's share.
    assert row["sentence"].startswith("33 % of Alder's photos show “beach picnic”")
    assert "against 7 % for the other drinks brands" in row["sentence"]
    assert (row["count"], row["n"], row["other_count"], row["other_n"]) == (30, 90, 12, 180)


def test_unexpected_context_is_marked_and_not_repeated_per_source():
    sig = pd.DataFrame([_signature(), _signature(source="consumer", count=20, n=60)])
    un = pd.DataFrame([{**_signature(), "reason": "its category is rarely here"}])
    f = findings_table({"signature_contexts": sig, "unexpected_contexts": un})
    assert list(f["kind"]) == ["unexpected context"]  # the consumer row of the same context is not repeated
    assert "its category is rarely here" in f.iloc[0]["sentence"]


def test_source_context_gap_only_when_significant():
    base = dict(brand="Alder", category="drinks", context_id=3, context="gym", consumer_count=30, consumer_n=70,
                owned_count=10, owned_n=80, gap=30 / 70 - 10 / 80, p_value=0.0001, q_value=0.001,
                direction="more in consumer photos")
    t = pd.DataFrame([{**base, "significant": True}, {**base, "context_id": 4, "significant": False}])
    f = findings_table({"source_context_gaps": t})
    assert list(f["context_id"]) == [3]
    lo, hi = newcombe(30, 70, 10, 80)
    assert f.iloc[0]["value"] == pytest.approx(30 / 70 - 10 / 80)
    assert (f.iloc[0]["value_low"], f.iloc[0]["value_high"]) == pytest.approx((lo, hi))
    assert "difference +30 points" in f.iloc[0]["sentence"]


def _gap_rows(**extra):
    row = dict(brand="Alder", category="drinks", attribute="rugged", consumer_n=60, owned_n=60,
               consumer_yes_rate=0.5, owned_yes_rate=0.2, yes_rate_gap=0.3, yes_rate_gap_low=0.13,
               yes_rate_gap_high=0.45, significant=True)
    row.update(extra)
    return pd.DataFrame([row])


def test_attribute_gap_needs_a_corrected_q_value():
    # Uncorrected "significant" alone is not enough.
    assert findings_table({"attribute_gaps": _gap_rows()}).empty
    assert findings_table({"attribute_gaps": _gap_rows(q_value=0.2)}).empty
    f = findings_table({"attribute_gaps": _gap_rows(q_value=0.01)})
    assert len(f) == 1
    assert f.iloc[0]["sentence"].startswith("The model's yes-rate for “rugged” is 30 points higher in Alder's consumer photos")
    assert f.iloc[0]["value"] == pytest.approx(0.3)


def test_attribute_gap_follows_the_study_decision_and_quotes_the_context_adjusted_gap():
    # q below the FDR but not significant after the context adjustment: not a finding.
    assert findings_table({"attribute_gaps": _gap_rows(q_value=0.01, significant=False)}).empty
    rows = _gap_rows(q_value=0.01, context_adjusted_gap=0.21, context_adjusted_low=0.05, context_adjusted_high=0.37,
                     context_q_value=0.03)
    f = findings_table({"attribute_gaps": rows})
    assert "Within the same contexts the gap is +21 points (95 % CI +5 to +37)." in f.iloc[0]["sentence"]
    assert "context-adjusted (Cochran-Mantel-Haenszel) BH q 0.030" in f.iloc[0]["test"]


def test_attribute_gap_uses_the_corrected_share_where_labels_exist():
    rows = _gap_rows(q_value=0.01, consumer_share=0.4, owned_share=0.1, gap=-0.3 + 0.6, gap_low=0.1, gap_high=0.5)
    f = findings_table({"attribute_gaps": rows})
    assert f.iloc[0]["sentence"].startswith("The corrected share (from hand labels)")
    assert f.iloc[0]["estimand"] == "consumer minus owned corrected share (from hand labels)"
    assert f.iloc[0]["value"] == pytest.approx(0.3)


def test_at_most_seven_per_brand_kinds_take_turns():
    sig = pd.DataFrame([_signature(cid=c, count=30 + c) for c in range(1, 10)])
    gaps = _gap_rows(q_value=0.01)
    f = findings_table({"signature_contexts": sig, "attribute_gaps": gaps})
    assert len(f) == 7 and list(f["rank"]) == list(range(1, 8))
    assert f.iloc[0]["kind"] == "signature context" and f.iloc[1]["kind"] == "attribute gap"
    assert summary_lines(f)[0] == "Alder:"


def test_findings_csv_is_reproduced_from_the_csv_tables(tmp_path):
    out = synth.make_output_folder(tmp_path, 200, seed=3)
    write_report(out)
    written = pd.read_csv(out / "findings.csv")
    tables = {name: pd.read_csv(out / f"{name}.csv") for name in
              ("signature_contexts", "unexpected_contexts", "source_context_gaps", "attribute_gaps", "contexts")
              if (out / f"{name}.csv").is_file()}
    again = findings_table(tables)
    assert len(written) > 0
    again.to_csv(tmp_path / "again.csv", index=False)  # the same CSV writing, so empty texts read alike
    pd.testing.assert_frame_equal(written, pd.read_csv(tmp_path / "again.csv"))


def test_cells_are_rounded_to_what_the_data_supports():
    assert cell("q_value", 6.53e-06) == "< 0.001"
    assert cell("p_value", 0.0123) == "0.012"
    assert cell("share", 0.23456, n=90) == "23"
    assert cell("share", 0.23456, n=5000) == "23.5"
    assert cell("index", 213.157) == "213"
    assert cell("gap", -0.051, n=90) == "\u22125"
    assert cell("brand_n", 12000.0) == "12,000"
    assert cell("share", float("nan")) == "–"


def test_advice_when_results_are_thin():
    images = pd.DataFrame({"image_id": [f"i{k}" for k in range(50)], "status": "ok",
                           "brand": ["Alder"] * 40 + ["Brook"] * 10, "source": ["consumer"] * 20 + ["owned"] * 20 + ["consumer"] * 10})
    contexts = pd.DataFrame({"context_id": [-1], "context": ["unassigned"], "size": [50], "setting_min_cluster_size": [15]})
    lines = advice_lines({"images": images, "contexts": contexts}, {"settings": {"attributes": []}})
    text = " ".join(lines)
    assert "No attributes were scored" in text
    assert "No contexts were found among 50 photos" in text and "at least 15 similar photos" in text
    assert "100 % of photos fit no context" in text
    assert "Alder has only 20 consumer photos" in text and "Brook has only 10 consumer photos" in text
    assert "Brook has no owned photos" in text
    # Enough photos and contexts: nothing to say about them.
    images = pd.DataFrame({"image_id": [f"i{k}" for k in range(80)], "status": "ok", "brand": "Alder",
                           "source": ["consumer"] * 40 + ["owned"] * 40})
    contexts = pd.DataFrame({"context_id": [1, 2, -1], "size": [40, 35, 5]})
    defs = pd.DataFrame({"attribute": ["rugged"]})
    assert advice_lines({"images": images, "contexts": contexts, "attribute_definitions": defs}) == []


def test_attribute_gap_quotes_the_corrected_share_gap_written_by_the_attributes_stage():
    # attribute_gaps carries the hand-label corrected gap as share_gap*; the tested number stays the yes-rate gap.
    rows = _gap_rows(q_value=0.01, share_gap=0.18, share_gap_low=0.02, share_gap_high=0.34)
    f = findings_table({"attribute_gaps": rows})
    assert f.iloc[0]["sentence"].startswith("The model's yes-rate for “rugged”")
    assert ("Corrected with the random hand labels, the gap in the share of photos showing it is +18 points "
            "(95 % CI +2 to +34).") in f.iloc[0]["sentence"]
    assert "Corrected" not in findings_table({"attribute_gaps": _gap_rows(q_value=0.01)}).iloc[0]["sentence"]

"""Context-adjusted gaps: Mantel-Haenszel over contexts, Kitagawa decomposition (explore/attributes/context_adjust.py)."""

import numpy as np
import pandas as pd
import pytest

from explore.attributes.context_adjust import adjust_gaps_for_context, kitagawa, mantel_haenszel


def _strata_for_statsmodels(x1, n1, x2, n2):
    # statsmodels StratifiedTable wants 2 x 2 x K: rows group 1 / 2, columns yes / no.
    return np.array([[x1, np.subtract(n1, x1)], [x2, np.subtract(n2, x2)]], dtype=float)


def test_mantel_haenszel_against_published_china_smoking_example():
    # Published worked example: lung cancer and smoking in eight Chinese cities
    # (Liu 1992, as analysed in Agresti, Categorical Data Analysis, 2nd ed., sec. 6.3):
    # Mantel-Haenszel odds ratio 2.17 and CMH statistic 280.1 (values from memory);
    # the data ship with statsmodels (datasets.china_smoking).
    import statsmodels.api as sm
    from statsmodels.stats.contingency_tables import StratifiedTable

    d = sm.datasets.china_smoking.load_pandas().data.to_numpy()
    x1, n1 = d[:, 0], d[:, 0] + d[:, 1]
    x2, n2 = d[:, 2], d[:, 2] + d[:, 3]
    mh = mantel_haenszel(x1, n1, x2, n2)
    assert mh["odds_ratio"] == pytest.approx(2.17, abs=0.005)
    assert mh["chi2"] == pytest.approx(280.1, abs=0.1)
    st = StratifiedTable(_strata_for_statsmodels(x1, n1, x2, n2))  # reference library
    assert mh["odds_ratio"] == pytest.approx(st.oddsratio_pooled, rel=1e-10)
    assert mh["chi2"] == pytest.approx(st.test_null_odds(correction=False).statistic, rel=1e-10)


def test_mantel_haenszel_matches_statsmodels_on_small_tables():
    # Reference: statsmodels StratifiedTable (pooled odds ratio, CMH test without correction).
    from statsmodels.stats.contingency_tables import StratifiedTable

    rng = np.random.default_rng(8)
    for _ in range(5):
        n1 = rng.integers(3, 30, 6)
        n2 = rng.integers(3, 30, 6)
        x1 = rng.binomial(n1, 0.4)
        x2 = rng.binomial(n2, 0.3)
        mh = mantel_haenszel(x1, n1, x2, n2)
        st = StratifiedTable(_strata_for_statsmodels(x1, n1, x2, n2))
        assert mh["odds_ratio"] == pytest.approx(st.oddsratio_pooled, rel=1e-9)
        assert mh["p_value"] == pytest.approx(st.test_null_odds(correction=False).pvalue, rel=1e-9)


def test_single_stratum_risk_difference_is_the_plain_difference():
    # Independent computation: with one stratum the MH risk difference is p1 - p2
    # and its Wald interval the textbook one.
    mh = mantel_haenszel([12], [40], [6], [30])
    d = 12 / 40 - 6 / 30
    se = np.sqrt(0.3 * 0.7 / 40 + 0.2 * 0.8 / 30)
    assert mh["risk_difference"] == pytest.approx(d)
    assert mh["low"] == pytest.approx(d - 1.959963984540054 * se)


def test_mh_interval_covers_the_common_difference_in_simulation():
    # Known truth: 5 contexts with different base rates, a common consumer-minus-owned
    # difference of 0.10 and different context mixes per source.
    rng = np.random.default_rng(12)
    base = np.array([0.2, 0.3, 0.5, 0.6, 0.4])
    covered, reps = 0, 300
    for _ in range(reps):
        n1 = rng.multinomial(150, [0.4, 0.3, 0.1, 0.1, 0.1])
        n2 = rng.multinomial(150, [0.1, 0.1, 0.3, 0.3, 0.2])
        x1 = rng.binomial(n1, base + 0.10)
        x2 = rng.binomial(n2, base)
        mh = mantel_haenszel(x1, n1, x2, n2)
        covered += mh["low"] <= 0.10 <= mh["high"]
    assert covered / reps >= 0.92


def test_kitagawa_parts_add_up_and_separate_mix_from_portrayal():
    # Exact additivity (Kitagawa 1955): mix + within = raw difference of rates.
    x1, n1 = np.array([30, 5, 0]), np.array([40, 40, 0])
    x2, n2 = np.array([15, 10, 3]), np.array([20, 80, 10])
    mix, within = kitagawa(x1, n1, x2, n2)
    assert mix + within == pytest.approx(x1.sum() / n1.sum() - x2.sum() / n2.sum())
    # Pure mix: same rates per context, different context shares -> within = 0.
    mix, within = kitagawa([36, 12], [48, 48], [9, 36], [12, 144])
    assert within == pytest.approx(0.0) and mix > 0.2
    # Pure portrayal: same mix, higher rates everywhere -> mix = 0.
    mix, within = kitagawa([30, 20], [50, 50], [20, 10], [50, 50])
    assert mix == pytest.approx(0.0) and within == pytest.approx(0.2)


def _mix_study(seed=0):
    """A context-mix artefact (the issue's gym/camp case) and a real portrayal gap."""
    rng = np.random.default_rng(seed)
    rows, calls, ctx = [], [], []
    k = 0
    for brand, consumer_gym, lift in (("Mixa", 0.1, 0.0), ("Realo", 0.5, 0.25)):
        for source, gym_share in (("consumer", consumer_gym), ("owned", 0.9 if brand == "Mixa" else 0.5)):
            for j in range(200):
                gym = rng.random() < gym_share
                rate = (0.74 if gym else 0.24) + (lift if source == "consumer" else 0.0)
                image_id = f"i{k}"
                k += 1
                rows.append((image_id, brand, "c", source))
                calls.append((image_id, "competent", rng.random() < rate))
                ctx.append((image_id, 1 if gym else 2))
    images = pd.DataFrame(rows, columns=["image_id", "brand", "category", "source"])
    image_attributes = pd.DataFrame(calls, columns=["image_id", "attribute", "positive"])
    image_attributes["probability"] = image_attributes["positive"].astype(float)
    image_contexts = pd.DataFrame(ctx, columns=["image_id", "context_id"])
    return images, image_attributes, image_contexts


def test_adjustment_drops_a_context_mix_artefact_and_keeps_a_real_gap():
    from explore.attributes.shares import attribute_gaps, attribute_shares

    images, image_attributes, image_contexts = _mix_study()
    definitions = pd.DataFrame({"attribute": ["competent"], "threshold": [0.5], "encoder_id": ["t"]})
    shares = attribute_shares(image_attributes, images, definitions, bootstrap_samples=0)
    gaps = attribute_gaps(shares)
    assert gaps["significant"].all()  # both raw gaps survive BH
    adjusted = adjust_gaps_for_context(gaps, image_attributes, images, image_contexts, shares)
    mixa = adjusted[adjusted["brand"] == "Mixa"].iloc[0]
    realo = adjusted[adjusted["brand"] == "Realo"].iloc[0]
    assert mixa["yes_rate_gap"] < -0.3 and abs(mixa["context_adjusted_gap"]) < 0.1
    assert mixa["context_mix_part"] < -0.3 and abs(mixa["within_context_part"]) < 0.1
    assert mixa["significant_before_context"] and not mixa["significant"]
    assert realo["significant"] and realo["context_adjusted_gap"] == pytest.approx(0.25, abs=0.1)
    for _, row in adjusted.iterrows():
        assert row["context_mix_part"] + row["within_context_part"] == pytest.approx(row["yes_rate_gap"])
    assert set(adjusted["contexts_used"]) == {2}


def test_demo_flags_only_gaps_surviving_bh_and_context_adjustment(demo_run):
    # End-to-end on the demo (an example, not a calibration): the flag is the
    # conjunction the report promises, the decomposition adds up, and the run
    # notes and report say that photos are assumed independent (no poster ids).
    import json

    from statsmodels.stats.multitest import multipletests

    gaps = pd.read_parquet(demo_run / "attribute_gaps.parquet")
    tested = gaps["p_value"].notna()
    assert tested.sum() == 36 and gaps["family"].str.contains("36 tests").all()
    # Reference: statsmodels multipletests(fdr_bh) over the same family.
    np.testing.assert_allclose(gaps.loc[tested, "q_value"], multipletests(gaps.loc[tested, "p_value"], method="fdr_bh")[1])
    expected = (gaps["q_value"] <= 0.05) & (gaps["context_q_value"] <= 0.05) & (
        np.sign(gaps["context_adjusted_gap"]) == np.sign(gaps["yes_rate_gap"]))
    assert (gaps["significant"] == expected).all()
    assert (gaps["significant_before_context"] == (gaps["q_value"] <= 0.05)).all()
    np.testing.assert_allclose(gaps["context_mix_part"] + gaps["within_context_part"], gaps["yes_rate_gap"], atol=1e-12)
    assert (gaps["consumer_effective_n"] == gaps["consumer_n"]).all()  # no posters: effective n = n
    notes = json.loads((demo_run / "run.json").read_text())["notes"]
    assert any("photos are assumed independent" in n for n in notes)
    report = (demo_run / "report.html").read_text(encoding="utf-8")
    assert "photos are assumed independent" in report and "Benjamini-Hochberg over the family" in report

"""Tests of explore/compare.py: survey input, agreement, brand maps, summary.

Every numeric check names its outside reference beside it. Fixtures are small
synthetic tables built here; the demo-scenario tests at the end use the
session fixture ``demo_run`` from conftest.py.
"""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.spatial import procrustes as scipy_procrustes
from scipy.spatial.distance import cdist, pdist
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

from explore import compare

BRANDS = {"Alba": "drinks", "Brio": "drinks", "Cora": "drinks", "Dune": "gear", "Echo": "gear", "Fjel": "gear"}
ATTRIBUTES = ["rugged", "glamorous", "sincere", "exciting", "competent"]


def make_shares(consumer: dict, owned: dict | None = None) -> pd.DataFrame:
    """An ``attribute_shares`` table (contract columns in DEVELOPERS.md) from
    {brand: {attribute: share}} dictionaries."""
    owned = owned if owned is not None else consumer
    rows = []
    for source, values in (("consumer", consumer), ("owned", owned)):
        for brand, per in values.items():
            for attribute, share in per.items():
                rows.append(
                    {
                        "level": "brand", "brand": brand, "category": BRANDS.get(brand, "other"),
                        "source": source, "attribute": attribute, "n": 40,
                        "positives": round(share * 40), "yes_rate": share,
                        "yes_rate_low": max(0.0, share - 0.1), "yes_rate_high": min(1.0, share + 0.1),
                        "mean_probability": share, "mean_low": share, "mean_high": share,
                        "threshold": 0.5, "encoder_id": "test",
                    }
                )
    table = pd.DataFrame(rows)
    # category-level rows exist in the real table and must be ignored here
    cat = table.groupby(["category", "source", "attribute"], as_index=False)["yes_rate"].mean()
    cat["level"], cat["brand"], cat["n"] = "category", "", 120
    return pd.concat([table, cat], ignore_index=True)


def random_profiles(seed: int) -> dict:
    rng = np.random.default_rng(seed)
    return {b: {a: float(rng.uniform(0.05, 0.95)) for a in ATTRIBUTES} for b in BRANDS}


def write_survey(path, rows, header="brand,attribute,score") -> None:
    path.write_text(header + "\n" + "\n".join(rows) + "\n", encoding="utf-8")


# --------------------------------------------------------------------------
# Agreement statistics


@pytest.mark.parametrize("n", [3, 5, 8, 13])
def test_concordant_share_is_half_one_plus_tau_without_ties(n):
    rng = np.random.default_rng(n)
    x = rng.permutation(n).astype(float) + rng.uniform(0, 0.1, n)
    y = x + rng.normal(0, n / 3, n)
    assert len(set(x)) == n and len(set(y)) == n  # tie-free, so tau-a == tau-b
    counts = compare.pair_counts(x, y)
    assert counts["ties"] == 0
    # Kendall 1938: tau-a = (C - D) / P; with no ties concordant share = (1 + tau-a) / 2.
    # tau computed with scipy.stats.kendalltau(variant="b"), equal to tau-a on tie-free data.
    tau = stats.kendalltau(x, y, variant="b").statistic
    assert counts["concordant_share"] == pytest.approx((1 + tau) / 2, abs=1e-12)


@pytest.mark.parametrize("seed, with_ties", [(1, False), (2, True), (3, True), (4, False)])
def test_coefficients_match_textbook_formulas(seed, with_ties):
    rng = np.random.default_rng(seed)
    n = 9
    x = rng.normal(size=n)
    y = 0.6 * x + rng.normal(size=n)
    if with_ties:
        x = np.round(x)  # several brands share a value
        y = np.round(y * 2) / 2
    x[4] = np.nan  # a brand without this metric is left out of the pair
    got = compare.pair_agreement(x, y)
    keep = ~np.isnan(x)
    xs, ys = x[keep], y[keep]
    m = len(xs)
    # independent computations: Pearson's r as numpy.corrcoef; Spearman's rho
    # as Pearson's r of average ranks (Spearman 1904; with no ties the same as
    # 1 - 6 sum d^2 / (n (n^2 - 1))); Kendall's tau-b by brute force over pairs
    # (Kendall 1945: (C - D) / sqrt((P - Tx)(P - Ty))).
    rx, ry = stats.rankdata(xs), stats.rankdata(ys)
    assert got["n_brands"] == m
    assert got["pearson_r"] == pytest.approx(np.corrcoef(xs, ys)[0, 1], abs=1e-12)
    assert got["spearman_rho"] == pytest.approx(np.corrcoef(rx, ry)[0, 1], abs=1e-12)
    if not with_ties:
        d2 = float(np.sum((rx - ry) ** 2))
        assert got["spearman_rho"] == pytest.approx(1 - 6 * d2 / (m * (m * m - 1)), abs=1e-12)
    c = d = tx = ty = 0
    for i in range(m):
        for j in range(i + 1, m):
            sx, sy = np.sign(xs[i] - xs[j]), np.sign(ys[i] - ys[j])
            c += sx * sy > 0
            d += sx * sy < 0
            tx += sx == 0
            ty += sy == 0
    pairs = m * (m - 1) // 2
    assert got["kendall_tau"] == pytest.approx((c - d) / np.sqrt((pairs - tx) * (pairs - ty)), abs=1e-12)
    assert got["concordant"] + got["discordant"] + got["ties"] == got["pairs"] == pairs
    assert got["p_method"].startswith("exact permutation")
    if with_ties:
        assert got["ties"] > 0 and "tied" in got["note"]


def test_exact_p_three_brands_can_never_go_below_one_third():
    # Full enumeration by hand: 3 brands have 3! = 6 orderings; a perfect
    # agreement ties with its reverse (|rho| = |tau| = |r| = 1), so the smallest
    # two-sided exact p is 2/6 = 1/3 whatever the data (the example:
    # the report printed "Spearman rho 1 (p 0)").
    got = compare.exact_permutation_pvalues([0.1, 0.2, 0.3], [3.0, 4.0, 5.0])
    assert got == pytest.approx({"kendall": 1 / 3, "spearman": 1 / 3, "pearson": 1 / 3}, abs=1e-15)
    # the table gives no p-value below 5 brands (counts only)
    row = compare.pair_agreement([0.1, 0.2, 0.3], [3.0, 4.0, 5.0])
    assert np.isnan(row["spearman_p"]) and np.isnan(row["spearman_rho"]) and row["concordant"] == 3
    assert row["note"].startswith("counts only")


def test_exact_spearman_p_five_brands_worked_by_hand():
    # n = 5, one adjacent swap: sum d^2 = 2, rho = 1 - 6 * 2 / 120 = 0.9. By hand:
    # rho >= 0.9 for the identity and the 4 adjacent swaps, rho <= -0.9 for
    # their reverses, so the two-sided exact p = 10 / 120 (consistent with
    # Zar 1972, JASA 67:578, table of critical values: n = 5, two-sided
    # alpha 0.10 -> 0.900; from memory).
    got = compare.pair_agreement([1, 2, 3, 4, 5], [2, 1, 3, 4, 5])
    assert got["spearman_rho"] == pytest.approx(0.9)
    assert got["spearman_p"] == pytest.approx(10 / 120, abs=1e-15)


@pytest.mark.parametrize("n, ties", [(5, False), (6, True), (6, False)])
def test_exact_p_matches_scipy_permutation_test(n, ties):
    # Reference: scipy.stats.permutation_test(permutation_type="pairings",
    # n_resamples=inf) enumerates every ordering of x against y; with the
    # statistic |stat| and alternative "greater" it is the two-sided p that
    # counts orderings at least as far from 0 (our definition).
    rng = np.random.default_rng(n)
    x = rng.normal(size=n)
    y = 0.5 * x + rng.normal(size=n)
    if ties:
        x, y = np.round(x), np.round(2 * y) / 2
    got = compare.exact_permutation_pvalues(x, y)

    def ref(fn):
        res = stats.permutation_test((x,), lambda xp: abs(fn(xp, y)), permutation_type="pairings",
                                     n_resamples=np.inf, alternative="greater")
        return res.pvalue

    assert got["pearson"] == pytest.approx(ref(lambda a, b: np.corrcoef(a, b)[0, 1]), abs=1e-12)
    assert got["spearman"] == pytest.approx(ref(lambda a, b: stats.spearmanr(a, b).statistic), abs=1e-12)
    assert got["kendall"] == pytest.approx(ref(lambda a, b: stats.kendalltau(a, b).statistic), abs=1e-12)
    if not ties:
        # and Kendall's (1938) exact null distribution as scipy computes it
        assert got["kendall"] == pytest.approx(stats.kendalltau(x, y, method="exact").pvalue, abs=1e-12)


def test_large_sample_p_above_ten_brands_matches_textbook_formulas():
    rng = np.random.default_rng(12)
    n = 14
    x = rng.normal(size=n)
    y = 0.4 * x + rng.normal(size=n)
    got = compare.pair_agreement(x, y)
    assert got["p_method"] == "large-sample (scipy)"
    # Pearson: t = r sqrt((n - 2) / (1 - r^2)) on n - 2 df (Student; Fisher 1915)
    r = got["pearson_r"]
    t = r * np.sqrt((n - 2) / (1 - r * r))
    assert got["pearson_p"] == pytest.approx(2 * stats.t.sf(abs(t), n - 2), rel=1e-9)
    # Kendall, no ties, 40 brands (scipy's "auto" is exact up to 33): z = 3 S /
    # sqrt(n (n - 1) (2n + 5) / 2) (Kendall 1938), normal tail
    n = 40
    x = rng.normal(size=n)
    got = compare.pair_agreement(x, 0.3 * x + rng.normal(size=n))
    s = got["concordant"] - got["discordant"]
    z = 3 * s / np.sqrt(n * (n - 1) * (2 * n + 5) / 2)
    assert got["kendall_p"] == pytest.approx(2 * stats.norm.sf(abs(z)), rel=1e-9)


def test_pearson_interval_matches_scipy_fisher_z():
    # Reference: scipy.stats.pearsonr(...).confidence_interval() (Fisher z, 95 %).
    rng = np.random.default_rng(8)
    x = rng.normal(size=9)
    y = 0.5 * x + rng.normal(size=9)
    got = compare.pair_agreement(x, y)
    ci = stats.pearsonr(x, y).confidence_interval(0.95)
    assert (got["pearson_low"], got["pearson_high"]) == pytest.approx((ci.low, ci.high), abs=1e-12)


def test_rank_correlation_intervals_cover_the_truth_at_the_stated_rate():
    # Simulation with known truth: bivariate normal with correlation 0.5, whose
    # population Kendall tau = (2 / pi) asin(0.5) and Spearman rho =
    # (6 / pi) asin(0.25) (Greiner 1909; Pearson 1907). The Fieller, Hartley
    # and Pearson (1957) intervals are known to cover close to 95 % for
    # moderate n (Bonett and Wright 2000); 400 replications of 10 brands.
    rng = np.random.default_rng(2026)
    tau_true, rho_true = 2 / np.pi * np.arcsin(0.5), 6 / np.pi * np.arcsin(0.25)
    n, reps = 10, 400
    cover = {"kendall": 0, "spearman": 0}
    for _ in range(reps):
        x = rng.normal(size=n)
        y = 0.5 * x + np.sqrt(0.75) * rng.normal(size=n)
        tau, rho = stats.kendalltau(x, y).statistic, stats.spearmanr(x, y).statistic
        lo, hi = compare.fisher_z_interval(tau, np.sqrt(0.437 / (n - 4)))
        cover["kendall"] += lo <= tau_true <= hi
        lo, hi = compare.fisher_z_interval(rho, np.sqrt(1.06 / (n - 3)))
        cover["spearman"] += lo <= rho_true <= hi
    print({k: v / reps for k, v in cover.items()})
    # about +-2.3 binomial standard errors around 0.95 at 400 replications
    assert all(0.925 <= v / reps <= 0.975 for v in cover.values())
    # and the table uses those same standard errors
    x = rng.normal(size=n)
    y = x + rng.normal(size=n)
    got = compare.pair_agreement(x, y)
    assert (got["kendall_low"], got["kendall_high"]) == pytest.approx(
        compare.fisher_z_interval(got["kendall_tau"], np.sqrt(0.437 / (n - 4))))


def test_agreement_family_is_corrected_by_benjamini_hochberg():
    # Reference: statsmodels.stats.multitest.multipletests(method="fdr_bh") over
    # the rows with a p-value (the family); "significant" only after correction.
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(4)
    brands = [f"B{k}" for k in range(7)]
    x = np.arange(7.0)
    rows = []
    for k, attribute in enumerate([f"a{k}" for k in range(12)]):
        if k < 2:
            owned = x  # perfect agreement: exact p = 2 / 7!
        elif k == 2:
            owned = np.array([1, 0, 3, 2, 5, 4, 6.0])  # three swaps: Kendall exact p = 0.030 (p < 0.05, q > 0.05)
        else:
            owned = rng.permutation(7).astype(float)  # noise
        for b, c, o in zip(brands, x, owned):
            rows.append({"category": "c", "brand": b, "attribute": attribute,
                         "consumer_share": c, "owned_share": o, "survey_score": np.nan})
    metrics = pd.DataFrame(rows)
    table = compare.agreement_table(metrics)
    tested = table["kendall_p"].notna()
    assert tested.all() and len(table) == 12
    for name in ("kendall", "spearman", "pearson"):
        ref = multipletests(table[f"{name}_p"], method="fdr_bh")[1]
        np.testing.assert_allclose(table[f"{name}_q"], ref, rtol=1e-12)
    assert (table["significant"] == (table["kendall_q"] <= 0.05)).all()
    assert table["family"].str.contains("m = 12").all()
    # a row significant before correction but not after exists, and is not flagged
    raw_only = (table["kendall_p"] <= 0.05) & (table["kendall_q"] > 0.05)
    assert raw_only.any() and (~table.loc[raw_only, "significant"]).all()
    assert table.loc[table["attribute"].isin(["a0", "a1"]), "significant"].all()


def test_pair_counts_by_hand():
    # worked by hand: x = 1,2,3,4; y = 1,3,2,3 -> pairs (12)+ (13)+ (14)+ (23)- (24)tie-y (34)+
    got = compare.pair_counts([1, 2, 3, 4], [1, 3, 2, 3])
    assert (got["concordant"], got["discordant"], got["ties"], got["ties_b"]) == (4, 1, 1, 1)
    assert got["concordant_share"] == pytest.approx(4 / 6)


def test_too_few_brands_gives_counts_and_a_note():
    got = compare.pair_agreement([0.2, 0.5], [3.0, 4.0])
    assert got["n_brands"] == 2 and got["pairs"] == 1 and got["concordant"] == 1
    assert np.isnan(got["kendall_tau"]) and np.isnan(got["pearson_p"])
    assert got["note"].startswith("counts only")

    # through the table: a category with two brands
    consumer = {b: p for b, p in random_profiles(5).items() if b in ("Alba", "Brio", "Dune", "Echo", "Fjel")}
    tables, notes = compare.compare_study(make_shares(consumer))
    rows = tables["agreement"]
    drinks = rows[rows["category"] == "drinks"]
    assert (drinks["n_brands"] == 2).all() and drinks["kendall_tau"].isna().all()
    assert drinks["note"].str.startswith("counts only").all()
    # 3 brands: counts only as well (no p-value below 5 brands); 5 pooled: tested
    gear = rows[rows["category"] == "gear"]
    assert (gear["n_brands"] == 3).all() and gear["kendall_p"].isna().all() and gear["concordant"].notna().all()
    pooled = rows[rows["category"] == compare.ALL_CATEGORIES]
    assert (pooled["n_brands"] == 5).all() and pooled["kendall_p"].notna().all()
    assert any("counts only" in n and "drinks" in n and "gear" in n for n in notes)


def test_constant_metric_is_explained_not_computed():
    got = compare.pair_agreement([0.0, 0.0, 0.0, 0.0, 0.0], [1.0, 2.0, 3.0, 4.0, 5.0])
    assert np.isnan(got["spearman_rho"]) and "same for every brand" in got["note"]


def test_agreement_table_covers_categories_attributes_and_metric_pairs(tmp_path):
    consumer = random_profiles(7)
    survey_path = tmp_path / "survey.csv"
    write_survey(survey_path, [f"{b},{a},{v * 7:.3f}" for b, per in consumer.items() for a, v in per.items()])
    tables, _ = compare.compare_study(make_shares(consumer, random_profiles(8)), survey=compare.read_survey(survey_path))
    agreement = tables["agreement"]
    assert set(agreement["category"]) == {"drinks", "gear", compare.ALL_CATEGORIES}
    pairs = set(zip(agreement["metric_a"], agreement["metric_b"]))
    assert pairs == {("consumer_share", "owned_share"), ("consumer_share", "survey_score"), ("owned_share", "survey_score")}
    assert len(agreement) == 3 * len(ATTRIBUTES) * 3
    # survey built as 7 x consumer share: a perfect linear and rank agreement
    cs = agreement[(agreement["metric_a"] == "consumer_share") & (agreement["metric_b"] == "survey_score")]
    assert (cs["concordant_share"] == 1.0).all()
    # 3 brands per category: counts only; the 6 pooled brands get correlations and an exact p
    pooled = cs["category"] == compare.ALL_CATEGORIES
    assert cs.loc[~pooled, "pearson_r"].isna().all()
    assert np.allclose(cs.loc[pooled, "pearson_r"], 1.0, atol=1e-6)
    # perfect agreement of 6 brands: exact p = 2 / 6! (itself and its reverse), by enumeration
    assert np.allclose(cs.loc[pooled, "spearman_p"], 2 / 720, rtol=1e-12)


def test_rank_gaps_by_hand():
    metrics = pd.DataFrame(
        {
            "category": ["c"] * 3,
            "brand": ["A", "B", "C"],
            "attribute": ["x"] * 3,
            "consumer_share": [0.9, 0.5, 0.1],  # ranks 1, 2, 3
            "owned_share": [0.9, 0.5, 0.1],
            "survey_score": [1.0, 2.0, 3.0],  # ranks 3, 2, 1
        }
    )
    gaps = compare.rank_gaps(metrics, "survey_score").set_index("brand")["rank_gap"]
    assert gaps.to_dict() == {"A": 2.0, "B": 0.0, "C": 2.0}


# --------------------------------------------------------------------------
# Survey input


def test_unknown_survey_brands_and_attributes_are_reported_by_name(tmp_path):
    consumer = random_profiles(11)
    rows = [f"{b},{a},{v * 5:.2f},{BRANDS[b]}" for b, per in consumer.items() for a, v in per.items()]
    rows += ["Albba,rugged,3.0,drinks", "Nova,rugged,2.0,gear", "Alba,rugedness,4.0,drinks", "Echo,rugged2,1,drinks"]
    rows.remove(next(r for r in rows if r.startswith("Echo,rugged,")))
    rows.append("Echo,rugged,2.5,drinks")  # category disagrees with the study
    path = tmp_path / "survey.csv"
    write_survey(path, rows, header="brand,attribute,score,category")
    tables, notes = compare.compare_study(make_shares(consumer), survey=compare.read_survey(path))
    survey = tables["survey"].set_index(["brand", "attribute"])
    assert survey.loc[("Albba", "rugged"), "status"] == "unknown brand"
    assert "did you mean 'Alba'?" in survey.loc[("Albba", "rugged"), "note"]
    assert survey.loc[("Nova", "rugged"), "status"] == "unknown brand"
    assert survey.loc[("Alba", "rugedness"), "status"] == "unknown attribute"
    assert "category" in survey.loc[("Echo", "rugged"), "note"]
    assert len(tables["survey"]) == len(rows)  # nothing dropped
    text = "\n".join(notes)
    assert "'Albba' (did you mean 'Alba'?)" in text and "'Nova'" in text
    assert "'rugedness'" in text and "'rugged2'" in text
    assert "category differs from the study for Echo" in text
    assert f"survey: {len(consumer) * len(ATTRIBUTES)} of {len(rows)} rows used" in text


@pytest.mark.parametrize(
    "header, row, message",
    [
        ("brand,attribute", "Alba,rugged", "missing column(s) score"),
        ("brand,attribute,score", "Alba,rugged,high", "row 2: column 'score' is 'high'"),
        ("brand,attribute,score", "Alba,rugged,", "row 2: column 'score' is empty"),
        ("brand,attribute,score", ",rugged,3", "row 2: column 'brand' is empty"),
        ("brand,attribute,score,sample_size", "Alba,rugged,3,-4", "column 'sample_size'"),
        ("brand,attribute,score", "Alba,rugged,3\nAlba,rugged,4", "row 3: brand 'Alba', attribute 'rugged' already scored in row 2"),
    ],
)
def test_bad_survey_files_are_refused_with_file_and_row(tmp_path, header, row, message):
    path = tmp_path / "s.csv"
    write_survey(path, [row], header=header)
    with pytest.raises(compare.SurveyError) as err:
        compare.read_survey(path)
    assert message in str(err.value) and str(path) in str(err.value)


def test_a_bad_survey_stops_a_run_before_any_image_is_read(tmp_path, capsys):
    from explore.cli import main
    from explore.study import StudyError

    (tmp_path / "images").mkdir()
    write_survey(tmp_path / "survey.csv", ["Alba,rugged,very"])
    study = tmp_path / "study.toml"
    study.write_text('output = "out"\n[images]\nroot = "images"\n[survey]\nfile = "survey.csv"\n', encoding="utf-8")
    assert issubclass(compare.SurveyError, StudyError)
    assert main(["--quiet", "run", str(study)]) == 2
    err = capsys.readouterr().err
    assert "survey.csv: row 2: column 'score' is 'very'" in err
    assert not (tmp_path / "out" / "images.csv").exists()  # collect never ran


def test_study_without_survey_still_compares_sources():
    tables, notes = compare.compare_study(make_shares(random_profiles(3), random_profiles(4)))
    assert tables["survey"].empty
    assert set(tables["agreement"]["metric_b"]) == {"owned_share"}
    assert set(tables["brand_map"]["source"]) == {"consumer", "owned"}
    assert tables["brand_displacement"]["displacement"].notna().all()
    assert tables["brand_displacement"]["survey_rank_gap"].isna().all()
    assert any("none in the study" in n for n in notes)


def test_two_brands_get_notes_not_a_crash():
    # Fewer than 3 brands: no brand map can be drawn, so positions and
    # displacements are missing (NaN), and the notes say why.
    profiles = random_profiles(5)
    two = {b: profiles[b] for b in ("Alba", "Brio")}
    tables, notes = compare.compare_study(make_shares(two, two))
    assert tables["brand_map"].empty
    displacement = tables["brand_displacement"]
    assert sorted(displacement["brand"]) == ["Alba", "Brio"]
    assert displacement["displacement"].isna().all()
    assert any("too few brands" in n for n in notes)


# --------------------------------------------------------------------------
# PCA, MDS, Procrustes against references


@pytest.mark.parametrize("shape", [(6, 5), (12, 4), (5, 9)])
def test_pca_matches_sklearn_up_to_sign(shape):
    rng = np.random.default_rng(shape[0] * 10 + shape[1])
    x = rng.normal(size=shape) * rng.uniform(0.5, 3, shape[1]) + rng.uniform(-2, 2, shape[1])
    z, varies = compare.standardise(x)
    assert varies.all()
    # reference: sklearn.preprocessing.StandardScaler (population sd)
    assert np.allclose(z, StandardScaler().fit_transform(x), atol=1e-10)
    ours = compare.pca(z, 2)
    # reference: sklearn.decomposition.PCA
    ref = PCA(n_components=2, svd_solver="full").fit(z)
    ref_scores = ref.transform(z)
    for c in range(2):
        sign = np.sign(ours["scores"][:, c] @ ref_scores[:, c])
        assert np.allclose(ours["scores"][:, c], sign * ref_scores[:, c], atol=1e-9)
        assert np.allclose(ours["components"][c], sign * ref.components_[c], atol=1e-9)
    assert np.allclose(ours["explained_variance"], ref.explained_variance_, atol=1e-10)
    assert np.allclose(ours["explained_variance_ratio"], ref.explained_variance_ratio_, atol=1e-10)


def test_biplot_loadings_are_attribute_component_correlations():
    consumer = random_profiles(21)
    brand_map, loadings, _ = compare.brand_maps(compare.brand_metrics(make_shares(consumer)))
    cmap = brand_map[brand_map["source"] == "consumer"].set_index("brand")
    profile = pd.DataFrame(consumer).T.loc[cmap.index]
    for rec in loadings[loadings["source"] == "consumer"].itertuples():
        # Gabriel 1971: in the correlation biplot of standardised data the
        # arrow coordinates are correlations of the variable with the components;
        # reference: numpy.corrcoef
        r1 = np.corrcoef(profile[rec.attribute], cmap["pc1"])[0, 1]
        r2 = np.corrcoef(profile[rec.attribute], cmap["pc2"])[0, 1]
        assert rec.loading_1 == pytest.approx(r1, abs=1e-9)
        assert rec.loading_2 == pytest.approx(r2, abs=1e-9)
    assert cmap["explained_1"].iloc[0] >= cmap["explained_2"].iloc[0] > 0


@pytest.mark.parametrize("reflect", [False, True])
def test_procrustes_agrees_with_scipy(reflect):
    rng = np.random.default_rng(7 + reflect)
    target = rng.normal(size=(7, 2))
    angle = 0.9
    rot = np.array([[np.cos(angle), -np.sin(angle)], [np.sin(angle), np.cos(angle)]])
    if reflect:
        rot = rot @ np.diag([1, -1])
    moving = 2.5 * target @ rot + np.array([3.0, -1.0]) + rng.normal(0, 0.2, size=(7, 2))
    ours = compare.procrustes(target, moving)
    # reference: scipy.spatial.procrustes (both standardised: centred, unit Frobenius norm)
    mtx1, mtx2, disparity = scipy_procrustes(target, moving)
    centred = target - target.mean(axis=0)
    norm = np.linalg.norm(centred)
    assert np.allclose(centred / norm, mtx1, atol=1e-12)
    assert np.allclose((ours["aligned"] - target.mean(axis=0)) / norm, mtx2, atol=1e-10)
    assert ours["disparity"] == pytest.approx(disparity, abs=1e-12)
    assert np.allclose(ours["rotation"] @ ours["rotation"].T, np.eye(2), atol=1e-12)


def test_procrustes_recovers_an_exact_similarity_transform():
    rng = np.random.default_rng(3)
    target = rng.normal(size=(6, 2))
    rot = np.array([[0.0, 1.0], [-1.0, 0.0]])
    moving = 0.4 * target @ rot.T - 5
    ours = compare.procrustes(target, moving)
    # by construction (no noise): alignment is exact, disparity 0
    assert np.allclose(ours["aligned"], target, atol=1e-10)
    assert ours["disparity"] == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("dims", [2, 3])
def test_classical_mds_recovers_known_distances(dims):
    rng = np.random.default_rng(dims)
    points = rng.normal(size=(10, dims)) * 3
    dist = cdist(points, points)  # reference distances: scipy.spatial.distance
    got = compare.classical_mds(dist, dims)
    # Torgerson 1952: Euclidean distances of points in k dims are reproduced
    # exactly by k-dimensional classical MDS
    assert np.allclose(pdist(got["coordinates"]), pdist(points), atol=1e-6)
    assert got["fit"] == pytest.approx(1.0, abs=1e-9)


# --------------------------------------------------------------------------
# Maps on planted structure


def test_planted_owned_shift_moves_that_brand_most():
    consumer = random_profiles(31)
    owned = {b: dict(p) for b, p in consumer.items()}
    # planted: Cora's own photos flip its profile; everything else identical
    owned["Cora"] = {a: 1.0 - v for a, v in consumer["Cora"].items()}
    tables, notes = compare.compare_study(make_shares(consumer, owned))
    disp = tables["brand_displacement"]
    print(disp.to_string())
    assert disp.iloc[0]["brand"] == "Cora"
    assert disp.set_index("brand")["owned_rank_gap"].idxmax() == "Cora"
    # no image-level table: no bootstrap, so the summary says "largest", not "moves most"
    assert any("largest displacement (no bootstrap): Cora" in n for n in notes)
    assert not any("moves most" in n for n in notes)


def image_level(consumer: dict, owned: dict, n: int, seed: int, posters: int | None = None):
    """Images and image_attributes tables drawn from true shares: n photos per brand x source.

    With ``posters``, each cell's photos come from that many posters and all
    photos of a poster share one 0/1 value per attribute (perfect clustering).
    """
    rng = np.random.default_rng(seed)
    images, attrs = [], []
    for source, truth in (("consumer", consumer), ("owned", owned)):
        for brand, per in truth.items():
            poster_values = None
            if posters:
                poster_values = {a: rng.random(posters) < v for a, v in per.items()}
            for k in range(n):
                image_id = f"{brand}-{source}-{k}"
                poster = f"{brand}-{source}-p{k % posters}" if posters else ""
                images.append({"image_id": image_id, "brand": brand, "category": BRANDS[brand],
                               "source": source, "poster": poster})
                for a, v in per.items():
                    positive = bool(poster_values[a][k % posters]) if posters else bool(rng.random() < v)
                    attrs.append({"image_id": image_id, "attribute": a, "positive": positive,
                                  "probability": float(positive)})
    images, attrs = pd.DataFrame(images), pd.DataFrame(attrs)
    shares = attrs.merge(images, on="image_id").groupby(["brand", "source", "attribute"])["positive"].mean()
    observed = {s: {b: {a: float(shares[(b, s, a)]) for a in ATTRIBUTES} for b in BRANDS} for s in ("consumer", "owned")}
    return images, attrs, make_shares(observed["consumer"], observed["owned"])


def test_protest_exact_matches_an_independent_enumeration_with_scipy():
    # Independent check: scipy.spatial.procrustes (its own standardisation and
    # SVD) inside a loop over all 5! orderings written here; p = share of
    # orderings with a disparity at most the observed one (Jackson 1995).
    import itertools

    rng = np.random.default_rng(9)
    a = rng.normal(size=(5, 2))
    b = a @ np.array([[0, -1], [1, 0]]) * 2 + rng.normal(scale=0.6, size=(5, 2))
    got = compare.protest(a, b)
    observed = scipy_procrustes(a, b)[2]
    perms = [scipy_procrustes(a, b[list(order)])[2] for order in itertools.permutations(range(5))]
    assert got["disparity"] == pytest.approx(observed, abs=1e-12)
    assert got["p_value"] == pytest.approx(np.mean(np.array(perms) <= observed + 1e-10), abs=1e-15)
    assert got["permutations"] == 120 and got["method"].startswith("exact")
    # vegan's protest prints m12 squared and the "correlation in a symmetric
    # Procrustes rotation" sqrt(1 - m12^2) (from memory of its output): the same pair here
    assert got["correlation"] == pytest.approx(np.sqrt(1 - observed), abs=1e-12)
    # an identical map (up to rotation and scale) is the best of all 5! orderings: p = 1/120
    same = compare.protest(a, 3 * a @ np.array([[0, 1], [1, 0]]))
    assert same["p_value"] == pytest.approx(1 / 120, abs=1e-15) and same["disparity"] < 1e-12


def test_protest_random_orderings_follow_the_vegan_convention_and_hold_their_level():
    # Above 8 brands: seeded random orderings, p = (1 + hits) / (1 + permutations)
    # (vegan's protest convention, from memory), so a perfect fit gets exactly 1 / 10,000.
    rng = np.random.default_rng(3)
    a = rng.normal(size=(12, 2))
    assert compare.protest(a, -a)["p_value"] == pytest.approx(1 / 10_000, abs=1e-15)
    # under the null (unrelated maps) p is uniform: about 5 % of 200 tests below 0.05
    ps = np.array([compare.protest(rng.normal(size=(12, 2)), rng.normal(size=(12, 2)), permutations=499,
                                   seed=k)["p_value"] for k in range(200)])
    print("null rejection rate", np.mean(ps <= 0.05), "mean p", ps.mean())
    assert np.mean(ps <= 0.05) <= 0.09  # binomial(200, 0.05): 0.09 is about 2.6 SE above 5 %
    assert 0.42 <= ps.mean() <= 0.58


def test_brand_map_records_protest_for_each_alignment():
    consumer = random_profiles(31)
    owned = {b: {a: v + 0.02 * k for k, (a, v) in enumerate(p.items())} for b, p in consumer.items()}
    tables, notes = compare.compare_study(make_shares(consumer, owned))
    bm = tables["brand_map"]
    owned_rows = bm[bm["source"] == "owned"]
    # 6 brands: exact over 720 orderings; the same map is the best ordering: p = 2/720 at most
    assert owned_rows["protest_method"].iloc[0].startswith("exact (all 720")
    assert owned_rows["protest_p"].iloc[0] <= 2 / 720 + 1e-12
    assert bm.loc[bm["source"] == "consumer", "protest_p"].isna().all()
    assert any("PROTEST p 0.00" in n or "PROTEST p < 0.001" in n for n in notes)


def test_bootstrap_names_a_brand_only_when_it_moves_most_in_most_replicates():
    consumer = random_profiles(31)
    # planted: Cora's owned photos flip its profile; every other brand the same in truth
    owned = {b: dict(p) for b, p in consumer.items()}
    owned["Cora"] = {a: 1.0 - v for a, v in consumer["Cora"].items()}
    images, attrs, shares = image_level(consumer, owned, 80, seed=1)
    tables, notes = compare.compare_study(shares, images=images, image_attributes=attrs, map_replicates=200)
    disp = tables["brand_displacement"].set_index("brand")
    print(disp[["displacement", "displacement_low", "displacement_high", "moves_most_share"]])
    assert disp["moves_most_share"].idxmax() == "Cora" and disp.loc["Cora", "moves_most_share"] >= 0.8
    assert disp["moves_most_share"].sum() == pytest.approx(1.0)
    assert (disp["displacement_low"] <= disp["displacement"] + 1e-9).sum() >= 5
    assert any("moves most: Cora" in n and "bootstrap replicates" in n for n in notes)
    spread = tables["brand_map_bootstrap"]
    assert len(spread) == 12 and (spread["replicates"] == 200).all() and (spread["resampled"] == "photos").all()
    assert (spread["ellipse_width"] > 0).all() and (spread["x_low"] < spread["x_high"]).all()

    # null: consumer and owned photos drawn from the same truth; displacement is
    # noise, and no brand moves most in 80 % of the replicates
    images, attrs, shares = image_level(consumer, consumer, 80, seed=2)
    tables, notes = compare.compare_study(shares, images=images, image_attributes=attrs, map_replicates=200)
    line = next(n for n in notes if n.startswith("brand map, consumer -> owned"))
    print(line)
    assert "no brand moves most in at least 80 %" in line and "moves most:" not in line
    assert tables["brand_displacement"]["moves_most_share"].max() < 0.8


def test_bootstrap_resamples_posters_when_the_images_table_names_them():
    # Perfectly clustered photos (8 posters x 10 identical photos per cell):
    # resampling photos pretends there are 80 independent photos and shows too
    # little spread; resampling posters (a cluster bootstrap, Davison and
    # Hinkley 1997, 3.8) shows the spread of 8. Expected ratio about
    # sqrt(80 / 8) = 3.2 for a share's standard error; judged at > 1.8.
    consumer = random_profiles(41)
    images, attrs, shares = image_level(consumer, consumer, 80, seed=5, posters=8)
    by_poster, _ = compare.compare_study(shares, images=images, image_attributes=attrs, map_replicates=150)
    as_photos, notes = compare.compare_study(shares, images=images.assign(poster=""), image_attributes=attrs,
                                             map_replicates=150)
    wide = by_poster["brand_map_bootstrap"]
    narrow = as_photos["brand_map_bootstrap"]
    assert set(wide["resampled"]) == {"posters"} and set(narrow["resampled"]) == {"photos"}
    ratio = (wide["x_high"] - wide["x_low"]).median() / (narrow["x_high"] - narrow["x_low"]).median()
    print("poster / photo bootstrap range ratio", ratio)
    assert ratio > 1.8
    assert any("photos assumed independent" in n for n in notes)


def test_identical_sources_align_exactly():
    consumer = random_profiles(41)
    brand_map, loadings, _ = compare.brand_maps(compare.brand_metrics(make_shares(consumer, consumer)))
    c = brand_map[brand_map["source"] == "consumer"].set_index("brand")
    o = brand_map[brand_map["source"] == "owned"].set_index("brand")
    assert np.allclose(c[["aligned_x", "aligned_y"]], o[["aligned_x", "aligned_y"]], atol=1e-9)
    assert np.allclose(o["disparity"], 0.0, atol=1e-12)


def _planted_embeddings():
    rng = np.random.default_rng(5)
    d = 12
    centres = {b: rng.normal(size=d) for b in BRANDS}
    centres["Fjel"] = centres["Echo"] + 0.1 * rng.normal(size=d)  # Fjel looks like Echo
    owned_shift = rng.normal(size=d) * 3  # planted: Brio's own photos look different
    ids, rows, vecs = [], [], []
    for b in BRANDS:
        for source in ("consumer", "owned"):
            for k in range(15):
                centre = centres[b] + (owned_shift if (b == "Brio" and source == "owned") else 0)
                v = centre + 0.3 * rng.normal(size=d)
                ids.append(f"{b}-{source}-{k}")
                rows.append({"image_id": ids[-1], "brand": b, "category": BRANDS[b], "source": source, "status": "ok"})
                vecs.append(v / np.linalg.norm(v))
    vecs = np.asarray(vecs, dtype=np.float32)
    return pd.DataFrame(rows), SimpleNamespace(image_ids=ids, encoder_id="test", cluster=vecs, joint=vecs[:, ::-1].copy())


def test_vector_map_uses_cosine_distances_of_mean_vectors():
    images, emb = _planted_embeddings()
    table, info = compare.brand_vector_map(images, emb)
    # reference: scipy.spatial.distance.cdist(metric="cosine") on the mean vectors
    means = np.vstack(
        [
            emb.cluster[(images["brand"] == b).to_numpy() & ((images["source"] == s).to_numpy() | (s == "all"))].mean(axis=0)
            for b, s in zip(table["brand"], table["source"])
        ]
    )
    assert np.allclose(info["distances"].to_numpy(), cdist(means, means, metric="cosine"), atol=1e-6)
    t = table.set_index(["brand", "source"])
    assert t.loc[("Fjel", "consumer"), "nearest_brand"] == "Echo"
    assert (t.xs("all", level="source")["n_images"] == 30).all()

    consumer = random_profiles(51)
    tables, notes = compare.compare_study(make_shares(consumer), images=images, embeddings=emb)
    disp = tables["brand_displacement"].set_index("brand")
    assert disp["vector_distance"].idxmax() == "Brio"
    assert disp["vector_displacement"].idxmax() == "Brio"
    assert any("most different: Brio" in n for n in notes)


def test_summary_names_best_and_worst_attributes_only_with_enough_brands(tmp_path):
    rng = np.random.default_rng(61)
    five = ["Gala", "Hale", "Iris", "Jade", "Kilo"]  # one category ("other") of 5 brands: 10 pairs
    consumer = {b: {a: float(rng.uniform(0.05, 0.95)) for a in ATTRIBUTES} for b in five}
    rows = []
    for b, per in consumer.items():
        for a, v in per.items():
            score = v * 10 if a != "sincere" else -v * 10  # planted: survey reverses sincerity
            rows.append(f"{b},{a},{score:.4f}")
    path = tmp_path / "survey.csv"
    write_survey(path, rows)
    tables, notes = compare.compare_study(make_shares(consumer), survey=compare.read_survey(path))
    line = next(n for n in notes if n.startswith("agreement consumer photos vs survey"))
    print(line)
    best, worst = line.split("; worst ")
    assert "sincere (0/10 pairs)" in worst and "sincere" not in best
    per = compare.attribute_agreement(tables["agreement"], "consumer_share", "survey_score")
    assert per.iloc[-1]["attribute"] == "sincere" and per.iloc[0]["concordant_share"] == 1.0
    # the perfect agreements of 5 brands: exact p = 2/120 each, BH over the 5 x 3 family
    assert any(n.startswith("agreement tests:") and "of 15 significant" in n for n in notes)

    # 3 brands per category (pooled 6 brands, 6 pairs): counts only, no "best" or "worst"
    consumer = random_profiles(61)
    write_survey(path, [f"{b},{a},{(-v if a == 'sincere' else v) * 10:.4f}" for b, per in consumer.items()
                        for a, v in per.items()])
    _, notes = compare.compare_study(make_shares(consumer), survey=compare.read_survey(path))
    line = next(n for n in notes if n.startswith("agreement consumer photos vs survey"))
    assert "counts only" in line and "best" not in line.split(":", 1)[1].replace("best/worst", "")
    assert "worst " not in line.replace("best/worst", "")


def test_profile_distance_is_rms_of_standardised_profile_differences():
    consumer, owned = random_profiles(71), random_profiles(72)
    metrics = compare.brand_metrics(make_shares(consumer, owned))
    got = compare.profile_distances(metrics, "consumer_share", "owned_share")
    a = pd.DataFrame(consumer).T.sort_index()[sorted(ATTRIBUTES)]
    b = pd.DataFrame(owned).T.sort_index()[sorted(ATTRIBUTES)]
    # reference: sklearn.preprocessing.StandardScaler per attribute, then numpy RMS
    diff = StandardScaler().fit_transform(a) - StandardScaler().fit_transform(b)
    expected = np.sqrt((diff**2).mean(axis=1))
    assert np.allclose(got.loc[a.index].to_numpy(), expected, atol=1e-12)
    # identical profiles (up to a linear change of scale, as a survey scale is) -> 0
    same = compare.brand_metrics(make_shares(consumer, {k: {x: 3 * v + 1 for x, v in p.items()} for k, p in consumer.items()}))
    assert np.allclose(compare.profile_distances(same, "consumer_share", "owned_share"), 0.0, atol=1e-12)


# --------------------------------------------------------------------------
# The demo scenario (session fixture ``demo_run`` in conftest.py runs
# ``explore demo --encoder bundled`` once). demo_images/truth_*.csv record what
# the scenario plants: which attributes have a planted direction per category,
# and which brand's invented survey contradicts its photos.

DEMO = Path(__file__).resolve().parent.parent / "demo_images"
COMPARE_TABLES = ["survey", "agreement", "brand_map", "brand_map_loadings", "brand_vector_map", "brand_displacement"]


@pytest.mark.slow
def test_demo_writes_comparison_tables_and_prints_summary(demo_run):
    for name in COMPARE_TABLES:
        assert (demo_run / f"{name}.csv").is_file() and (demo_run / f"{name}.parquet").is_file(), name
    survey = pd.read_parquet(demo_run / "survey.parquet")
    assert len(survey) == len(pd.read_csv(DEMO / "survey.csv")) and (survey["status"] == "used").all()
    agreement = pd.read_parquet(demo_run / "agreement.parquet")
    assert {"consumer_share", "owned_share"} <= set(agreement["metric_a"])
    assert set(pd.read_parquet(demo_run / "brand_map.parquet")["source"]) == set(compare.MAP_SOURCES)
    vector_map = pd.read_parquet(demo_run / "brand_vector_map.parquet")
    assert len(vector_map) == 6 * 3 and vector_map["n_images"].min() > 0
    stdout = (demo_run / "demo_stdout.txt").read_text(encoding="utf-8")
    summary = [line for line in stdout.splitlines() if line.startswith("compare: ")]
    print("\n".join(summary))
    assert any(line.startswith("compare: agreement consumer photos vs survey") for line in summary)
    assert any(line.startswith("compare: brand map, consumer -> owned photos (Procrustes disparity") for line in summary)
    assert any(line.startswith("compare: survey vs consumer photos, most different") for line in summary)


@pytest.mark.slow
def test_demo_survey_agrees_where_planted_and_the_contradicted_brand_stands_out(demo_run):
    truth = pd.read_csv(DEMO / "truth_attributes.csv")
    brands = pd.read_csv(DEMO / "truth_brands.csv")
    disagreeing = brands.loc[~brands["survey_agrees"], "brand"].tolist()
    assert len(disagreeing) == 1
    disagreeing = disagreeing[0]

    agreement = pd.read_parquet(demo_run / "agreement.parquet")
    rows = agreement[(agreement["metric_a"] == "consumer_share") & (agreement["metric_b"] == "survey_score")]
    planted = truth[truth["direction_planted"]].groupby(["category", "attribute"])["survey_agrees"].all()
    rows = rows.merge(planted.rename("survey_planted_to_agree").reset_index(), on=["category", "attribute"])
    pd.set_option("display.width", 200)
    print(rows[["category", "attribute", "survey_planted_to_agree", "n_brands", "concordant", "discordant",
                "ties", "concordant_share", "kendall_tau", "pearson_r", "note"]].to_string())
    agree = rows[rows["survey_planted_to_agree"]]
    contra = rows[~rows["survey_planted_to_agree"]]
    agree_share = agree["concordant"].sum() / agree["pairs"].sum()
    contra_share = contra["concordant"].sum() / contra["pairs"].sum()
    print(f"pooled concordant share: planted to agree {agree_share:.2f}, planted to disagree {contra_share:.2f}")
    # Judgement thresholds for this scenario (not a published figure): where the
    # survey was made from the planted levels, photos and survey rank most brand
    # pairs alike; where it was made to contradict them, most pairs are reversed.
    assert agree_share >= 0.75
    assert contra_share <= 0.5

    disp = pd.read_parquet(demo_run / "brand_displacement.parquet").set_index("brand")
    print(disp[["category", "displacement", "survey_displacement", "owned_profile_distance",
                "survey_profile_distance", "survey_rank_gap", "vector_distance"]].round(3).to_string())
    # the brand whose survey contradicts its photos differs most from its photos
    assert disp["survey_profile_distance"].idxmax() == disagreeing
    assert disp["survey_profile_distance"].rank(ascending=False)[disagreeing] == 1
    # the brand planted with different consumer and owned contexts has the most
    # different consumer and owned mean image vectors
    source_brand = brands.loc[brands["consumer_favours"].fillna("") != "", "brand"].tolist()
    assert len(source_brand) == 1
    assert disp["vector_distance"].idxmax() == source_brand[0]


def test_p_values_are_never_printed_as_zero():
    # Common practice (e.g. APA style): report p below 0.001 as "< 0.001", never "p = 0".
    assert compare.format_p(0.0) == "< 0.001" and compare.format_p(3e-12) == "< 0.001"
    assert compare.format_p(0.0123) == "0.012" and compare.format_p(float("nan")) == "–"
    from explore.report.page import html_table

    cells = html_table(pd.DataFrame({"p_value": [1e-15, 0.2], "kendall_q": [0.0, 0.04], "share": [0.0, 0.5]}))["rows"]
    assert cells[0][:2] == ["< 0.001", "< 0.001"] and cells[1][:2] == ["0.200", "0.040"]


@pytest.mark.slow
def test_demo_report_prints_no_p_value_from_fewer_than_5_brands_and_shows_stability(demo_run):
    # The demo has 3 brands per category (6 in all): within-category agreement
    # rows are counts only; the pooled 6-brand rows carry exact p-values.
    import html
    import json
    import re

    agreement = pd.read_parquet(demo_run / "agreement.parquet")
    small = agreement["n_brands"] < 5
    assert small.any() and agreement.loc[small, ["kendall_p", "spearman_p", "pearson_p"]].isna().all().all()
    assert agreement.loc[~small, "p_method"].str.startswith("exact permutation").all()
    text = (demo_run / "report.html").read_text(encoding="utf-8")
    assert not re.search(r"\bp 0(?![.\d])", text)  # "p 0" alone; "p 0.244" is fine
    section = text[text.index('id="comparisons"'):]
    for row in re.findall(r"<tr>(.*?)</tr>", section, re.S):
        cells = [html.unescape(re.sub("<.*?>", "", c)).strip() for c in re.findall(r"<td[^>]*>(.*?)</td>", row, re.S)]
        if len(cells) > 7 and cells[3].isdigit() and int(cells[3]) < 5:
            assert not any("(p " in c for c in cells), cells
    notes = json.loads((demo_run / "run.json").read_text(encoding="utf-8"))["notes"]
    stability = [n for n in notes if n.startswith("contexts: stability:")]
    print(stability)
    assert stability and "adjusted Rand index" in stability[0]
    assert "adjusted Rand index is" in text
    protest_line = next(n for n in notes if n.startswith("compare: brand map, consumer -> owned"))
    print(protest_line)
    assert "PROTEST p" in protest_line and "bootstrap replicates" in protest_line

"""Tests of the contexts stage (UMAP + HDBSCAN, naming, brand x context statistics).

UMAP pays a numba JIT compilation of some tens of seconds in every process, so
the fits are shared through module-scoped fixtures.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from explore import contexts as ctx
from explore.study import ContextSettings

# --------------------------------------------------------------------------
# Statistics: no UMAP needed


def test_benjamini_hochberg_equals_statsmodels():
    # Reference: statsmodels.stats.multitest.multipletests(method="fdr_bh"),
    # the procedure of Benjamini and Hochberg (1995).
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(3)
    for size in (1, 2, 7, 50, 400):
        p = np.concatenate([rng.uniform(size=size), rng.uniform(0, 0.01, size=size // 3)])
        p[: size // 5] = p[size // 5]  # ties
        rng.shuffle(p)
        ours = ctx.benjamini_hochberg(p)
        ref = multipletests(p, method="fdr_bh")[1]
        np.testing.assert_allclose(ours, ref, rtol=1e-12, atol=0)
        # the rejections at 5 % agree as well
        assert ((ours <= 0.05) == multipletests(p, alpha=0.05, method="fdr_bh")[0]).all()


def test_benjamini_hochberg_leaves_missing_values_out():
    # Missing p-values (untested rows) are neither counted in m nor adjusted;
    # reference: statsmodels multipletests on the non-missing values alone.
    from statsmodels.stats.multitest import multipletests

    p = np.array([0.01, np.nan, 0.04, 0.03, np.nan, 0.5])
    ours = ctx.benjamini_hochberg(p)
    assert np.isnan(ours[[1, 4]]).all()
    ok = ~np.isnan(p)
    np.testing.assert_allclose(ours[ok], multipletests(p[ok], method="fdr_bh")[1], rtol=1e-12)


def test_fisher_pvalues_equal_scipy():
    # Reference: scipy.stats.fisher_exact(alternative="two-sided").
    from scipy.stats import fisher_exact

    rng = np.random.default_rng(5)
    tables = rng.integers(0, 40, size=(60, 4))
    tables[:5] = tables[5]  # repeated tables are computed once; results must not mix up
    ours = ctx.fisher_pvalues(*tables.T)
    for row, p in zip(tables, ours):
        a, b, c, d = (int(v) for v in row)
        if min(a + b, c + d, a + c, b + d) == 0:
            assert p == 1.0
        else:
            assert p == pytest.approx(fisher_exact([[a, b], [c, d]]).pvalue, rel=1e-12)


def test_fisher_tea_tasting_worked_example():
    # Fisher (1935), the lady tasting tea: table [[3, 1], [1, 3]]. Worked by
    # hand from the hypergeometric distribution with 8 cups, 4 milk-first:
    # P(x) = C(4,x) C(4,4-x) / C(8,4) = 1, 16, 36, 16, 1 (/70) for x = 0..4.
    # Two-sided p = P(x<=1) + P(x>=3) = (1 + 16 + 16 + 1) / 70 = 34/70.
    assert ctx.fisher_pvalues([3], [1], [1], [3])[0] == pytest.approx(34 / 70, rel=1e-12)


def _hand_table() -> tuple[pd.DataFrame, np.ndarray]:
    """Two brands of one category, two contexts (1 and 2), both sources.

    brand A consumer: 10 images, 4 in context 1, 6 in context 2
    brand A owned:     5 images, 0 in context 1, 5 in context 2
    brand B consumer: 30 images, 6 in context 1, 24 in context 2
    brand B owned:     5 images, 1 in context 1, 4 in context 2
    """
    rows = []
    for brand, source, in1, in2 in (("A", "consumer", 4, 6), ("A", "owned", 0, 5),
                                     ("B", "consumer", 6, 24), ("B", "owned", 1, 4)):
        rows += [(brand, source, 1)] * in1 + [(brand, source, 2)] * in2
    frame = pd.DataFrame(rows, columns=["brand", "source", "context_id"])
    frame["category"] = "drinks"
    return frame, frame["context_id"].to_numpy()


def test_index_on_hand_worked_table():
    # Worked by hand (index = 100 x brand share / category share, 100 = parity,
    # common marketing practice):
    # consumer, context 1: A share 4/10 = 0.4; category share (4+6)/40 = 0.25;
    #   A index = 100 x 0.4 / 0.25 = 160; B share 6/30 = 0.2, index 80.
    #   A's rest of category = B: 6/30 = 0.2.
    # all sources, context 1: A 4/15 = 0.26667; category 11/50 = 0.22;
    #   A index = 100 x (4/15) / (11/50) = 121.2121...; B 7/35 = 0.2, index 90.909...
    # owned, context 2: A 5/5 = 1.0; category 9/10 = 0.9; index 111.111...
    images, labels = _hand_table()
    table = ctx.brand_context_table(images, labels)

    def row(brand, source, context_id):
        hit = table[(table.brand == brand) & (table.source == source) & (table.context_id == context_id)]
        assert len(hit) == 1
        return hit.iloc[0]

    r = row("A", "consumer", 1)
    assert (r["count"], r["brand_n"], r["rest_count"], r["rest_n"]) == (4, 10, 6, 30)
    assert r["share"] == pytest.approx(0.4)
    assert r["category_share"] == pytest.approx(0.25)
    assert r["index"] == pytest.approx(160.0)
    assert r["rest_share"] == pytest.approx(0.2)
    assert row("B", "consumer", 1)["index"] == pytest.approx(80.0)
    assert row("A", "all", 1)["index"] == pytest.approx(121.2121212121)
    assert row("B", "all", 1)["index"] == pytest.approx(90.9090909091)
    assert row("A", "owned", 2)["index"] == pytest.approx(111.1111111111)
    # Fisher test of the brand against the rest of its category,
    # reference scipy.stats.fisher_exact on the table counted by hand above.
    from scipy.stats import fisher_exact

    assert r["p_value"] == pytest.approx(fisher_exact([[4, 6], [6, 24]]).pvalue, rel=1e-12)
    # shares of each brand and source add up to one
    sums = table.groupby(["brand", "source"])["share"].sum()
    np.testing.assert_allclose(sums.to_numpy(), 1.0)


def test_brand_table_tests_only_real_contexts_and_lone_brands_are_untested():
    images, labels = _hand_table()
    labels = labels.copy()
    labels[:2] = ctx.UNASSIGNED_ID
    lone = pd.DataFrame({"brand": ["C"] * 6, "source": ["consumer"] * 6, "category": ["solo"] * 6})
    images = pd.concat([images, lone], ignore_index=True)
    labels = np.concatenate([labels, [1, 1, 1, 2, 2, 2]])
    table = ctx.brand_context_table(images, labels)
    assert table.loc[table.context_id == ctx.UNASSIGNED_ID, "p_value"].isna().all()
    assert table.loc[table.brand == "C", "p_value"].isna().all()
    c = table[table.brand == "C"]
    assert c.loc[c["count"] > 0, "index"].eq(100.0).all()  # alone, it is its own category
    assert c.loc[c["category_share"] == 0, "index"].isna().all()  # 0 / 0 has no index
    # The unassigned images are reported, not dropped: counts add up to brand_n.
    counts = table.groupby(["brand", "source"]).agg(total=("count", "sum"), n=("brand_n", "first"))
    assert (counts.total == counts.n).all()


def test_bh_family_leaves_out_rows_below_min_count():
    # Independent filtering (Bourgon, Gentleman and Huber 2010): rows whose
    # category count is below min_count are not in the BH family. Reference:
    # statsmodels multipletests(fdr_bh) over the rows that pass the filter only;
    # dropping the filter would adjust over more rows and change these q-values.
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(11)
    n = 400
    images = pd.DataFrame({"brand": rng.choice(["A", "B", "C"], n), "category": "c",
                           "source": rng.choice(["consumer", "owned"], n)})
    labels = rng.choice([1, 2, 3, 4, 5, 6], n, p=[0.4, 0.3, 0.2, 0.06, 0.03, 0.01])
    labels[(images.brand == "A").to_numpy() & (labels == 1)] = 2  # one real difference
    table = ctx.brand_context_table(images, labels, min_margin=5)
    cat_count = table["count"] + table["rest_count"]
    family = table["p_value"].notna() & (cat_count >= 5)
    assert (~family & table["p_value"].notna()).any()  # the filter removes some tested rows
    assert table.loc[~family, "q_value"].isna().all()
    ref = multipletests(table.loc[family, "p_value"], method="fdr_bh")[1]
    np.testing.assert_allclose(table.loc[family, "q_value"], ref, rtol=1e-12)
    gaps = ctx.source_context_gaps(images, labels, ContextSettings(min_count=5))
    fam = gaps["p_value"].notna() & ((gaps["consumer_count"] + gaps["owned_count"]) >= 5)
    assert (~fam & gaps["p_value"].notna()).any()
    np.testing.assert_allclose(gaps.loc[fam, "q_value"], multipletests(gaps.loc[fam, "p_value"], method="fdr_bh")[1],
                               rtol=1e-12)
    assert gaps.loc[~fam, "q_value"].isna().all()


def test_poster_permutation_equals_an_independent_enumeration():
    # Independent computation written here with plain loops: every way of
    # choosing which posters are the brand's (itertools.combinations), the
    # statistic |brand share - rest share| of photos in a context, p = share
    # of splits at least as extreme (a cluster permutation test).
    import itertools

    posters = {"p1": ("A", [1, 1, 1, 2]), "p2": ("A", [1, 1]), "p3": ("B", [2, 2, 1]),
               "p4": ("B", [3, 2]), "p5": ("B", [2, 3, 3, 3]), "p6": ("B", [1])}
    rows, labels = [], []
    for poster, (brand, ctxs) in posters.items():
        for c in ctxs:
            rows.append({"brand": brand, "category": "k", "source": "consumer", "poster": poster})
            labels.append(c)
    images, labels = pd.DataFrame(rows), np.array(labels)
    table = ctx.brand_context_table(images, labels)
    names = list(posters)
    photos = {p: np.array(v[1]) for p, v in posters.items()}
    for c in (1, 2, 3):
        def stat(group):
            g = np.concatenate([photos[p] for p in group])
            r = np.concatenate([photos[p] for p in names if p not in group])
            return abs(np.mean(g == c) - np.mean(r == c))
        observed = stat(["p1", "p2"])
        splits = list(itertools.combinations(names, 2))
        expected = sum(stat(list(s)) >= observed - 1e-12 for s in splits) / len(splits)
        got = table[(table.brand == "A") & (table.source == "consumer") & (table.context_id == c)]
        assert got["p_value"].item() == pytest.approx(expected, abs=1e-15)
        assert got["test"].item().startswith("poster permutation")
    # without posters the same rows get Fisher's test (photos assumed independent)
    plain = ctx.brand_context_table(images.assign(poster=""), labels)
    assert (plain.loc[plain.p_value.notna(), "test"] == ctx.FISHER_TEST).all()


def test_poster_permutation_holds_its_level_where_fisher_does_not():
    # Simulation with known truth (no brand effect): posters choose contexts
    # (every photo of a poster in the poster's context: complete clustering),
    # 12 posters x 6 photos per brand. Fisher's test, treating 72 photos as
    # independent, rejects far too often; the poster permutation keeps close
    # to the nominal 5 %.
    rng = np.random.default_rng(21)
    fisher_hits = poster_hits = tests = 0
    for rep in range(60):
        rows, labels = [], []
        for brand in ("A", "B"):
            for k in range(12):
                c = int(rng.choice([1, 2], p=[0.5, 0.5]))
                for _ in range(6):
                    rows.append({"brand": brand, "category": "k", "source": "consumer", "poster": f"{brand}{k}"})
                    labels.append(c)
        images = pd.DataFrame(rows)
        labels = np.array(labels)
        t = ctx.brand_context_table(images, labels, seed=rep)
        f = ctx.brand_context_table(images.assign(poster=""), labels)
        pick = (t.brand == "A") & (t.source == "consumer") & (t.context_id == 1)
        poster_hits += int(t.loc[pick, "p_value"].item() <= 0.05)
        fisher_hits += int(f.loc[pick, "p_value"].item() <= 0.05)
        tests += 1
    print(f"false positives at 5 %: Fisher {fisher_hits}/{tests}, poster permutation {poster_hits}/{tests}")
    assert fisher_hits / tests >= 0.2  # seen: 20 of 60
    assert poster_hits / tests <= 0.12


def test_stability_ari_is_on_images_assigned_in_both(monkeypatch):
    # By definition (Hubert and Arabie 1985) identical partitions have ARI 1:
    # the refit below agrees with the main fit on every image both assign, and
    # differs only where the main fit left images unassigned, so ari must be
    # exactly 1 and the stricter ari_with_unassigned below 1.
    main = np.array([1, 1, 1, 2, 2, 2, 3, 3, -1, -1, -1])
    other = np.array([2, 2, 2, 1, 1, 1, 3, 3, 1, 2, 3])  # renumbered, plus the main fit's unassigned

    def fake_fit(vectors, settings, seed=0):
        return ctx.ContextFit(other[: len(vectors)], np.ones(len(vectors)), np.zeros((len(vectors), 2)),
                              np.zeros((len(vectors), 2)))

    monkeypatch.setattr(ctx.fit, "find_contexts", fake_fit)  # where context_stability looks it up
    st = ctx.context_stability(np.ones((11, 4)), main, ContextSettings(), seed=3).iloc[0]
    assert (st["refit_seed"], st["both_assigned"], st["main_contexts"], st["refit_contexts"]) == (4, 8, 3, 3)
    assert st["ari"] == pytest.approx(1.0, abs=1e-12)
    assert st["ari_with_unassigned"] < 0.9
    assert st["main_unassigned_share"] == pytest.approx(3 / 11)


def _finding_table() -> pd.DataFrame:
    """Hand-made brand x context rows (counts chosen so every rule is exercised)."""
    rows = [
        # brand, category, source, context, count, brand_n, category_share, rest_share, q
        ("K", "drinks", "all", 1, 24, 90, 0.10, 0.017, 1e-6),   # rare? no (10 %); dominated by apparel
        ("K", "drinks", "all", 2, 28, 90, 0.14, 0.08, 1e-3),    # typical for drinks: signature only
        ("F", "drinks", "all", 3, 6, 90, 0.03, 0.005, 0.01),    # rare in drinks: unexpected
        ("F", "drinks", "all", 4, 4, 90, 0.01, 0.000, 0.01),    # below min_count
        ("F", "drinks", "all", 2, 20, 90, 0.14, 0.11, 0.20),    # not significant
        ("T", "apparel", "all", 1, 50, 90, 0.27, 0.13, 1e-9),   # its own category's context
        ("T", "apparel", "all", 2, 5, 90, 0.05, 0.05, 1.0),
    ]
    t = pd.DataFrame(rows, columns=["brand", "category", "source", "context_id", "count", "brand_n",
                                    "category_share", "rest_share", "q_value"])
    t["share"] = t["count"] / t["brand_n"]
    t["index"] = 100 * t["share"] / t["category_share"]
    t["context"] = "c" + t["context_id"].astype(str)
    return t


def test_signature_and_unexpected_rules():
    s = ContextSettings()  # fdr 0.05, min_index 120, min_count 5, rare 0.05, dominance 2
    table = _finding_table()
    sig = ctx.signature_contexts(table, s)
    assert set(zip(sig.brand, sig.context_id)) == {("K", 1), ("K", 2), ("F", 3), ("T", 1)}
    k = sig[sig.brand == "K"].sort_values("rank")
    assert list(k.context_id) == [1, 2]  # 267 before 222 (index 100 x (24/90)/0.10 = 266.7)
    unexpected = ctx.unexpected_contexts(table, s)
    got = {(r.brand, r.context_id): r for r in unexpected.itertuples()}
    assert set(got) == {("K", 1), ("F", 3)}
    assert got[("K", 1)].dominant_category == "apparel"  # 27 % >= 2 x 10 %
    assert "apparel" in got[("K", 1)].reason
    assert "rarely" in got[("F", 3)].reason
    # Ranked by index: K in context 1 is 100 x (24/90) / 0.10 = 266.7,
    # F in context 3 is 100 x (6/90) / 0.03 = 222.2.
    ranked = unexpected.sort_values("rank")
    assert list(ranked.brand) == ["K", "F"]
    assert ranked["index"].to_numpy() == pytest.approx([266.6667, 222.2222], rel=1e-4)


def test_source_gaps_both_directions():
    # Brand K: consumer photos 20/45 in context 1 vs owned 4/45; owned 22/45 in
    # context 2 vs consumer 6/45. Reference for the p-values: scipy.stats.fisher_exact.
    from scipy.stats import fisher_exact

    rows = []
    for source, c1, c2, c3 in (("consumer", 20, 6, 19), ("owned", 4, 22, 19)):
        rows += [(source, 1)] * c1 + [(source, 2)] * c2 + [(source, 3)] * c3
    images = pd.DataFrame(rows, columns=["source", "context_id"])
    images["brand"], images["category"] = "K", "drinks"
    gaps = ctx.source_context_gaps(images, images["context_id"].to_numpy(), ContextSettings())
    by = gaps.set_index("context_id")
    assert by.loc[1, "direction"] == "more in consumer photos" and by.loc[1, "significant"]
    assert by.loc[2, "direction"] == "more in owned photos" and by.loc[2, "significant"]
    assert not by.loc[3, "significant"]
    assert by.loc[1, "gap"] == pytest.approx(20 / 45 - 4 / 45)
    p1 = fisher_exact([[20, 25], [4, 41]]).pvalue
    assert by.loc[1, "p_value"] == pytest.approx(p1, rel=1e-12)
    from statsmodels.stats.multitest import multipletests  # BH reference

    np.testing.assert_allclose(by["q_value"], multipletests(by["p_value"], method="fdr_bh")[1])


def test_naming_prefers_distinctive_phrases_and_is_unique():
    # Three contexts, each planted close to its own phrase, plus a "generic"
    # phrase close to every image: a nearest-phrase rule would call every
    # context "generic"; the distinctiveness rule must not.
    rng = np.random.default_rng(0)
    d = 64
    basis = np.linalg.qr(rng.normal(size=(d, d)))[0][:5]
    generic, own = basis[0], basis[1:4]
    labels = np.repeat([1, 2, 3], 40)
    joint = 0.8 * generic + 0.5 * own[labels - 1] + 0.05 * rng.normal(size=(120, d))
    phrases = ["generic", "one", "two", "three", "unrelated"]
    vectors = np.vstack([generic, own, basis[4]])
    named = ctx.name_contexts(joint, labels, phrases, vectors)
    assert dict(zip(named.context_id, named.context)) == {1: "one", 2: "two", 3: "three"}
    assert (named["name_score"] > 0).all()
    # the nearest phrase by raw cosine is "generic" for every context (the trap)
    raw = ctx._normalise(joint) @ ctx._normalise(vectors).T
    assert all(phrases[int(np.argmax(raw[labels == c].mean(0)))] == "generic" for c in (1, 2, 3))


def test_vocabulary_default_extend_replace(tmp_path):
    base = ctx.load_vocabulary(ContextSettings())
    assert 120 <= len(base) <= 200 and len(set(base)) == len(base)
    more = ctx.load_vocabulary(ContextSettings(extra_phrases=["on a houseboat", base[0]]))
    assert more[-1] == "on a houseboat" and len(more) == len(base) + 1
    own = tmp_path / "words.txt"
    own.write_text("# mine\nat the harbour\n\nin a greenhouse\n", encoding="utf-8")
    assert ctx.load_vocabulary(ContextSettings(vocabulary=own, replace_vocabulary=True)) == [
        "at the harbour", "in a greenhouse"]
    with pytest.raises(ValueError, match="not found"):
        ctx.load_vocabulary(ContextSettings(vocabulary=tmp_path / "none.txt"))


def test_parameters_scale_with_n_and_settings_win():
    s = ContextSettings()
    small, large = ctx.resolve_parameters(300, s), ctx.resolve_parameters(100_000, s)
    assert (small["neighbours"], small["min_cluster_size"]) == (30, 20)
    assert (large["neighbours"], large["min_cluster_size"]) == (50, 500)
    assert ctx.resolve_parameters(10_000, s)["min_cluster_size"] == 50
    fixed = ctx.resolve_parameters(300, ContextSettings(neighbours=8, min_cluster_size=25, min_samples=3))
    assert (fixed["neighbours"], fixed["min_cluster_size"], fixed["min_samples"]) == (8, 25, 3)


def test_study_refuses_bad_context_settings():
    from explore.study import StudyError, study_from_dict

    base = {"images": {"root": "."}}
    assert study_from_dict({**base, "contexts": {"fdr": 0.1, "fit_sample": 5000}}).contexts.fdr == 0.1
    for key, value in (("fdr", 1.5), ("min_cluster_size", 1), ("dominance_ratio", 0.5), ("fit_sample", 10),
                       ("cluster_selection", "biggest")):
        with pytest.raises(StudyError, match=f"contexts.{key}"):
            study_from_dict({**base, "contexts": {key: value}})


def test_exact_neighbours_match_sklearn():
    # Reference: sklearn.neighbors.NearestNeighbors(metric="cosine", algorithm="brute").
    from sklearn.neighbors import NearestNeighbors

    rng = np.random.default_rng(2)
    x = rng.normal(size=(300, 16)).astype(np.float32)
    idx, dist = ctx.exact_neighbours(x, 7, chunk=64)
    ref_d, ref_i = NearestNeighbors(n_neighbors=7, metric="cosine", algorithm="brute").fit(x).kneighbors(x)
    assert (idx == ref_i).mean() > 0.99  # float ties may swap rank
    np.testing.assert_allclose(dist, ref_d, atol=1e-5)


# --------------------------------------------------------------------------
# UMAP + HDBSCAN (module-scoped fits)


@pytest.fixture(scope="module")
def blobs():
    # sklearn.datasets.make_blobs: 6 Gaussian blobs of unequal size in 512-d.
    from sklearn.datasets import make_blobs

    x, y = make_blobs(n_samples=[60, 80, 100, 120, 140, 100], n_features=512, cluster_std=4.0,
                      random_state=0)
    return x.astype(np.float32), y


@pytest.fixture(scope="module")
def blob_fit(blobs):
    x, _ = blobs
    return ctx.find_contexts(x, ContextSettings(), seed=7)


def test_contexts_agree_with_blobs(blobs, blob_fit):
    # Reference: sklearn.metrics.adjusted_rand_score against the true blobs.
    from sklearn.metrics import adjusted_rand_score

    _, y = blobs
    ari = adjusted_rand_score(y, blob_fit.labels)
    print(f"blobs: ARI {ari:.3f}, {blob_fit.n_contexts} contexts, {blob_fit.n_unassigned} unassigned")
    assert ari >= 0.9
    assert blob_fit.map_xy.shape == (len(y), 2)
    assert blob_fit.points.shape == (len(y), 10)
    assert ((blob_fit.membership >= 0) & (blob_fit.membership <= 1)).all()
    assert (blob_fit.membership[blob_fit.labels == ctx.UNASSIGNED_ID] == 0).all()
    sizes = np.bincount(blob_fit.labels[blob_fit.labels > 0])[1:]
    assert (np.diff(sizes) <= 0).all()  # ids 1..K by decreasing size


def test_same_seed_same_contexts(blobs, blob_fit):
    x, _ = blobs
    again = ctx.find_contexts(x, ContextSettings(), seed=7)
    np.testing.assert_array_equal(again.labels, blob_fit.labels)
    np.testing.assert_array_equal(again.map_xy, blob_fit.map_xy)
    np.testing.assert_array_equal(again.membership, blob_fit.membership)


def test_sampled_fit_places_the_rest(blobs):
    # Above fit_sample images UMAP is fitted on a seeded sample and the rest
    # are placed from their neighbours; contexts must still match the blobs
    # (sklearn.metrics.adjusted_rand_score) and be reproducible.
    from sklearn.metrics import adjusted_rand_score

    x, y = blobs
    s = ContextSettings(fit_sample=300)
    a = ctx.find_contexts(x, s, seed=1)
    b = ctx.find_contexts(x, s, seed=1)
    ari = adjusted_rand_score(y, a.labels)
    print(f"blobs, fitted on 300 of {len(y)}: ARI {ari:.3f}")
    assert ari >= 0.9
    np.testing.assert_array_equal(a.labels, b.labels)


def test_sample_fit_agrees_with_full_fit(blobs):
    # UMAP and HDBSCAN fitted on a 300-image sample, the rest placed (neighbour
    # mean on the map, hdbscan.approximate_predict for the context), against
    # one fit on every image: adjusted Rand index (sklearn) between the two.
    from sklearn.metrics import adjusted_rand_score

    x, y = blobs
    full = ctx.find_contexts(x, ContextSettings(fit_sample=len(y)), seed=1)
    sampled = ctx.find_contexts(x, ContextSettings(fit_sample=300), seed=1)
    rest = np.setdiff1d(np.arange(len(y)), ctx.sample_rows(len(y), sampled.parameters))
    assert len(rest) > 0
    agreement = adjusted_rand_score(full.labels, sampled.labels)
    print(f"blobs: sample fit vs full fit ARI {agreement:.3f}")
    assert agreement >= 0.9
    assert (sampled.labels[rest] > 0).mean() >= 0.9  # placed images get a context, not noise
    assert (sampled.membership[rest] > 0).mean() >= 0.9


def test_run_contexts_tables(blobs):
    x, y = blobs
    n = len(y)
    rng = np.random.default_rng(0)
    brand = np.where(rng.random(n) < 0.5, "Alba", "Brisk")
    brand = np.where(y == 5, "Corvo", brand)  # Corvo only in blob 5
    brand[np.flatnonzero(y == 0)[:40]] = "Alba"  # Alba heavy in blob 0
    images = pd.DataFrame({
        "image_id": [f"i{i:04d}" for i in range(n)],
        "brand": brand,
        "category": np.where(brand == "Corvo", "other", "main"),
        "source": np.where(rng.random(n) < 0.5, "consumer", "owned"),
    })
    images.loc[(images.brand == "Alba") & (y == 0), "source"] = "consumer"  # consumer-only context
    phrase_basis = np.linalg.qr(rng.normal(size=(512, 512)))[0]

    def encode_texts(phrases):
        return phrase_basis[: len(phrases)].astype(np.float32)

    shuffled = images.sample(frac=1.0, random_state=1)  # rows are matched by id, not position
    tables = ctx.run_contexts(shuffled, list(images.image_id), x, x, ContextSettings(), seed=7,
                              encode_texts=encode_texts, encoder_id="test-encoder")
    assert set(tables) == {"image_contexts", "contexts", "brand_contexts", "signature_contexts",
                           "unexpected_contexts", "source_context_gaps", "context_stability", "context_edits"}
    # stability: a refit on seed 8, compared on the images assigned in both
    # (reference: sklearn.metrics.adjusted_rand_score on a refit done here)
    from sklearn.metrics import adjusted_rand_score

    st = tables["context_stability"].iloc[0]
    other = ctx.find_contexts(x, ContextSettings(), seed=8).labels
    main = tables["image_contexts"].set_index("image_id").loc[list(images.image_id), "context_id"].to_numpy()
    both = (main >= 0) & (other >= 0)
    assert (st["main_seed"], st["refit_seed"], st["both_assigned"]) == (7, 8, both.sum())
    assert st["ari"] == pytest.approx(adjusted_rand_score(main[both], other[both]), abs=1e-12)
    assert st["ari"] >= 0.9  # well-separated blobs do not change with the seed
    assert any("stability" in n and "adjusted Rand index" in n for n in ctx.describe(tables))
    assert (tables["brand_contexts"]["test"].replace("", np.nan).dropna() == ctx.FISHER_TEST).all()
    ic, cx = tables["image_contexts"], tables["contexts"]
    assert list(ic.columns) == ["image_id", "context_id", "context", "membership", "map_x", "map_y"]
    assert len(ic) == n and list(ic.image_id) == list(images.image_id)
    assert cx.loc[cx.context_id == -1, "size"].item() == (ic.context_id == -1).sum()
    assert cx["size"].sum() == n
    real = cx[cx.context_id > 0]
    assert real["context"].is_unique
    assert (real["exemplars"].str.split().map(len) == min(6, real["size"].min())).all()
    assert (cx["encoder_id"] == "test-encoder").all() and "setting_neighbours" in cx
    for ex, cid in zip(real.exemplars, real.context_id):
        assert set(ic.set_index("image_id").loc[ex.split(), "context_id"]) == {cid}
    bc = tables["brand_contexts"]
    truth_ctx = ic.context_id.to_numpy()
    blob0 = pd.Series(truth_ctx[y == 0]).mode()[0]
    sig = tables["signature_contexts"]
    assert ((sig.brand == "Alba") & (sig.source == "all") & (sig.context_id == blob0)).any()
    gaps = tables["source_context_gaps"]
    hit = gaps[(gaps.brand == "Alba") & (gaps.context_id == blob0)]
    assert hit["significant"].item() and hit["direction"].item() == "more in consumer photos"
    assert bc["q_value"].dropna().between(0, 1).all()


# --------------------------------------------------------------------------
# The demo scenario (fictional brands, planted contexts), bundled encoder

DEMO = Path(__file__).resolve().parent.parent / "demo_images"


def _demo_folder(tmp_path_factory) -> Path:
    """demo_images/ when its images are there, else a fresh copy made by make_demo.py."""
    if (DEMO / "truth_images.csv").is_file() and (DEMO / "images").is_dir():
        return DEMO
    if not (DEMO / "make_demo.py").is_file():
        pytest.skip("demo_images/make_demo.py is missing")
    if not Path("/usr/share/openclipart/png").is_dir():
        pytest.skip("demo images not generated and openclipart-png is not installed to make them")
    out = tmp_path_factory.mktemp("demo")
    subprocess.run([sys.executable, str(DEMO / "make_demo.py"), "--out", str(out)], check=True,
                   capture_output=True)
    return out


def _tables_from_run(run) -> dict | None:
    """The context tables written by the shared ``demo_run`` fixture (None: no output folder found).

    ``explore demo`` must write the context tables: a run folder without them fails.
    """
    folder = run.get("output") if isinstance(run, dict) else getattr(run, "output", run)
    if not isinstance(folder, (str, Path)) or not (Path(folder) / "run.json").is_file():
        return None
    folder = Path(folder)
    names = ["images", "image_contexts", "contexts", "brand_contexts", "signature_contexts",
             "unexpected_contexts", "source_context_gaps"]
    lacking = [n for n in names if not (folder / f"{n}.parquet").is_file()]
    assert not lacking, f"explore demo did not write {lacking} in {folder}"
    return {n: pd.read_parquet(folder / f"{n}.parquet") for n in names}


@pytest.fixture(scope="module")
def demo_contexts(request, tmp_path_factory):
    """(tables, truth_images, truth_brands) for the demo scenario with the bundled encoder."""
    tables = None
    folder = DEMO
    try:
        run = request.getfixturevalue("demo_run")  # tests/conftest.py: `explore demo --encoder bundled`
        tables = _tables_from_run(run)
    except pytest.FixtureLookupError:
        pass
    if tables is None:
        from explore import collect, embed
        from explore.encoders import load_encoder
        from explore.study import study_from_dict

        folder = _demo_folder(tmp_path_factory)
        brands = pd.read_csv(folder / "truth_brands.csv")
        out = tmp_path_factory.mktemp("demo_out")
        study = study_from_dict({
            "name": "demo-contexts", "output": str(out), "seed": 0,
            "images": {"manifest": str(folder / "manifest.csv")},
            "brands": dict(zip(brands.brand, brands.category)),
            "encoder": {"name": "bundled"},
        })
        images = collect.collect_study_images(study, progress=False)
        encoder, _ = load_encoder("bundled")
        vectors, _ = embed.embed_table(images, encoder, cache_dir=out / "cache", progress=False)
        tables = ctx.run_contexts(images, vectors.image_ids, vectors.cluster, vectors.joint, study.contexts,
                                  seed=study.seed, encode_texts=encoder.encode_texts, encoder_id=encoder.id)
        tables["images"] = images
    truth_images = pd.read_csv(folder / "truth_images.csv")
    truth_brands = pd.read_csv(folder / "truth_brands.csv", keep_default_na=False)
    return tables, truth_images, truth_brands


@pytest.mark.slow
def test_demo_contexts_match_the_planted_ones(demo_contexts):
    # Reference: sklearn.metrics.adjusted_rand_score between found and planted
    # contexts, unassigned images left out. Found contexts are mapped to the
    # planted context most of their images come from (majority).
    from sklearn.metrics import adjusted_rand_score

    tables, truth_images, truth_brands = demo_contexts
    ic = tables["image_contexts"].merge(tables["images"][["image_id", "relpath"]], on="image_id")
    ic = ic.merge(truth_images[["path", "brand", "context"]].rename(
        columns={"path": "relpath", "context": "planted"}), on="relpath")
    assert len(ic) == len(tables["image_contexts"]) == len(truth_images)
    # unassigned images are kept and counted, never dropped
    sizes = tables["contexts"].set_index("context_id")["size"]
    assert sizes.sum() == len(ic) and sizes[ctx.UNASSIGNED_ID] == (ic.context_id == ctx.UNASSIGNED_ID).sum()
    kept = ic[ic.context_id != ctx.UNASSIGNED_ID]
    ari = adjusted_rand_score(kept.planted, kept.context_id)
    planted_of = kept.groupby("context_id")["planted"].agg(lambda s: s.value_counts().index[0]).to_dict()
    names = tables["contexts"].set_index("context_id")["context"].to_dict()
    print(f"\ndemo: ARI {ari:.3f} over {len(kept)} assigned images; {len(ic) - len(kept)} unassigned; "
          f"ARI with unassigned as one group {adjusted_rand_score(ic.planted, ic.context_id):.3f}")
    for cid, planted in sorted(planted_of.items()):
        share = (kept[kept.context_id == cid].planted == planted).mean()
        print(f"  context {cid} '{names[cid]}' -> {planted} ({share:.0%} of its images)")
    assert ari >= 0.5

    sig = tables["signature_contexts"]
    sig = sig[sig.source == "all"].assign(planted=lambda t: t.context_id.map(planted_of))
    missing = []
    for row in truth_brands.itertuples():
        found = set(sig.loc[sig.brand == row.brand, "planted"])
        print(f"  {row.brand}: planted signature {row.signature_contexts}; found "
              + "; ".join(f"{r.context} ({r.planted}, index {r.index:.0f}, q {r.q_value:.1e})"
                          for r in sig[sig.brand == row.brand].itertuples()))
        missing += [(row.brand, c) for c in row.signature_contexts.split() if c not in found]
    assert not missing, f"planted signature contexts not found: {missing}"

    unexpected = tables["unexpected_contexts"].assign(
        planted=lambda t: t.context_id.map(planted_of))
    for row in truth_brands[truth_brands.unexpected_context != ""].itertuples():
        hits = unexpected[(unexpected.brand == row.brand) & (unexpected.planted == row.unexpected_context)]
        print(f"  unexpected for {row.brand}: planted {row.unexpected_context}; found "
              + "; ".join(f"{r.context} [{r.source}] index {r.index:.0f}: {r.reason}" for r in hits.itertuples()))
        assert len(hits), f"{row.brand}: planted unexpected context {row.unexpected_context} not reported"


def _planted_of(tables, truth_images) -> dict:
    """Found context id -> the planted context most of its images come from (majority)."""
    ic = tables["image_contexts"].merge(tables["images"][["image_id", "relpath"]], on="image_id")
    ic = ic.merge(truth_images[["path", "context"]].rename(columns={"path": "relpath", "context": "planted"}),
                  on="relpath")
    kept = ic[ic.context_id != ctx.UNASSIGNED_ID]
    return kept.groupby("context_id")["planted"].agg(lambda s: s.value_counts().index[0]).to_dict()


@pytest.mark.slow
def test_demo_consumer_vs_owned_difference_is_found(demo_contexts):
    # The planted consumer-vs-owned differences (truth_brands.csv) must come out
    # as significant rows of source_context_gaps (Fisher exact + Benjamini-Hochberg,
    # references checked above), in the planted direction.
    tables, truth_images, truth_brands = demo_contexts
    planted_of = _planted_of(tables, truth_images)
    gaps = tables["source_context_gaps"].assign(planted=lambda t: t.context_id.map(planted_of))
    print()
    for brand in sorted(set(truth_brands.loc[(truth_brands.consumer_favours != "")
                                             | (truth_brands.owned_favours != ""), "brand"])):
        for r in gaps[gaps.brand == brand].itertuples():
            print(f"  {brand} context {r.context_id} ({r.planted}): consumer {r.consumer_count}/{r.consumer_n} "
                  f"vs owned {r.owned_count}/{r.owned_n}, p {r.p_value:.1e}, q {r.q_value:.1e}, "
                  f"significant {r.significant}")
    gaps = gaps[gaps.significant]
    for column, direction in (("consumer_favours", "more in consumer photos"),
                              ("owned_favours", "more in owned photos")):
        for row in truth_brands[truth_brands[column] != ""].itertuples():
            planted = getattr(row, column)
            hits = gaps[(gaps.brand == row.brand) & (gaps.planted == planted) & (gaps.direction == direction)]
            print(f"  {row.brand} {direction}: planted {planted}; found "
                  + "; ".join(f"{r.context} consumer {r.consumer_count}/{r.consumer_n} vs owned "
                              f"{r.owned_count}/{r.owned_n}, q {r.q_value:.1e}" for r in hits.itertuples()))
            assert len(hits), f"{row.brand}: planted consumer-vs-owned difference in {planted} not found"


# Words that an everyday name of each planted demo context would contain (our
# own list, written from the demo's scene descriptions, not from the output).
PLANTED_KEYWORDS = {
    "beach": {"beach", "sea", "seaside", "shore", "coast", "sand", "sandy", "ocean", "sunbathing"},
    "mountain_camp": {"camping", "camp", "tent", "mountain", "mountains", "campfire", "hiking"},
    "night_party": {"party", "celebration", "celebrating", "birthday", "balloons", "nightclub", "dancing"},
    "breakfast": {"breakfast", "morning", "coffee", "toast", "cereal", "tea"},
    "gym": {"gym", "workout", "weights", "fitness", "exercise"},
    "office_desk": {"office", "desk", "computer", "laptop", "paperwork", "working"},
    "candlelit_dinner": {"dinner", "candle", "candlelight", "wine", "dining"},
}


@pytest.mark.slow
def test_demo_context_names_match_the_planted_ones(demo_contexts):
    # Zero-shot naming check on the demo (end to end, not a target to tune on): a
    # planted context counts as named when a found context mapped to it by majority
    # has a model phrase (suggested_name) sharing a keyword with it. Measured with
    # the bundled encoder and the shipped general vocabulary (not written around
    # the demo): 5 of 7 with bundled-v5 (gym, mountain camp, candlelit dinner, office
    # desk, and breakfast through the weak name "morning coffee"; 4 of 7 with v4); we
    # require 4, so a regression in naming fails.
    tables, truth_images, _ = demo_contexts
    planted_of = _planted_of(tables, truth_images)
    # the model's chosen phrase (weak names are shown as "context N", checked below)
    names = tables["contexts"].set_index("context_id")["suggested_name"].to_dict()
    assert set(planted_of.values()) <= set(PLANTED_KEYWORDS)
    named = set()
    print()
    for cid, planted in sorted(planted_of.items()):
        words = set(names[cid].lower().replace("'", " ").split())
        hit = bool(words & PLANTED_KEYWORDS[planted])
        named |= {planted} if hit else set()
        print(f"  context {cid} '{names[cid]}' -> {planted}: {'keyword match' if hit else 'no keyword'}")
    print(f"  planted contexts named: {len(named)} of {len(PLANTED_KEYWORDS)}: {sorted(named)}")
    assert len(named) >= 4, f"only {sorted(named)} named after their planted context"
    assert len(set(names.values())) == len(names), "context names are not unique"

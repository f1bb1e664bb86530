"""Poster-aware yes-rate intervals, BH over gap families, power (explore/attributes/clustering.py, testing.py).

Outside references are named beside each check.
"""

import numpy as np
import pytest

from explore.attributes.clustering import cluster_summary, gap_interval, gap_test, interval_n, yes_rate_interval
from explore.attributes.intervals import newcombe_interval, wilson_interval
from explore.attributes.testing import benjamini_hochberg, minimum_detectable_gap, power_warning


def _clustered_sample(rng, posters, per_poster, icc, rate):
    """Beta-binomial photos: poster rates ~ Beta with mean ``rate`` and ICC 1 / (a + b + 1)."""
    s = (1 - icc) / icc
    poster_rates = rng.beta(rate * s, (1 - rate) * s, posters)
    calls = (rng.random((posters, per_poster)) < poster_rates[:, None]).astype(int).ravel()
    ids = np.repeat([f"poster{i}" for i in range(posters)], per_poster)
    return calls, ids


def test_poster_aware_interval_covers_at_nominal_rate_in_simulation(capsys):
    # Simulation with known truth (the design): 18 posters x 5 photos,
    # ICC 0.3, true yes-rate 0.3, 400 replications.
    rng = np.random.default_rng(20260)
    reps, truth = 400, 0.3
    aware = independent = 0
    for _ in range(reps):
        calls, ids = _clustered_sample(rng, 18, 5, 0.3, truth)
        low, high, _ = yes_rate_interval(calls, ids)
        aware += bool(low[0] <= truth <= high[0])
        wl, wh = wilson_interval(calls.sum(), len(calls))
        independent += bool(wl <= truth <= wh)
    with capsys.disabled():
        print(
            f"\n18 posters x 5 photos, ICC 0.3, 400 replications: poster-aware 95 % interval "
            f"covers {aware / reps:.3f}, photo-independent Wilson covers {independent / reps:.3f}"
        )
    assert aware / reps >= 0.92
    assert independent / reps < 0.88  # the clustering matters: Wilson alone under-covers (about 0.81)


def test_design_effect_matches_statsmodels_gee_cluster_robust_variance():
    # Reference: statsmodels GEE (binomial, independence working correlation,
    # intercept only, groups = posters) and its robust (sandwich) covariance.
    # Its variance of logit(p), mapped back by the delta method (dp = p(1-p) dlogit),
    # times C / (C - 1) (the small-sample factor of the linearisation estimator)
    # is our cluster variance deff * p(1-p)/(n-1).
    import statsmodels.api as sm

    rng = np.random.default_rng(3)
    calls, ids = _clustered_sample(rng, 12, 7, 0.4, 0.35)
    model = sm.GEE(calls, np.ones((len(calls), 1)), groups=ids, family=sm.families.Binomial(),
                   cov_struct=sm.cov_struct.Independence())
    fit = model.fit()
    p = calls.mean()
    v_logit = fit.cov_robust[0, 0] if hasattr(fit, "cov_robust") else fit.cov_params()[0, 0]
    v_gee = (p * (1 - p)) ** 2 * v_logit * 12 / 11
    s = cluster_summary(calls, ids)
    assert s.design_effect[0] > 1.2  # clustered enough that truncation at 1 does not apply
    ours = s.design_effect[0] * p * (1 - p) / (len(calls) - 1)
    assert ours == pytest.approx(v_gee, rel=1e-6)
    assert s.effective_n[0] == pytest.approx(len(calls) / s.design_effect[0])
    assert s.posters == 12


def test_without_posters_everything_is_the_independent_method():
    # Reference: our Wilson / Newcombe (tested against statsmodels elsewhere) and
    # scipy's Pearson chi-square test without continuity correction.
    from scipy.stats import chi2_contingency

    rng = np.random.default_rng(5)
    a = (rng.random((40, 3)) < [0.2, 0.5, 0.7]).astype(int)
    b = (rng.random((55, 3)) < [0.3, 0.5, 0.4]).astype(int)
    la, ha, sa = yes_rate_interval(a)
    lb, hb, sb = yes_rate_interval(b, [""] * 55)  # all unknown posters: the same
    wl, wh = wilson_interval(a.sum(axis=0), 40)
    np.testing.assert_allclose(la, wl, atol=1e-12)
    np.testing.assert_allclose(ha, wh, atol=1e-12)
    np.testing.assert_allclose(sa.effective_n, 40)
    assert not sb.known_posters
    low, high = gap_interval(sa.rate, sa.interval_n, sb.rate, sb.interval_n)
    nl, nh = newcombe_interval(a.sum(axis=0), 40, b.sum(axis=0), 55)
    np.testing.assert_allclose(low, nl, atol=1e-12)
    np.testing.assert_allclose(high, nh, atol=1e-12)
    p = gap_test(sa.rate, sa.interval_n, sb.rate, sb.interval_n)
    for j in range(3):
        table = [[a[:, j].sum(), 40 - a[:, j].sum()], [b[:, j].sum(), 55 - b[:, j].sum()]]
        assert p[j] == pytest.approx(chi2_contingency(table, correction=False)[1], rel=1e-9)


def test_gap_test_is_two_sided():
    # A gap of either sign is detected alike (a one-direction test would miss the negative one).
    high = np.r_[np.ones(30), np.zeros(30)]
    low = np.r_[np.ones(10), np.zeros(50)]
    s_high, s_low = cluster_summary(high), cluster_summary(low)
    p_pos = gap_test(s_high.rate, 60, s_low.rate, 60)[0]
    p_neg = gap_test(s_low.rate, 60, s_high.rate, 60)[0]
    assert p_pos < 0.001 and p_neg == pytest.approx(p_pos)


def test_clustering_widens_and_single_poster_is_independent():
    rng = np.random.default_rng(11)
    calls, ids = _clustered_sample(rng, 10, 9, 0.5, 0.4)
    s = cluster_summary(calls, ids)
    assert s.design_effect[0] > 1 and s.effective_n[0] < 90 and s.interval_n[0] < s.effective_n[0]
    # The table-level recomputation gives the same adjusted n.
    assert interval_n(90, s.effective_n, s.posters)[0] == pytest.approx(s.interval_n[0])
    one = cluster_summary(calls, ["same"] * 90)
    assert one.posters == 1 and one.design_effect[0] == 1.0 and one.known_posters


def test_benjamini_hochberg_matches_statsmodels_and_published_example():
    # Reference: statsmodels multipletests(method="fdr_bh").
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(2)
    p = np.r_[rng.uniform(0, 0.01, 5), rng.uniform(0, 1, 31)]
    np.testing.assert_allclose(benjamini_hochberg(p), multipletests(p, method="fdr_bh")[1], atol=1e-12)
    # Benjamini & Hochberg (1995), section 4's 15 p-values: at q = 0.05 the step-up
    # rejects the four smallest (from memory of the paper's example).
    bh95 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
            0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]
    assert int((benjamini_hochberg(bh95) <= 0.05).sum()) == 4
    with_nan = benjamini_hochberg([0.01, np.nan, 0.04])
    assert np.isnan(with_nan[1]) and with_nan[0] == pytest.approx(0.02) and with_nan[2] == pytest.approx(0.04)


@pytest.mark.parametrize("n1,n2,base", [(45, 45, 0.3), (90, 30, 0.5), (20, 200, 0.1), (12.5, 40.2, 0.6)])
def test_minimum_detectable_gap_has_80_percent_power_by_statsmodels(n1, n2, base):
    # Reference: statsmodels NormalIndPower with proportion_effectsize (Cohen's h):
    # at our minimum detectable gap the power is 0.80 (the far tail adds < 0.001).
    from statsmodels.stats.power import NormalIndPower
    from statsmodels.stats.proportion import proportion_effectsize

    d = float(minimum_detectable_gap(n1, n2, base))
    centre = np.arcsin(np.sqrt(base))
    # Recover the two rates the way the module places them and ask statsmodels.
    h = None
    for lo in np.linspace(0, 1, 20001):
        hi = lo + d
        if hi <= 1 and abs((np.arcsin(np.sqrt(hi)) + np.arcsin(np.sqrt(lo))) / 2 - centre) < 1e-4:
            h = proportion_effectsize(hi, lo)
            break
    assert h is not None
    power = NormalIndPower().power(effect_size=h, nobs1=n1, alpha=0.05, ratio=n2 / n1)
    assert power == pytest.approx(0.80, abs=0.003)


def test_power_warning_for_small_cells():
    small = minimum_detectable_gap(45, 45, 0.3)  # about 0.27: cannot see a 10-point gap
    large = minimum_detectable_gap(2000, 2000, 0.3)
    assert small > 0.2 and large < 0.06
    warn = power_warning([small, large, np.nan])
    assert "10-point" in warn[0] and warn[1] == "" and warn[2] != ""


def test_poster_aware_gap_test_holds_its_level_under_clustering(capsys):
    # Simulation with known truth: no real gap (both sources 0.3); each source's
    # photos come from 18 posters x 5 (ICC 0.3). The
    # photo-independent chi-square rejects far more often than 5 %; the poster-aware
    # test stays near its level.
    from scipy.stats import chi2_contingency

    rng = np.random.default_rng(77)
    reps = 400
    aware = naive = 0
    for _ in range(reps):
        calls, ids = _clustered_sample(rng, 18, 5, 0.3, 0.3)
        owned, owned_ids = _clustered_sample(rng, 18, 5, 0.3, 0.3)
        s1, s2 = cluster_summary(calls, ids), cluster_summary(owned, owned_ids)
        aware += gap_test(s1.rate, s1.interval_n, s2.rate, s2.interval_n)[0] < 0.05
        table = [[calls.sum(), 90 - calls.sum()], [owned.sum(), 90 - owned.sum()]]
        naive += chi2_contingency(table, correction=False)[1] < 0.05
    with capsys.disabled():
        print(f"\nno true gap, 400 replications: poster-aware test rejects {aware / reps:.3f}, "
              f"photo-independent chi-square {naive / reps:.3f}")
    assert aware / reps <= 0.08
    assert naive / reps > 0.10


def test_attribute_shares_use_the_poster_column():
    import pandas as pd

    from explore.attributes.shares import attribute_gaps, attribute_shares

    rng = np.random.default_rng(21)
    calls, ids = _clustered_sample(rng, 10, 9, 0.4, 0.4)
    images = pd.DataFrame({
        "image_id": [f"i{k}" for k in range(180)], "brand": "Alpha", "category": "c",
        "source": ["consumer"] * 90 + ["owned"] * 90,
        "poster": list(ids) + [""] * 90,
    })
    positive = np.r_[calls, (rng.random(90) < 0.4).astype(int)].astype(bool)
    ia = pd.DataFrame({"image_id": images["image_id"], "attribute": "x", "positive": positive,
                       "probability": positive.astype(float)})
    defs = pd.DataFrame({"attribute": ["x"], "threshold": [0.5], "encoder_id": ["t"]})
    shares = attribute_shares(ia, images, defs, bootstrap_samples=0).set_index(["level", "source"])
    consumer, owned = shares.loc[("brand", "consumer")], shares.loc[("brand", "owned")]
    low, high, s = yes_rate_interval(calls, ids)
    assert consumer["effective_n"] == pytest.approx(s.effective_n[0]) and consumer["effective_n"] < 60
    assert consumer["yes_rate_low"] == pytest.approx(low[0]) and consumer["posters"] == 10
    assert owned["effective_n"] == 90 and "assumed independent" in owned["clustering"]
    gaps = attribute_gaps(shares.reset_index())
    assert gaps["consumer_effective_n"].iloc[0] == pytest.approx(s.effective_n[0])
    assert gaps["min_detectable_gap_effective"].iloc[0] > gaps["min_detectable_gap"].iloc[0]


def test_mean_probability_bootstrap_resamples_posters(capsys):
    """Simulation with known truth: 15 posters x 6 photos whose probabilities share a
    poster effect (poster means ~ Beta(2, 3), photo = 0.8 x poster mean + 0.2 x U(0, 1),
    so the true mean is 0.42). The cluster bootstrap (whole posters, Davison & Hinkley
    1997, section 3.8) covers near its 95 % (percentile intervals with 15 clusters run a
    little under); resampling photos as if independent covers far less."""
    from explore.attributes.intervals import _percentiles
    from explore.attributes.shares import poster_bootstrap_sums

    rng = np.random.default_rng(3)
    reps, posters, photos, truth = 400, 15, 6, 0.42
    ids = np.repeat([f"p{j}" for j in range(posters)], photos)
    covered = {"posters": 0, "photos": 0}
    for r in range(reps):
        p = (0.8 * np.repeat(rng.beta(2, 3, posters), photos) + 0.2 * rng.random(posters * photos))[:, None]
        for how, who in (("posters", ids), ("photos", np.full(len(ids), ""))):
            sums = poster_bootstrap_sums(p, who, 500, np.random.default_rng(r))
            low, high = _percentiles(sums[:, :-1] / sums[:, -1:])
            covered[how] += bool(low[0] <= truth <= high[0])
    with capsys.disabled():
        print(f"\nmean-probability bootstrap coverage, {reps} replications: posters resampled "
              f"{covered['posters'] / reps:.3f}, photos resampled {covered['photos'] / reps:.3f}")
    assert covered["posters"] / reps >= 0.88
    assert covered["photos"] / reps <= 0.75


def test_mean_probability_bootstrap_without_posters_is_the_photo_bootstrap():
    """No posters known: the same draws as the ordinary bootstrap of photos; unequal
    posters: the resampled photo count varies and the mean is the ratio."""
    from explore.attributes.intervals import bootstrap_sums
    from explore.attributes.shares import poster_bootstrap_sums

    v = np.random.default_rng(0).random((40, 3))
    plain = bootstrap_sums(v, 200, np.random.default_rng(5))
    mine = poster_bootstrap_sums(v, np.full(40, ""), 200, np.random.default_rng(5))
    np.testing.assert_allclose(mine[:, :-1], plain, rtol=1e-12)
    assert (mine[:, -1] == 40).all()
    who = np.array(["a"] * 30 + ["b"] * 10)
    two = poster_bootstrap_sums(v, who, 200, np.random.default_rng(5))
    assert set(np.unique(two[:, -1])) <= {20.0, 40.0, 60.0}  # two posters of 30 and 10 photos
    a, b = v[:30].sum(axis=0), v[30:].sum(axis=0)
    for row in two:  # every resample is a multiset of two whole posters
        k = {20.0: (0, 2), 40.0: (1, 1), 60.0: (2, 0)}[row[-1]]
        np.testing.assert_allclose(row[:-1], k[0] * a + k[1] * b)

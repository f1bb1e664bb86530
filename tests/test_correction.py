"""Corrected shares (explore/attributes/correction.py): PPI++ against outside references.

- The authors' reference implementation ``ppi_py.ppi_mean_ci`` (PyPI
  ``ppi-python``, Angelopoulos et al.) for one stratum.
- A hand computation of a four-image stratum.
- A simulation where the truth is known: coverage of the 95 % interval for
  strong, useless and biased models, prevalence near 0 and near 0.5, with 8
  labels per stratum as in the demo.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from explore.attributes import correction as C
from explore.attributes.intervals import Z95


def test_one_stratum_matches_ppi_py_reference_implementation():
    # Reference: ppi_py.ppi_mean_ci (Angelopoulos, Bates, Fannjiang, Jordan & Zrnic 2023;
    # PPI++ power tuning, Angelopoulos, Duchi & Zrnic 2023). ppi_py uses population
    # standard deviations (ddof 0) and a separate unlabelled set; with the floor off and
    # ddof 0 our stratum formula must give its interval exactly for a fixed lambda.
    from ppi_py import ppi_mean_ci

    rng = np.random.default_rng(3)
    N, n = 2000, 150
    truth = rng.random(N) < 0.3
    f_unl = np.clip(0.2 + 0.5 * truth + rng.normal(0, 0.3, N), 0, 1)
    y = (rng.random(n) < 0.3).astype(float)
    f_lab = np.clip(0.2 + 0.5 * y + rng.normal(0, 0.3, n), 0, 1)
    for lam in (0.0, 0.4, 1.0):
        est, var = C.stratum_estimate(C.Stratum(f_unl, f_lab, y), lam, floor=False, ddof=0)
        lo, hi = ppi_mean_ci(y, f_lab, f_unl, alpha=0.05, lam=lam)
        assert est - Z95 * np.sqrt(var) == pytest.approx(float(np.ravel(lo)[0]), abs=1e-4)
        assert est + Z95 * np.sqrt(var) == pytest.approx(float(np.ravel(hi)[0]), abs=1e-4)
    # lambda: ppi_py tunes it inside ppi_mean_ci (its variance of f pools labelled and
    # unlabelled predictions, ours the stratum's images); with N >> n they agree closely,
    # so the tuned intervals agree too.
    lam = C.ppi_lambda([C.Stratum(f_unl, f_lab, y)])
    est, var = C.stratum_estimate(C.Stratum(f_unl, f_lab, y), lam, floor=False, ddof=0)
    lo, hi = ppi_mean_ci(y, f_lab, f_unl, alpha=0.05)
    assert 0 < lam < 1
    assert est - Z95 * np.sqrt(var) == pytest.approx(float(np.ravel(lo)[0]), abs=2e-3)
    assert est + Z95 * np.sqrt(var) == pytest.approx(float(np.ravel(hi)[0]), abs=2e-3)


def test_four_image_stratum_by_hand():
    # Worked by hand: f = (0.2, 0.4, 0.6, 0.8), the 1st and 4th labelled y = (0, 1), lambda 0.5.
    # mean_N f = 0.5; residuals lambda f - y = (0.1, -0.6), mean -0.25; estimate 0.25 + 0.25 = 0.5.
    # var_N f (ddof 1) = (0.09 + 0.01 + 0.01 + 0.09) / 3 = 0.2/3; lambda^2 var/N = 0.25 * 0.0667 / 4
    # = 0.0041667; var of residuals (ddof 1) = 2 * 0.35^2 = 0.245, / n = 0.1225. Total 0.1266667.
    s = C.Stratum(np.array([0.2, 0.4, 0.6, 0.8]), np.array([0.2, 0.8]), np.array([0.0, 1.0]))
    est, var = C.stratum_estimate(s, 0.5, floor=False)
    assert est == pytest.approx(0.5)
    assert var == pytest.approx(0.2 / 3 * 0.25 / 4 + 0.245 / 2)
    # Floor: Agresti-Coull centre p~ = (1 + z^2/2) / (2 + z^2) = 0.5, p~(1 - p~) = 0.25 > 0.245.
    _, floored = C.stratum_estimate(s, 0.5, r2=0.0)
    assert floored == pytest.approx(0.2 / 3 * 0.25 / 4 + 0.25 / 2)
    # The rectifier's sign: a model that over-calls by 0.3 everywhere is pulled back down.
    s2 = C.Stratum(np.full(10, 0.6), np.full(5, 0.6), np.array([0, 0, 1, 0, 1.0]))
    est2, _ = C.stratum_estimate(s2, 1.0, floor=False)
    assert est2 == pytest.approx(0.4)
    # Two strata weighted by image counts (stratified estimate): 3:1.
    e, lo, hi = C.combine([(0.2, 0.01), (0.6, 0.04)], [30, 10])
    assert e == pytest.approx(0.3)
    assert hi - e == pytest.approx(Z95 * np.sqrt(0.75**2 * 0.01 + 0.25**2 * 0.04))


def _simulate(rng, p_strata, model, n_label=8, N=45):
    """One brand: strata of N images with planted 0/1 content, model probabilities, n random labels."""
    strata, truth = [], []
    for p in p_strata:
        y_all = (rng.random(N) < p).astype(float)
        if model == "strong":  # AUC about 0.9, over-calls (biased up)
            f = 1 / (1 + np.exp(-(2.5 * y_all - 0.8 + rng.normal(0, 1.0, N))))
        elif model == "useless":  # unrelated to the content
            f = rng.random(N)
        else:  # "biased": weakly informative, calls most images positive
            f = 1 / (1 + np.exp(-(0.8 * y_all + 1.5 + rng.normal(0, 1.0, N))))
        pick = rng.choice(N, size=n_label, replace=False)
        strata.append(C.Stratum(f, f[pick], y_all[pick]))
        truth.append(y_all.mean())
    return strata, float(np.mean(truth))


def _coverage(scenario, reps=400, seed=0, mutate=None):
    rng = np.random.default_rng(seed)
    p_strata, model = scenario
    hits, widths, widths0, narrower_at_zero = 0, [], [], 0
    for _ in range(reps):
        # 6 brands share one lambda, as one attribute does in a study
        brands = [_simulate(rng, p_strata, model) for _ in range(6)]
        all_strata = [s for strata, _ in brands for s in strata]
        lam, r2, _ = C.attribute_lambda(all_strata)
        strata, truth = brands[0]
        if mutate == "sign":
            parts = [(lam * s.f_all.mean() + (lam * s.f_labelled - s.y).mean(),
                      C.stratum_estimate(s, lam, r2=r2)[1]) for s in strata]
        elif mutate == "no_label_term":
            parts = [(C.stratum_estimate(s, lam, r2=r2)[0], lam**2 * s.f_all.var(ddof=1) / len(s.f_all))
                     for s in strata]
        else:
            parts = [C.stratum_estimate(s, lam, r2=r2) for s in strata]
        e, lo, hi = C.combine(parts, [len(s.f_all) for s in strata])
        _, lo0, hi0 = C.combine([C.stratum_estimate(s, 0.0) for s in strata], [len(s.f_all) for s in strata])
        hits += lo <= truth <= hi
        narrower_at_zero += lam == 0 and hi - lo < hi0 - lo0 - 1e-12
        widths.append(hi - lo)
        widths0.append(hi0 - lo0)
    if mutate is None:
        assert narrower_at_zero == 0  # lambda 0 (not shown to beat chance): exactly the labels-alone interval
    return hits / reps, float(np.mean(widths)), float(np.mean(widths0))


SCENARIOS = {
    "strong model, rare (0.05, 0.15)": ((0.05, 0.15), "strong"),
    "strong model, common (0.4, 0.6)": ((0.4, 0.6), "strong"),
    "useless model (0.3, 0.5)": ((0.3, 0.5), "useless"),
    "biased model, near 0 (0.02, 0.0)": ((0.02, 0.0), "biased"),
}


def test_interval_covers_the_truth_in_simulation():
    """8 random labels per stratum, 2 strata per brand, 6 brands per attribute: the
    95 % interval of a brand's corrected share covers the planted share at least
    93 % of the time (400 draws: the Monte Carlo sd at 95 % is 1.1 points)."""
    print()
    for name, scenario in SCENARIOS.items():
        cover, width, width0 = _coverage(scenario)
        print(f"  {name:<34} coverage {cover:.3f}  mean width {width:.3f} (labels alone {width0:.3f})")
        assert cover >= 0.93, name
        if scenario[1] == "useless":  # passes the AUC gate in about 5 % of draws only
            assert width >= width0 - 0.01
        if scenario[1] == "strong":
            assert width < width0  # a strong model earns its place


@pytest.mark.parametrize("mutation", ["sign", "no_label_term"])
def test_plausible_bugs_break_coverage(mutation):
    """The coverage test bites: a flipped rectifier sign, or a variance without the
    labelled sample's term, loses coverage in at least one scenario."""
    worst = min(_coverage(s, reps=200, mutate=mutation)[0] for s in SCENARIOS.values())
    assert worst < 0.85


def test_useless_model_gets_labels_only_interval():
    rng = np.random.default_rng(1)
    images = pd.DataFrame({
        "image_id": [f"i{k}" for k in range(400)],
        "brand": np.repeat(["A", "B"], 200), "category": "c",
        "source": np.tile(np.repeat(["consumer", "owned"], 100), 2),
    })
    truth = (rng.random(400) < 0.3).astype(int)
    probs = pd.DataFrame({"image_id": images.image_id, "attribute": "x", "probability": rng.random(400)})
    pick = rng.choice(400, 80, replace=False)
    labels = pd.DataFrame({"image_id": images.image_id[pick], "attribute": "x", "label": truth[pick]})
    got = C.corrected_shares(probs, images, labels)
    if got["label_auc_low"].iloc[0] <= 0.5:  # not shown to beat chance (the likely case)
        assert (got["share_lambda"] == 0).all()
        assert np.allclose(got["share_high"] - got["share_low"], got["labels_only_high"] - got["labels_only_low"])
        assert (got["share_method"] == C.METHOD_LABELS_ONLY).all()
    brand_all = got[(got.level == "brand") & (got.source == "all")]
    assert set(brand_all.brand) == {"A", "B"} and (brand_all.labels_used > 0).all()
    gaps = C.corrected_gaps(probs, images, labels)
    assert len(gaps) == 2 and gaps["share_gap_low"].lt(gaps["share_gap_high"]).all()

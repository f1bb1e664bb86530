"""Checks of the attribute statistics against outside sources, written to catch plausible bugs.

Each test below fails under one of the mutations in ``tests/mutations.py``
(DeLong standard error halved, doubled or missing a class's term; the probe
scored in-sample; the stratified bootstrap replaced by one cell's; Mann-Whitney's
direction reversed). The sources are named beside each check.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm

from explore import attributes as A
from explore.study import Attribute

# Hanley & McNeil (1982), Radiology 143:29-36, Table 1: CT ratings (1 = definitely
# normal ... 5 = definitely abnormal) of 58 normal and 51 abnormal patients.
# Published: AUC 0.893 with standard error 0.032 (from memory of the paper).
HM_NORMAL = np.repeat([1, 2, 3, 4, 5], [33, 6, 6, 11, 2])
HM_ABNORMAL = np.repeat([1, 2, 3, 4, 5], [3, 2, 2, 11, 33])


def _delong_by_definition(labels, scores):
    """DeLong, DeLong & Clarke-Pearson (1988) variance from its definition, pair by pair."""
    y = np.asarray(labels).astype(bool)
    x, z = scores[y], scores[~y]
    psi = (x[:, None] > z[None, :]) + 0.5 * (x[:, None] == z[None, :])
    v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
    return psi.mean(), np.sqrt(v10.var(ddof=1) / len(x) + v01.var(ddof=1) / len(z))


def test_delong_interval_against_hanley_mcneil_and_the_definition():
    labels = np.r_[np.zeros(len(HM_NORMAL)), np.ones(len(HM_ABNORMAL))]
    scores = np.r_[HM_NORMAL, HM_ABNORMAL].astype(float)
    auc, low, high = A.auc_interval(labels, scores)
    se = (high - low) / (2 * A.Z95)
    assert auc == pytest.approx(0.893, abs=0.0005)  # Hanley & McNeil (1982), published
    assert se == pytest.approx(0.032, rel=0.10)  # their SE (their own approximation, close to DeLong)
    ref_auc, ref_se = _delong_by_definition(labels, scores)  # independent pairwise computation
    assert auc == pytest.approx(ref_auc, rel=1e-12)
    assert se == pytest.approx(ref_se, rel=1e-9)


def test_delong_needs_both_class_terms_on_unbalanced_data():
    # With few negatives, dropping either class's term changes the SE a lot.
    rng = np.random.default_rng(9)
    labels = np.r_[np.ones(80), np.zeros(15)]
    scores = np.r_[rng.normal(1.0, 1, 80), rng.normal(0, 1, 15)]
    auc, low, high = A.auc_interval(labels, scores)
    ref_auc, ref_se = _delong_by_definition(labels, scores)
    assert (high - low) / (2 * A.Z95) == pytest.approx(ref_se, rel=1e-9)


class _TinyTextEncoder:
    """Deterministic text vectors from a hash, enough for prompt pairs."""

    id = "tiny-test"
    logit_scale = 10.0
    logit_bias = 0.0

    def encode_texts(self, texts):
        import zlib

        out = np.stack([np.random.default_rng(zlib.crc32(t.encode())).normal(size=24) for t in texts])
        return (out / np.linalg.norm(out, axis=1, keepdims=True)).astype(np.float32)


def _planted(n_pos=30, n_neg=40, signal=0.25, seed=1):
    enc = _TinyTextEncoder()
    attr = Attribute("sunny", ["bright sunshine"], ["grey overcast"])
    vec = A.attribute_vectors(attr, ["{}"], enc.encode_texts)
    rng = np.random.default_rng(seed)
    y = np.r_[np.ones(n_pos, int), np.zeros(n_neg, int)]
    direction = vec.positive - vec.negative
    joint = rng.normal(scale=0.1, size=(len(y), 24)) + signal * (y[:, None] - 0.5) * direction
    joint /= np.linalg.norm(joint, axis=1, keepdims=True)
    return enc, attr, vec, y, joint


def test_mann_whitney_direction_against_the_normal_approximation():
    # Mann & Whitney (1947): U = AUC n1 n0; positives scoring higher gives a small
    # one-sided p. Normal approximation with continuity correction computed here
    # (scipy's asymptotic method with no ties is the same formula).
    enc, attr, vec, y, joint = _planted()
    result = A.check_attribute(attr, vec, y, joint, joint, enc, 0.5, "study", seed=0)
    n1, n0 = int(y.sum()), int(len(y) - y.sum())
    u = result.auc * n1 * n0
    z = (u - n1 * n0 / 2 - 0.5) / np.sqrt(n1 * n0 * (n1 + n0 + 1) / 12)
    assert result.auc > 0.7
    assert result.mann_whitney_p == pytest.approx(norm.sf(z), rel=1e-6)
    assert result.mann_whitney_p < 0.01


def test_probe_auc_is_cross_validated_not_in_sample():
    # Pure-noise vectors with 200 dimensions and 60 labels: any probe fits the
    # labels in-sample (AUC 1), but out of fold it is near chance (common practice:
    # cross-validate a few-shot probe; Hastie, Tibshirani & Friedman, ESL 7.10).
    rng = np.random.default_rng(3)
    vectors = rng.normal(size=(60, 200))
    labels = np.r_[np.ones(30, int), np.zeros(30, int)]
    cv_probabilities, probe = A.fit_probe(vectors, labels, seed=0)
    from sklearn.metrics import roc_auc_score

    assert roc_auc_score(labels, cv_probabilities) < 0.75
    in_sample = 1 / (1 + np.exp(-(vectors @ np.array(probe["coef"]) + probe["intercept"])))
    assert roc_auc_score(labels, in_sample) > 0.95  # the fitted model itself does overfit


def test_category_bootstrap_is_stratified_over_brand_cells():
    # A category of two brands with very different mean probabilities: the
    # category's percentile interval must be centred on the pooled mean and be
    # about as wide as the stratified standard error says (independent computation:
    # var = sum n_c^2 s_c^2 / n_c / n^2; Efron & Tibshirani 1993, stratified bootstrap).
    rng = np.random.default_rng(4)
    rows, calls = [], []
    for brand, mean, n in (("Low", 0.2, 60), ("High", 0.8, 40)):
        for i in range(n):
            image_id = f"{brand}{i}"
            rows.append((image_id, brand, "c", "consumer"))
            calls.append((image_id, "x", float(np.clip(rng.normal(mean, 0.1), 0, 1))))
    images = pd.DataFrame(rows, columns=["image_id", "brand", "category", "source"])
    ia = pd.DataFrame(calls, columns=["image_id", "attribute", "probability"])
    ia["positive"] = ia["probability"] >= 0.5
    defs = pd.DataFrame({"attribute": ["x"], "threshold": [0.5], "encoder_id": ["t"]})
    shares = A.attribute_shares(ia, images, defs, bootstrap_samples=2000, seed=1)
    row = shares[(shares["level"] == "category") & (shares["source"] == "consumer")].iloc[0]
    p = ia["probability"].to_numpy()
    se = np.sqrt(sum((len(g) ** 2) * g.var(ddof=1) / len(g) for g in (p[:60], p[60:]))) / 100
    assert row["mean_low"] < row["mean_probability"] < row["mean_high"]
    assert (row["mean_high"] - row["mean_low"]) / (2 * A.Z95) == pytest.approx(se, rel=0.15)

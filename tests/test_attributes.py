"""Attributes: prompt ensembling, probabilities, intervals, brand tables, the label check.

Every numeric check names its outside reference beside it.
"""

from __future__ import annotations

import zlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from explore import attributes as A
from explore.study import Attribute, ScoringSettings, StudyError


class HashTextEncoder:
    """A stand-in text encoder: each text maps to a fixed random unit vector."""

    def __init__(self, dim: int = 32, scale: float = 20.0, bias: float = 0.0, id: str = "test-encoder"):
        self.dim, self.logit_scale, self.logit_bias, self.id = dim, scale, bias, id
        self.family = "test"

    def encode_texts(self, texts):
        rows = []
        for t in texts:
            v = np.random.default_rng(zlib.crc32(t.encode())).normal(size=self.dim)
            rows.append(v / np.linalg.norm(v))
        return np.asarray(rows, dtype=np.float32)


def _unit(x):
    x = np.asarray(x, dtype=np.float64)
    return (x / np.linalg.norm(x, axis=-1, keepdims=True)).astype(np.float32)


# --------------------------------------------------------------------------
# Intervals


@pytest.mark.parametrize("count,n", [(0, 10), (3, 10), (10, 10), (57, 200), (1, 1), (499, 1000)])
def test_wilson_matches_statsmodels(count, n):
    from statsmodels.stats.proportion import proportion_confint

    low, high = A.wilson_interval(count, n)
    # Reference: statsmodels.stats.proportion.proportion_confint(method="wilson") (Wilson 1927).
    ref_low, ref_high = proportion_confint(count, n, alpha=0.05, method="wilson")
    assert low == pytest.approx(ref_low, abs=1e-12)
    assert high == pytest.approx(ref_high, abs=1e-12)


def test_wilson_vectorised_and_empty_group():
    low, high = A.wilson_interval(np.array([0, 5, 9]), np.array([4, 10, 9]))
    assert low.shape == (3,) and np.all(low <= np.array([0, 0.5, 1])) and np.all(high >= [0, 0.5, 1])
    assert np.isnan(A.wilson_interval(0, 0)[0])


@pytest.mark.parametrize(
    "c1,n1,c2,n2",
    [(3, 10, 7, 12), (0, 20, 5, 30), (40, 50, 40, 50), (10, 10, 0, 5), (56, 70, 48, 80), (9, 10, 3, 10)],
)
def test_newcombe_matches_statsmodels(c1, n1, c2, n2):
    from statsmodels.stats.proportion import confint_proportions_2indep

    low, high = A.newcombe_interval(c1, n1, c2, n2)
    # Reference: statsmodels confint_proportions_2indep(method="newcomb", compare="diff"),
    # Newcombe (1998) hybrid score interval (method 10).
    ref_low, ref_high = confint_proportions_2indep(c1, n1, c2, n2, method="newcomb", compare="diff", alpha=0.05)
    assert low == pytest.approx(ref_low, abs=1e-12)
    assert high == pytest.approx(ref_high, abs=1e-12)


def test_newcombe_worked_example():
    # Newcombe (1998), Table II example (a): 56/70 vs 48/80, hybrid score interval
    # 0.0524 to 0.3339 (values from the paper, as recalled from memory; statsmodels agrees above).
    low, high = A.newcombe_interval(56, 70, 48, 80)
    assert (round(float(low), 4), round(float(high), 4)) == (0.0524, 0.3339)


def test_bootstrap_interval_is_seeded_and_agrees_with_scipy():
    from scipy.stats import bootstrap

    values = np.random.default_rng(3).beta(2, 5, size=400)
    a = A.bootstrap_mean_interval(values, 2000, np.random.default_rng(7))
    b = A.bootstrap_mean_interval(values, 2000, np.random.default_rng(7))
    assert a == b  # same seed, same interval
    # Reference: scipy.stats.bootstrap(method="percentile") on the same data; different
    # resamples, so the bounds agree to Monte Carlo error only.
    ref = bootstrap((values,), np.mean, n_resamples=2000, method="percentile", random_state=1).confidence_interval
    assert a[0] == pytest.approx(ref.low, abs=0.004)
    assert a[1] == pytest.approx(ref.high, abs=0.004)
    assert a[0] < values.mean() < a[1]


def test_bootstrap_columns_share_resamples_in_chunks():
    values = np.random.default_rng(0).random((50, 3))
    whole = A.bootstrap_mean_interval(values, 300, np.random.default_rng(1))
    # A column bootstrapped alone sees the same resamples when the chunks are equal.
    col = A.bootstrap_mean_interval(values[:, 1], 300, np.random.default_rng(1))
    assert whole[0][1] == pytest.approx(col[0]) and whole[1][1] == pytest.approx(col[1])
    small_chunks = A.bootstrap_mean_interval(values, 300, np.random.default_rng(1), chunk_elements=100)
    assert np.all(small_chunks[0] < values.mean(axis=0)) and np.all(small_chunks[1] > values.mean(axis=0))


# --------------------------------------------------------------------------
# ROC, thresholds, reliability


def test_auc_matches_sklearn_and_mann_whitney():
    from scipy.stats import mannwhitneyu
    from sklearn.metrics import roc_auc_score

    rng = np.random.default_rng(0)
    y = rng.integers(0, 2, 300)
    s = np.round(rng.random(300) + 0.3 * y, 2)  # rounded: many ties
    # Reference: sklearn.metrics.roc_auc_score; and U / (n1 n0) from scipy.stats.mannwhitneyu.
    assert A.roc_auc(y, s) == pytest.approx(roc_auc_score(y, s), abs=1e-12)
    u = mannwhitneyu(s[y == 1], s[y == 0]).statistic
    assert A.roc_auc(y, s) == pytest.approx(u / (y.sum() * (1 - y).sum()), abs=1e-12)
    auc, low, high = A.auc_interval(y, s)
    assert auc == pytest.approx(roc_auc_score(y, s)) and low < auc < high


def test_roc_points_and_youden_agree_with_sklearn():
    from sklearn.metrics import roc_curve

    rng = np.random.default_rng(1)
    for trial in range(5):
        y = rng.integers(0, 2, 200)
        s = np.round(rng.normal(size=200) + y * rng.uniform(0.2, 2), 1)
        # Reference: sklearn.metrics.roc_curve (every threshold kept).
        fpr, tpr, th = roc_curve(y, s, drop_intermediate=False)
        ours = A.roc_points(y, s)
        np.testing.assert_allclose(ours[0], fpr[1:])
        np.testing.assert_allclose(ours[1], tpr[1:])
        np.testing.assert_allclose(ours[2], th[1:])
        # Youden's J from sklearn's default (intermediate points dropped) curve.
        fpr, tpr, th = roc_curve(y, s)
        k = int(np.argmax(tpr - fpr))
        threshold, j = A.youden_threshold(y, s)
        assert threshold == pytest.approx(th[k]) and j == pytest.approx(tpr[k] - fpr[k])
        assert A.accuracy_at(y, s, threshold) == pytest.approx(np.mean((s >= th[k]) == y))
        # The midpoint variant sits between that score and the next lower one: same calls.
        middle, j_mid = A.youden_threshold(y, s, midpoint=True)
        below = s[s < th[k]]
        assert j_mid == pytest.approx(j) and (below.size == 0 or below.max() < middle <= th[k])
        assert np.array_equal(s >= middle, s >= th[k])


def test_reliability_table_matches_sklearn_calibration_curve():
    from sklearn.calibration import calibration_curve

    rng = np.random.default_rng(2)
    p = np.round(rng.random(500), 2)  # values on bin edges included
    y = (rng.random(500) < p).astype(int)
    table = A.reliability_table(y, p, bins=10)
    # Reference: sklearn.calibration.calibration_curve(strategy="uniform").
    observed, predicted = calibration_curve(y, p, n_bins=10, strategy="uniform")
    np.testing.assert_allclose(table["observed"], observed)
    np.testing.assert_allclose(table["mean_predicted"], predicted)
    assert table["n"].sum() == 500


# --------------------------------------------------------------------------
# Prompts and probabilities


def test_prompt_ensembling_and_probabilities_by_hand():
    enc = HashTextEncoder()
    attr = Attribute("sunny", ["bright sunshine", "clear sky"], ["overcast", "rain", "fog"])
    templates = ["a photo of {}", "{}"]
    vec = A.attribute_vectors(attr, templates, enc.encode_texts)
    assert vec.positive_prompts == ["a photo of bright sunshine", "bright sunshine", "a photo of clear sky", "clear sky"]
    assert len(vec.negative_prompts) == 6 and len(vec.descriptions) == 5
    # Radford et al. 2021 prompt ensembling: mean of normalised text vectors, renormalised.
    expected = enc.encode_texts(vec.positive_prompts).mean(axis=0)
    np.testing.assert_allclose(vec.positive, expected / np.linalg.norm(expected), atol=1e-6)
    images = _unit(np.random.default_rng(0).normal(size=(20, 32)))
    p = A.pair_probabilities(images, vec.positive, vec.negative, scale=enc.logit_scale, bias=0.3)
    # Two-way softmax of scaled cosine similarities (Radford et al. 2021), plus the bias.
    logits = np.stack([enc.logit_scale * images @ vec.positive + 0.3, enc.logit_scale * images @ vec.negative], 1)
    soft = np.exp(logits - logits.max(1, keepdims=True))
    np.testing.assert_allclose(p, soft[:, 0] / soft.sum(1), rtol=1e-5)
    # Extreme logits neither overflow nor leave [0, 1].
    big = A.pair_probabilities(images, vec.positive, vec.negative, scale=1e5)
    assert np.all((big >= 0) & (big <= 1)) and not np.isnan(big).any()


def test_platt_common_slope_recovers_a_planted_scale_and_matches_statsmodels():
    import statsmodels.api as sm

    rng = np.random.default_rng(9)
    margins, labels = [], []
    for offset in (-0.05, 0.0, 0.08):  # three prompt pairs, each with its own offset
        m = rng.normal(0, 0.1, 2000)
        labels.append((rng.random(2000) < 1 / (1 + np.exp(-(12.0 * m + offset * 12.0)))).astype(int))
        margins.append(m)
    slope = A.platt_common_slope(margins, labels)
    # Reference: statsmodels Logit maximum likelihood on the same design (slope + one
    # intercept per pair); and the planted slope 12 within sampling error.
    design = np.zeros((6000, 4))
    design[:, 0] = np.concatenate(margins)
    for i in range(3):
        design[i * 2000:(i + 1) * 2000, i + 1] = 1
    ref = sm.Logit(np.concatenate(labels), design).fit(disp=0)
    assert slope == pytest.approx(ref.params[0], rel=1e-3)
    assert slope == pytest.approx(12.0, abs=3 * ref.bse[0])


def test_bundled_bias_puts_a_neutral_image_at_one_half_and_keeps_side_symmetry():
    from explore.encoders.bundled import BUNDLED_LOGIT_BIAS, BUNDLED_LOGIT_SCALE

    class ConseLike(HashTextEncoder):
        def label_embeddings(self):
            return self.encode_texts([f"class {i}" for i in range(50)])

    enc = ConseLike(dim=16, scale=BUNDLED_LOGIT_SCALE, bias=BUNDLED_LOGIT_BIAS)
    enc.family = "bundled"
    neutral = A.neutral_vector(enc)
    mean = enc.label_embeddings().mean(axis=0)
    np.testing.assert_allclose(neutral, mean / np.linalg.norm(mean), atol=1e-6)
    attr = Attribute("sunny", ["bright sunshine"], ["grey overcast"])
    flipped = Attribute("gloomy", ["grey overcast"], ["bright sunshine"])
    vec, vec_flipped = (A.attribute_vectors(a, ["{}"], enc.encode_texts) for a in (attr, flipped))
    images = np.vstack([neutral, _unit(np.random.default_rng(1).normal(size=(30, 16)))])
    p = A.pair_probabilities(images, vec.positive, vec.negative, enc.logit_scale, A.attribute_bias(enc, vec, neutral))
    q = A.pair_probabilities(images, vec_flipped.positive, vec_flipped.negative, enc.logit_scale,
                             A.attribute_bias(enc, vec_flipped, neutral))
    assert p[0] == pytest.approx(0.5, abs=1e-6)  # the uninformative image sits on the fence
    # A two-way softmax is symmetric in its two classes (Radford et al. 2021 scoring): swapping
    # the sides gives 1 - p.
    np.testing.assert_allclose(p + q, 1.0, atol=1e-6)
    # The encoder's own bias is all there is for a family without a neutral vector (clip).
    assert A.neutral_vector(HashTextEncoder()) is None
    assert A.attribute_bias(HashTextEncoder(bias=0.25), vec, None) == 0.25


@pytest.fixture(scope="module")
def random_open_clip():
    """The smallest ViT config in open_clip, random weights (nothing downloaded)."""
    import open_clip
    import torch

    torch.manual_seed(0)
    model, _, preprocess = open_clip.create_model_and_transforms("ViT-S-32", pretrained=None)
    model.eval()
    return model, preprocess, open_clip.get_tokenizer("ViT-S-32")


def test_probabilities_equal_open_clip_direct_computation(random_open_clip):
    import torch

    model, _, tokenizer = random_open_clip
    attr = Attribute("rugged", ["rugged and tough", "muddy outdoors"], ["delicate and polished"])
    templates = ["a photo that feels {}", "{}"]
    torch.manual_seed(1)
    pixels = torch.rand(6, 3, 224, 224)

    # Reference: open_clip's own encode_image / encode_text on the same model; normalise,
    # ensemble each side (Radford et al. 2021), scale by exp(logit_scale), softmax.
    with torch.no_grad():
        img = model.encode_image(pixels)
        img = img / img.norm(dim=-1, keepdim=True)
        sides = []
        for texts in (attr.positive, attr.negative):
            t = model.encode_text(tokenizer([tpl.format(d) for d in texts for tpl in templates]))
            t = t / t.norm(dim=-1, keepdim=True)
            m = t.mean(dim=0)
            sides.append(m / m.norm())
        logits = model.logit_scale.exp() * img @ torch.stack(sides, dim=1)
        direct = logits.softmax(dim=-1)[:, 0].numpy()

    def encode_texts(texts):
        with torch.no_grad():
            t = model.encode_text(tokenizer(texts))
        return (t / t.norm(dim=-1, keepdim=True)).numpy()

    vec = A.attribute_vectors(attr, templates, encode_texts)
    ours = A.pair_probabilities(img.numpy(), vec.positive, vec.negative, float(model.logit_scale.exp().item()), 0.0)
    np.testing.assert_allclose(ours, direct, atol=1e-5)
    assert not np.allclose(ours, ours[0])  # the images really differ


def test_clip_encoder_scores_equal_open_clip_direct_computation(random_open_clip, tmp_path):
    """The whole path: our clip encoder loaded from a weights file, then attribute_tables."""
    import torch
    from PIL import Image

    from explore.encoders import load_encoder

    model, preprocess, tokenizer = random_open_clip
    weights = tmp_path / "random-vit-s-32.pt"
    torch.save(model.state_dict(), weights)
    encoder, _ = load_encoder("clip", model="ViT-S-32", weights=weights)
    assert encoder.logit_scale == pytest.approx(float(model.logit_scale.exp().item()))
    assert encoder.logit_bias == 0.0

    rng = np.random.default_rng(5)
    photos = [Image.fromarray(rng.integers(0, 256, (96, 128, 3), dtype=np.uint8)) for _ in range(4)]
    attr = Attribute("festive", ["a party with balloons"], ["a quiet empty office", "a grey wall"])
    templates = ["a photo that feels {}", "a picture that looks {}"]

    # Reference: open_clip's own preprocess / encode_image / encode_text, normalised, sides
    # ensembled (Radford et al. 2021), logits = exp(logit_scale) * cosines, softmax.
    with torch.no_grad():
        img = model.encode_image(torch.stack([preprocess(p) for p in photos]))
        img = img / img.norm(dim=-1, keepdim=True)
        sides = []
        for texts in (attr.positive, attr.negative):
            t = model.encode_text(tokenizer([tpl.format(d) for d in texts for tpl in templates]))
            t = t / t.norm(dim=-1, keepdim=True)
            sides.append(t.mean(dim=0) / t.mean(dim=0).norm())
        direct = (model.logit_scale.exp() * img @ torch.stack(sides, 1)).softmax(dim=-1)[:, 0].numpy()

    joint = encoder.encode_images(torch.stack([encoder.preprocess(p) for p in photos]))["joint"]
    images = pd.DataFrame({"image_id": list("abcd"), "brand": "B", "category": "c", "source": "consumer", "status": "ok"})
    scoring = ScoringSettings(templates=templates, bootstrap_samples=10)
    tables, _ = A.attribute_tables(images, list("abcd"), joint, joint, [attr], scoring, encoder)
    np.testing.assert_allclose(tables["image_attributes"].probability, direct, atol=1e-5)


# --------------------------------------------------------------------------
# Brand tables


def _toy_study_tables(seed=0):
    """Two brands in one category; brand A's consumer photos lean positive."""
    rng = np.random.default_rng(seed)
    rows = []
    spec = {("A", "consumer"): 120, ("A", "owned"): 80, ("B", "consumer"): 100, ("B", "owned"): 60}
    for (brand, source), n in spec.items():
        for i in range(n):
            rows.append((f"{brand}{source[0]}{i:03d}", brand, "drinks", source, "ok"))
    images = pd.DataFrame(rows, columns=["image_id", "brand", "category", "source", "status"])
    enc = HashTextEncoder()
    attr = Attribute("sunny", ["bright sunshine"], ["grey overcast"])
    vec = A.attribute_vectors(attr, ["{}"], enc.encode_texts)
    direction = vec.positive - vec.negative
    lean = np.where((images.brand == "A") & (images.source == "consumer"), 0.08, -0.02)
    joint = _unit(rng.normal(scale=0.05, size=(len(images), 32)) + 0.5 * (vec.positive + vec.negative) + lean[:, None] * direction)
    return images, joint, enc, attr


def test_attribute_tables_counts_shares_and_gaps():
    images, joint, enc, attr = _toy_study_tables()
    ids = images.image_id.tolist()
    scoring = ScoringSettings(templates=["{}"], threshold=0.5, bootstrap_samples=200)
    tables, notes = A.attribute_tables(images, ids, joint, joint, [attr], scoring, enc, seed=5)
    assert notes == []
    long = tables["image_attributes"]
    assert list(long.columns) == ["image_id", "attribute", "probability", "positive", "zero_shot_probability"]
    assert len(long) == len(images)
    shares = tables["attribute_shares"]
    merged = long.merge(images, on="image_id")
    for (brand, source), frame in merged.groupby(["brand", "source"]):
        row = shares[(shares.level == "brand") & (shares.brand == brand) & (shares.source == source)].iloc[0]
        assert row.n == len(frame) and row.positives == frame.positive.sum()
        assert row.yes_rate == pytest.approx(frame.positive.mean())
        assert row.mean_probability == pytest.approx(frame.probability.mean(), rel=1e-5)
        assert row.yes_rate_low <= row.yes_rate <= row.yes_rate_high
        assert row.mean_low <= row.mean_probability <= row.mean_high
    # index = 100 x brand yes-rate / category yes-rate (DESIGN.md vocabulary; common marketing practice).
    a_consumer = shares[(shares.brand == "A") & (shares.source == "consumer")].iloc[0]
    cat_consumer = shares[(shares.level == "category") & (shares.source == "consumer")].iloc[0]
    assert a_consumer["yes_rate_index"] == pytest.approx(100 * a_consumer.yes_rate / cat_consumer.yes_rate)
    assert (shares[shares.level == "category"]["yes_rate_index"] == 100).all()
    cat_all = shares[(shares.level == "category") & (shares.source == "all")].iloc[0]
    assert cat_all.n == len(images) and cat_all.brand == ""
    assert cat_all.positives == long.positive.sum()
    assert set(shares.source) == {"consumer", "owned", "all"}
    assert (shares.encoder_id == enc.id).all() and (shares.threshold == 0.5).all()

    gaps = tables["attribute_gaps"].set_index("brand")
    a = shares[(shares.level == "brand") & (shares.brand == "A")].set_index("source")
    assert gaps.loc["A", "yes_rate_gap"] == pytest.approx(a.loc["consumer", "yes_rate"] - a.loc["owned", "yes_rate"])
    # The planted lean: brand A's consumer photos are more often positive than its own.
    assert gaps.loc["A", "yes_rate_gap"] > 0.3 and bool(gaps.loc["A", "significant"])
    # Brand B has no lean: its interval should contain 0.
    assert not bool(gaps.loc["B", "significant"])
    print(shares[shares.level == "brand"][["brand", "source", "n", "yes_rate", "yes_rate_low", "yes_rate_high"]])

    # A single brand x source cell is a plain percentile bootstrap of its mean probability.
    # Reference: scipy.stats.bootstrap(method="percentile"); other resamples, so to Monte Carlo error.
    from scipy.stats import bootstrap

    cell = merged[(merged.brand == "A") & (merged.source == "consumer")].probability.to_numpy(np.float64)
    ref = bootstrap((cell,), np.mean, n_resamples=5000, method="percentile", random_state=0).confidence_interval
    row = shares[(shares.level == "brand") & (shares.brand == "A") & (shares.source == "consumer")].iloc[0]
    spread = ref.high - ref.low
    assert row.mean_low == pytest.approx(ref.low, abs=0.1 * spread)
    assert row.mean_high == pytest.approx(ref.high, abs=0.1 * spread)

    # Seeded: the same study seed gives the same bootstrap bounds, another seed others.
    again, _ = A.attribute_tables(images, ids, joint, joint, [attr], scoring, enc, seed=5)
    pd.testing.assert_frame_equal(again["attribute_shares"], shares)
    other, _ = A.attribute_tables(images, ids, joint, joint, [attr], scoring, enc, seed=6)
    assert not np.allclose(other["attribute_shares"].mean_low, shares.mean_low)


def test_gap_row_kept_when_a_source_is_missing():
    images, joint, enc, attr = _toy_study_tables()
    keep = ~((images.brand == "B") & (images.source == "owned"))
    images, joint = images[keep].reset_index(drop=True), joint[keep.to_numpy()]
    scoring = ScoringSettings(templates=["{}"], bootstrap_samples=50)
    tables, _ = A.attribute_tables(images, images.image_id.tolist(), joint, joint, [attr], scoring, enc)
    b = tables["attribute_gaps"].set_index("brand").loc["B"]
    assert b.owned_n == 0 and np.isnan(b.yes_rate_gap) and not bool(b.significant)


def test_saved_check_threshold_and_probe_are_used_and_encoder_mismatch_ignored():
    images, joint, enc, attr = _toy_study_tables()
    ids = images.image_id.tolist()
    scoring = ScoringSettings(templates=["{}"], bootstrap_samples=20)
    vec = A.attribute_vectors(attr, ["{}"], enc.encode_texts)
    saved = {"sunny": {"encoder_id": enc.id, "prompts_digest": A.prompts_digest(vec), "threshold": 0.9}}
    tables, notes = A.attribute_tables(images, ids, joint, joint, [attr], scoring, enc, saved_checks=saved)
    d = tables["attribute_definitions"].iloc[0]
    assert d.threshold == 0.9 and d.threshold_from.startswith("check") and d.scored_by == "zero-shot"
    long = tables["image_attributes"]
    assert (long.positive == (long.probability >= 0.9)).all()

    w = np.zeros(32)
    w[0] = 50.0
    saved["sunny"]["probe"] = {"coef": w.tolist(), "intercept": 0.0, "threshold": 0.6, "vectors": "cluster"}
    tables, _ = A.attribute_tables(images, ids, joint, joint, [attr], scoring, enc, saved_checks=saved)
    long = tables["image_attributes"]
    np.testing.assert_allclose(long.probability, 1 / (1 + np.exp(-50.0 * joint[:, 0])), rtol=1e-5)
    assert tables["attribute_definitions"].iloc[0].scored_by == "probe"

    other = HashTextEncoder(id="another-encoder")
    tables, notes = A.attribute_tables(images, ids, joint, joint, [attr], scoring, other, saved_checks=saved)
    assert tables["attribute_definitions"].iloc[0].threshold == 0.5
    assert len(notes) == 1 and "sunny" in notes[0] and "another-encoder" in notes[0]


# --------------------------------------------------------------------------
# Checking against labels


def _labelled(n_pos, n_neg, signal, seed=0, dim=32):
    enc = HashTextEncoder(dim=dim)
    attr = Attribute("sunny", ["bright sunshine", "a clear sky"], ["grey overcast"])
    vec = A.attribute_vectors(attr, ["{}"], enc.encode_texts)
    rng = np.random.default_rng(seed)
    y = np.r_[np.ones(n_pos, int), np.zeros(n_neg, int)]
    direction = vec.positive - vec.negative
    joint = _unit(rng.normal(scale=0.1, size=(len(y), dim)) + signal * (y[:, None] - 0.5) * direction)
    return enc, attr, vec, y, joint


def test_check_on_random_labels_is_flagged_not_better_than_chance():
    enc, attr, vec, _, joint = _labelled(60, 60, signal=0.0, seed=4)
    flagged = 0
    for seed in range(5):
        y = np.random.default_rng(100 + seed).permutation(np.r_[np.ones(60, int), np.zeros(60, int)])
        result = A.check_attribute(attr, vec, y, joint, joint, enc, 0.5, "study", seed=seed)
        # A balanced binary attribute scores AUC 0.5 / accuracy 50 % by chance (common practice).
        assert abs(result.auc - 0.5) < 0.15
        flagged += not result.better_than_chance
        assert result.auc_low < result.auc < result.auc_high
    # A 95 % interval contains 0.5 in about 95 % of random labellings; all 5 here (seeded).
    assert flagged == 5
    assert "not shown to be better than chance" in result.describe()


def test_check_on_planted_labels_reports_everything_and_fits_a_probe():
    from sklearn.metrics import roc_auc_score

    enc, attr, vec, y, joint = _labelled(30, 40, signal=0.3, seed=1)
    result = A.check_attribute(attr, vec, y, joint, joint, enc, 0.5, "study", seed=0)
    p = A.pair_probabilities(joint, vec.positive, vec.negative, enc.logit_scale, enc.logit_bias)
    assert result.enough and result.better_than_chance
    assert result.auc == pytest.approx(roc_auc_score(y, p))  # reference: sklearn
    assert result.accuracy == pytest.approx(np.mean((p >= 0.5) == y))
    assert result.best_accuracy == pytest.approx(np.mean((p >= result.best_threshold) == y))
    assert result.youden_j > 0.3
    assert result.reliability["n"].sum() == len(y)
    assert set(result.descriptions.description) == {"bright sunshine", "a clear sky", "grey overcast"}
    assert result.descriptions.auc.is_monotonic_decreasing
    assert np.isfinite(result.probe_auc) and result.probe_auc > 0.8
    assert "probe" in result.record and len(result.record["probe"]["coef"]) == joint.shape[1]
    text = result.describe()
    assert "ROC AUC" in text and "Youden" in text and "linear probe" in text and "best single description" in text

    record, said = A.saved_record(result, save_threshold=False, save_probe=True)
    assert record["probe"]["vectors"] == "cluster" and "saved the linear probe" in said
    record, said = A.saved_record(result, save_threshold=True, save_probe=False)
    assert "probe" not in record and record["threshold"] == result.best_threshold


def test_check_between_thresholds_skips_probe_and_warns_with_too_few():
    enc, attr, vec, y, joint = _labelled(12, 15, signal=0.3)
    result = A.check_attribute(attr, vec, y, joint, joint, enc, 0.5, "study")
    assert result.enough and np.isnan(result.probe_auc) and "at least 20" in result.probe_note
    record, said = A.saved_record(result, save_threshold=False, save_probe=True)
    assert record is None and "nothing saved" in said

    enc, attr, vec, y, joint = _labelled(4, 30, signal=0.3)
    result = A.check_attribute(attr, vec, y, joint, joint, enc, 0.5, "study")
    assert not result.enough and np.isnan(result.auc)
    assert "WARNING: too few labels" in result.describe() and "ROC AUC" not in result.describe()


def test_read_labels_matches_ids_relpaths_and_paths(tmp_path):
    images = pd.DataFrame(
        {
            "image_id": ["id1", "id2", "id3", "id4"],
            "path": [str(tmp_path / f"A/consumer/{i}.jpg") for i in range(4)],
            "relpath": [f"A/consumer/{i}.jpg" for i in range(4)],
            "status": ["ok", "ok", "ok", "unreadable"],
        }
    )
    dup = pd.DataFrame({"image_id": ["id5"], "path": [str(tmp_path / "copy.jpg")], "relpath": ["copy.jpg"],
                        "status": ["duplicate"], "duplicate_of": ["id2"]})
    images = pd.concat([images, dup], ignore_index=True)
    table = pd.DataFrame(
        {
            "image": ["id1", "A/consumer/1.jpg", str(tmp_path / "A/consumer/2.jpg"), "id4", "nope.jpg", "id1"],
            "attribute": ["sunny"] * 6,
            "label": [1, 0, 1, 1, 0, 1],
        }
    )
    labels, warnings = A.read_labels(table, images, ["sunny"], where="labels.csv", base=tmp_path)
    assert labels.image_id.tolist() == ["id1", "id2", "id3"] and labels.label.tolist() == [1, 0, 1]
    # A label on a duplicate file goes to the kept copy.
    labels, _ = A.read_labels(pd.DataFrame({"image": ["copy.jpg"], "attribute": ["sunny"], "label": [0]}),
                              images, ["sunny"], "labels.csv")
    assert labels.image_id.tolist() == ["id2"]
    assert len(warnings) == 2 and "row 5" in warnings[0] and "unreadable" in warnings[0] and "row 6" in warnings[1]

    # Bad rows give a message naming the row; the good rows are kept (tests/test_labels.py has more).
    got, said = A.read_labels(table.assign(attribute=["rainy"] + ["sunny"] * 5), images, ["sunny"], "labels.csv")
    assert "labels.csv: row 2: attribute 'rainy' is not in the study" in said[0] and len(got) == 3
    got, said = A.read_labels(table.assign(label=[1, 2, 1, 1, 0, 1]), images, ["sunny"], "labels.csv")
    assert any("row 3: label '2' must be 0 or 1" in w for w in said) and got.image_id.tolist() == ["id1", "id3"]
    with pytest.raises(StudyError, match=r"missing column\(s\) label"):
        A.read_labels(table.drop(columns="label"), images, ["sunny"], "labels.csv")
    got, said = A.read_labels(table.assign(label=[1, 0, 1, 1, 0, 0]), images, ["sunny"], "labels.csv", base=tmp_path)
    assert any("rows 2, 7: image 'id1' has both labels 0 and 1 for attribute 'sunny'" in w for w in said)
    assert got.image_id.tolist() == ["id2", "id3"]


# --------------------------------------------------------------------------
# The one-line attribute syntax


def test_parse_attribute_spec():
    a = A.parse_attribute_spec("sunny: bright sunshine; a clear blue sky / grey overcast weather")
    assert a == Attribute("sunny", ["bright sunshine", "a clear blue sky"], ["grey overcast weather"])


@pytest.mark.parametrize(
    "spec,message",
    [
        ("sunny bright / dull", "no colon"),
        (": bright / dull", "empty name"),
        ("sunny: bright sunshine", "'sunny': expected exactly one '/'"),
        ("sunny: a / b / c", "'sunny': expected exactly one '/'"),
        ("sunny:  / grey", "'sunny' has no positive description"),
        ("sunny: bright / ", "'sunny' has no negative description"),
        ("sunny: bright;; sunny / grey", "'sunny' has an empty positive description"),
        ("sunny: bright {place} / grey", "'sunny': positive description 'bright {place}' contains a brace"),
    ],
)
def test_parse_attribute_spec_refusals_name_the_attribute(spec, message):
    with pytest.raises(StudyError, match=message.replace("(", r"\(").replace("{", r"\{").replace("}", r"\}")):
        A.parse_attribute_spec(spec)


def test_adding_a_duplicate_attribute_is_refused():
    existing = [Attribute("sunny", ["bright"], ["dull"])]
    with pytest.raises(StudyError, match="attribute 'sunny' is defined twice"):
        A.add_attributes(existing, [A.parse_attribute_spec("sunny: warm / cold")], "command line")


# --------------------------------------------------------------------------
# The check command end to end, bundled encoder, on a small tree of sample photos


@pytest.fixture(scope="module")
def labelled_tree(tmp_path_factory):
    """24 variants of scikit-image's cat photo (chelsea) and 24 of non-animal photos
    (coffee, rocket, grass, brick), split over two brands, with a labels CSV."""
    from PIL import Image
    from skimage import data

    root = tmp_path_factory.mktemp("labelled")
    rng = np.random.default_rng(0)
    others = [data.coffee(), data.rocket(), np.stack([data.grass()] * 3, -1), np.stack([data.brick()] * 3, -1)]
    rows = []
    for i in range(48):
        animal = i % 2 == 0
        brand, source = ("Alpha", "Beta")[i % 4 // 2], ("consumer", "owned")[i % 8 // 4]
        base = data.chelsea() if animal else others[(i // 2) % 4]
        h, w = base.shape[:2]
        top, left = rng.integers(0, h // 6), rng.integers(0, w // 6)
        crop = base[top:top + h * 5 // 6, left:left + w * 5 // 6].astype(float)
        crop = np.clip(crop * rng.uniform(0.8, 1.15) + rng.normal(0, 6, crop.shape), 0, 255).astype(np.uint8)
        if rng.random() < 0.5:
            crop = crop[:, ::-1]
        folder = root / "images" / brand / source
        folder.mkdir(parents=True, exist_ok=True)
        name = f"photo_{i:02d}.jpg"
        Image.fromarray(np.ascontiguousarray(crop)).save(folder / name, quality=90)
        rows.append((f"{brand}/{source}/{name}", "animal", int(animal)))
    pd.DataFrame(rows, columns=["image", "attribute", "label"]).to_csv(root / "labels.csv", index=False)
    (root / "study.toml").write_text(
        'name = "labelled"\noutput = "out"\n[images]\nroot = "images"\n'
        'near_duplicates = "keep"\n'  # the photos are deliberate variants of five photos
        'reposts = "keep"\n'  # so some consumer variants are near-copies of owned ones: count them all
        'commercial_posts = "keep"\n'  # crops of sample photos, some on plain ground: this test is about labels
        '[scoring]\nbootstrap_samples = 100\n'
        '[[attribute]]\nname = "animal"\npositive = ["an animal", "a pet cat"]\n'
        'negative = ["an object", "a landscape"]\n',
        encoding="utf-8",
    )
    return root


def test_check_command_reports_saves_and_reuses(labelled_tree, capsys):
    import json

    from explore.cli import main

    study, labels = str(labelled_tree / "study.toml"), str(labelled_tree / "labels.csv")
    code = main(["--quiet", "check", study, "--labels", labels, "--encoder", "bundled", "--save-probe",
                 "--attribute", "drink: a cup of coffee; a hot drink / an animal; a landscape"])
    printed = capsys.readouterr().out
    print(printed)
    assert code == 0
    assert "attribute 'animal': 48 labelled images (24 positive, 24 negative)" in printed
    summary = pd.read_csv(labelled_tree / "out" / "attribute_check.csv")
    row = summary.set_index("attribute").loc["animal"]
    # A cat photo against a cup, a rocket, grass and bricks: ImageNet's classifier knows cats,
    # so ConSE + the prompt pair must separate them far better than chance (0.5).
    assert row.auc > 0.9 and bool(row.better_than_chance)
    assert row.probe_auc > 0.9  # 24 per class: the probe was fitted
    # Youden (1950): J = max over thresholds of TPR - FPR. With AUC > 0.9 the best
    # threshold separates well (J well above 0; the worst threshold has J <= 0), and
    # with balanced classes accuracy = (TPR + 1 - FPR) / 2, so at the J-optimal
    # threshold it is (1 + J) / 2 and at least the accuracy at any other threshold.
    assert row.youden_j > 0.6
    assert row.best_accuracy == pytest.approx((1 + row.youden_j) / 2)
    assert row.best_accuracy >= row.accuracy
    assert "drink" not in set(summary.attribute)  # no labels for the ad-hoc attribute: not checked
    saved = json.loads((labelled_tree / "out" / "attribute_checks.json").read_text())
    assert saved["animal"]["encoder_id"].startswith("bundled") and len(saved["animal"]["probe"]["coef"]) == 1280

    # A second check starts from the saved zero-shot threshold, not the study default.
    assert main(["--quiet", "check", study, "--labels", labels, "--encoder", "bundled"]) == 0
    again = pd.read_csv(labelled_tree / "out" / "attribute_check.csv").iloc[0]
    assert again.threshold_from.startswith("check") and again.threshold == pytest.approx(row.best_threshold)

    # Later scoring of the study (the run's attributes stage) uses the saved probe.
    from explore import collect, embed
    from explore.encoders import load_encoder
    from explore.run import read_saved_checks
    from explore.study import load_study

    loaded = load_study(labelled_tree / "study.toml")
    images = collect.collect_study_images(loaded, progress=False)
    encoder, _ = load_encoder("bundled")
    vectors, stats = embed.embed_table(images, encoder, cache_dir=loaded.output / "cache", progress=False)
    assert stats.embedded == 0  # scoring never re-embeds: everything comes from the cache
    tables, notes = A.attribute_tables(images, vectors.image_ids, vectors.joint, vectors.cluster,
                                       loaded.attributes, loaded.scoring, encoder,
                                       saved_checks=read_saved_checks(loaded.output))
    definition = tables["attribute_definitions"].iloc[0]
    assert definition.scored_by == "probe" and definition.threshold_from == "check (probe, Youden J)"
    probe = saved["animal"]["probe"]
    expected = 1 / (1 + np.exp(-(vectors.cluster.astype(np.float64) @ np.array(probe["coef"]) + probe["intercept"])))
    np.testing.assert_allclose(tables["image_attributes"].probability, expected, rtol=1e-4, atol=1e-6)


def test_check_command_refuses_bad_inputs(labelled_tree, tmp_path, capsys):
    from explore.cli import main

    study = str(labelled_tree / "study.toml")
    bad = tmp_path / "bad.csv"
    bad.write_text("image,attribute,label\nAlpha/consumer/photo_00.jpg,glamorous,1\n", encoding="utf-8")
    assert main(["--quiet", "check", study, "--labels", str(bad), "--encoder", "bundled"]) == 2
    said = capsys.readouterr().err  # refused before collect, naming what the file and the study have
    assert "no label names an attribute of the study; the file names 'glamorous'; the study has 'animal'" in said
    # a file with one known attribute goes on; the unknown one is named up front and its rows left out
    mixed = tmp_path / "mixed.csv"
    mixed.write_text("image,attribute,label\nAlpha/consumer/photo_00.jpg,glamorous,1\n"
                     "Alpha/consumer/photo_00.jpg,animal,1\n", encoding="utf-8")
    main(["--quiet", "check", study, "--labels", str(mixed), "--encoder", "bundled"])
    said = capsys.readouterr()
    assert "attributes not in the study, their rows left out: 'glamorous' (1 row)" in said.out + said.err
    assert "row 2: attribute 'glamorous' is not in the study" in said.out + said.err
    # The one-line syntax is validated before any model loads; the message names the attribute.
    assert main(["--quiet", "run", study, "--attribute", "sunny: bright"]) == 2
    assert "--attribute 'sunny': expected exactly one '/'" in capsys.readouterr().err
    assert main(["--quiet", "run", study, "--attribute", "animal: furry / bald"]) == 2
    assert "attribute 'animal' is defined twice" in capsys.readouterr().err


def test_run_with_labels_writes_checks_corrected_shares_and_the_report(labelled_tree, capsys):
    """`explore run --labels`: one run checks, corrects and reports (bundled encoder; the
    vectors are cached by the check tests above, and their saved probe now scores the
    attribute, so this also runs the corrected shares' zero-shot rectifier end to end)."""
    from explore import collect
    from explore.attributes.sampling import random_sample
    from explore.cli import main
    from explore.study import load_study

    study_path = labelled_tree / "study.toml"
    study = load_study(study_path)
    images = collect.collect_study_images(study, progress=False)
    truth = pd.read_csv(labelled_tree / "labels.csv").set_index("image")["label"]
    sample = random_sample(images, 24, seed=5)
    rel = images.set_index("image_id")["relpath"]
    rows = pd.DataFrame({
        "image": sample.image_id, "attribute": "animal",
        "label": [int(truth[rel[i]]) for i in sample.image_id], "grade": "", "sample": "random",
        "stratum": sample.stratum, "stratum_size": sample.stratum_size, "drawn": sample.drawn, "seed": 5,
        "sheet": "t1",
    })
    path = labelled_tree / "random_labels.csv"
    rows.to_csv(path, index=False, sep=";")  # a semicolon file, as a spreadsheet may save it
    assert main(["--quiet", "run", str(study_path), "--labels", str(path), "--encoder", "bundled"]) == 0
    printed = capsys.readouterr().out
    assert "check: attribute 'animal': AUC" in printed and "corrected shares from" in printed
    out = study.output
    check = pd.read_csv(out / "attribute_check.csv").iloc[0]
    assert check.n == 24 and "24 random within brand x source (4 strata, seed 5, sheet t1)" in check.sampled
    shares = pd.read_parquet(out / "attribute_shares.parquet")
    brand = shares[(shares.level == "brand") & (shares.source == "all")].set_index("brand")
    assert brand["share"].notna().all() and (brand["labels_used"] == 12).all()
    # half of each brand's photos are cats (the fixture plants it): the intervals cover 0.5
    assert ((brand.share_low <= 0.5) & (0.5 <= brand.share_high)).all()
    gaps = pd.read_parquet(out / "attribute_gaps.parquet")  # rewritten after contexts: the corrected gap stays
    assert {"share_gap", "share_gap_low", "share_gap_high"} <= set(gaps.columns) and gaps["share_gap"].notna().all()
    report = (out / "report.html").read_text(encoding="utf-8")
    assert "checked against hand labels" in report and "Shown: corrected shares below" in report


# --------------------------------------------------------------------------
# The demo scenario (fictional brands, planted attribute levels), bundled encoder

DEMO = Path(__file__).resolve().parent.parent / "demo_images"
ATTRIBUTE_TABLES = ["image_attributes", "attribute_definitions", "attribute_shares", "attribute_gaps"]


@pytest.fixture(scope="module")
def demo_attributes(request):
    """(output folder of `explore demo --encoder bundled`, truth_images, truth_attributes)."""
    for name in ("truth_images.csv", "truth_attributes.csv"):
        if not (DEMO / name).is_file():
            pytest.skip(f"demo_images/{name} is missing (regenerate with demo_images/make_demo.py)")
    run = request.getfixturevalue("demo_run")  # tests/conftest.py: `explore demo --encoder bundled`
    folder = Path(getattr(run, "output", run))
    return folder, pd.read_csv(DEMO / "truth_images.csv"), pd.read_csv(DEMO / "truth_attributes.csv")


@pytest.mark.slow
def test_demo_writes_the_attribute_tables(demo_attributes):
    folder, truth, _ = demo_attributes
    tables = {name: pd.read_parquet(folder / f"{name}.parquet") for name in ATTRIBUTE_TABLES}
    for name in ATTRIBUTE_TABLES:
        assert (folder / f"{name}.csv").is_file()
    definitions = tables["attribute_definitions"]
    assert len(definitions) >= 1 and definitions.encoder_id.str.startswith("bundled").all()
    long = tables["image_attributes"]
    assert len(long) == len(definitions) * len(truth)  # every demo image scored for every attribute
    assert long.probability.between(0, 1).all()
    shares = tables["attribute_shares"]
    assert set(shares.brand[shares.level == "brand"]) == set(truth.brand)
    assert len(tables["attribute_gaps"]) == len(definitions) * truth.brand.nunique()


@pytest.mark.slow
def test_demo_planted_attribute_directions_are_recovered(demo_attributes):
    """For each attribute x category where the demo plants a leading brand
    (truth_attributes.csv, planted_top), that brand has the highest mean
    probability of its category with the bundled encoder, or, at most once,
    ties with the brand found first: a mean probability carries sampling error
    (its 95 % bootstrap interval), so a lead smaller than that cannot be
    promised; a reversed or broken score misses most cells."""
    folder, truth, planted = demo_attributes
    shares = pd.read_parquet(folder / "attribute_shares.parquet")
    brand_rows = shares[(shares.level == "brand") & (shares.source == "all")]
    level = planted.set_index(["brand", "attribute"])["planted_level"]
    print()
    for attribute, part in brand_rows.groupby("attribute"):
        print(f"{attribute}: yes-rate [95% Wilson], mean probability [95% bootstrap], planted level")
        for r in part.sort_values(["category", "brand"]).itertuples():
            lv = level.get((r.brand, attribute), float("nan"))
            print(f"  {r.category:<8} {r.brand:<10} yes-rate {r.yes_rate:.2f} [{r.yes_rate_low:.2f}, {r.yes_rate_high:.2f}]"
                  f"  mean p {r.mean_probability:.3f} [{r.mean_low:.3f}, {r.mean_high:.3f}]  planted {lv:.2f}")
    tops = planted[planted.planted_top.astype(str).str.lower() == "true"]
    tops = tops[tops.attribute.isin(set(brand_rows.attribute))]
    assert len(tops), "the demo study scores none of the attributes the demo plants a direction for"
    missed, untied = [], []
    for t in tops.itertuples():
        part = brand_rows[(brand_rows.attribute == t.attribute) & (brand_rows.category == t.category)]
        ranked = part.sort_values("mean_probability", ascending=False).set_index("brand")
        found = ranked.index[0]
        print(f"planted: {t.brand} leads {t.category} on {t.attribute}; found: {found}")
        if found != t.brand:
            missed.append(f"{t.attribute}/{t.category}: planted {t.brand}, found {found}")
            # a tie: the planted leader's interval reaches the found leader's mean
            if ranked.at[t.brand, "mean_high"] < ranked.at[found, "mean_probability"]:
                untied.append(missed[-1])
    assert len(missed) <= 1 and not untied, (missed, untied)

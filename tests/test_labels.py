"""Reading hand labels (bad rows, BOM, separators, header case), their sample design, and
rank agreement for graded answers; corrected shares in the attributes stage."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from explore import attributes as A
from explore.attributes.check import auc_interval, harrell_c
from explore.attributes.intervals import Z95
from explore.study import Attribute, ScoringSettings, StudyError

IMAGES = pd.DataFrame({
    "image_id": ["a1", "a2", "a3", "b1"],
    "path": ["/x/A/consumer/1.jpg", "/x/A/consumer/2.jpg", "/x/A/owned/3.jpg", "/x/B/owned/4.jpg"],
    "relpath": ["A/consumer/1.jpg", "A/consumer/2.jpg", "A/owned/3.jpg", "B/owned/4.jpg"],
    "status": ["ok"] * 4,
})


def _read(text: str, names=("sunny", "rainy")):
    table = A.parse_labels_text(text, where="labels.csv")
    return A.read_labels(table, IMAGES, list(names), where="labels.csv")


def test_bad_rows_are_named_and_good_rows_kept():
    text = (
        "image,attribute,label\n"
        "a1,sunny,1\n"          # row 2 good
        "zz,sunny,1\n"          # row 3 unknown image
        "a2,windy,0\n"          # row 4 unknown attribute
        "a2,sunny,maybe\n"      # row 5 label outside the allowed values
        "a3,sunny,1\n"          # row 6 } conflicting duplicates
        "a3,sunny,0\n"          # row 7 }
        "b1,sunny,yes\n"        # row 8 good (yes = 1)
        "b1,rainy,\n"           # row 9 can't tell
        "a1,sunny,1\n"          # row 10 agreeing duplicate: kept once
    )
    labels, warnings = _read(text)
    assert labels[["image_id", "attribute", "label"]].values.tolist() == [["a1", "sunny", 1], ["b1", "sunny", 1]]
    said = "\n".join(warnings)
    assert "labels.csv: row 3: image 'zz' is not in the study's images" in said
    assert "labels.csv: row 4: attribute 'windy' is not in the study" in said
    assert "labels.csv: row 5: label 'maybe' must be 0 or 1" in said
    assert "labels.csv: rows 6, 7: image 'a3' has both labels 0 and 1 for attribute 'sunny'" in said
    assert "1 answer 'can't tell' left out" in said


def test_bom_semicolons_and_header_case():
    labels, warnings = _read("\ufeffImage; ATTRIBUTE ;Label\nA/consumer/1.jpg;sunny;0\na2;rainy;1\n")
    assert warnings == [] and labels[["image_id", "label"]].values.tolist() == [["a1", 0], ["a2", 1]]
    labels, _ = _read("image\tattribute\tlabel\na3\tsunny\t1\n")
    assert labels.image_id.tolist() == ["a3"]


def test_empty_file_and_missing_columns_are_refused_clearly():
    with pytest.raises(StudyError, match="labels.csv: the labels file is empty"):
        _read("")
    with pytest.raises(StudyError, match="labels.csv: the labels file is empty"):
        _read("\ufeff  \n")
    with pytest.raises(StudyError, match=r"labels.csv: missing column\(s\) label.*found: image, attribute"):
        _read("image,attribute\na1,sunny\n")


def test_sample_design_decides_what_estimates_prevalence():
    hand, _ = _read("image,attribute,label\na1,sunny,1\na2,sunny,0\n")
    random, notes = A.prevalence_labels(hand)
    assert random.empty and "not to estimate shares" in notes[0] and "explore label" in notes[0]
    assert A.describe_sample(hand) == "sample design not recorded (hand-written labels)"
    designed, warnings = _read(
        "image,attribute,label,grade,sample,stratum,stratum_size,drawn,seed,sheet\n"
        "a1,sunny,1,6,random,A | consumer,2,2,7,s1\n"
        "a2,sunny,0,2,random,A | consumer,2,2,7,s1\n"
        "a3,sunny,1,,boundary,A | owned,,,7,s1\n"
        "b1,sunny,0,9,random,B | owned,1,1,7,s1\n"
    )
    assert any("row 5: grade '9' must be a whole number 1-7" in w for w in warnings)
    random, notes = A.prevalence_labels(designed)
    assert random.image_id.tolist() == ["a1", "a2", "b1"]
    assert "1 boundary-sample labels used for thresholds and probes only" in notes[0]
    assert designed.grade.tolist()[:2] == [6.0, 2.0] and np.isnan(designed.grade.iloc[3])
    assert A.describe_sample(designed) == ("3 random within brand x source (2 strata, seed 7, sheet s1); "
                                           "1 near the decision boundary (thresholds and probe only)")


def test_auc_and_its_standard_error_on_hanley_mcneil_ct_ratings():
    # Hanley & McNeil (1982), Radiology 143:29-36, Table 1 (counts from memory, checked by
    # their totals): CT images of 109 patients rated 1 (definitely normal) to 5 (definitely
    # abnormal); 58 normal: 33, 6, 6, 11, 2; 51 abnormal: 3, 2, 2, 11, 33. Published: AUC 0.893,
    # SE 0.032 (their exponential approximation).
    normal, abnormal = [33, 6, 6, 11, 2], [3, 2, 2, 11, 33]
    assert sum(normal) == 58 and sum(abnormal) == 51
    ratings = np.r_[np.repeat(np.arange(1, 6), normal), np.repeat(np.arange(1, 6), abnormal)]
    y = np.r_[np.zeros(58), np.ones(51)]
    auc, low, high = auc_interval(y, ratings)
    assert auc == pytest.approx(0.893, abs=5e-4)
    assert A.roc_auc(y, ratings) == pytest.approx(auc)
    # Hanley-McNeil SE from our AUC: Q1 = A/(2-A), Q2 = 2A^2/(1+A).
    q1, q2 = auc / (2 - auc), 2 * auc**2 / (1 + auc)
    se_hm = np.sqrt((auc * (1 - auc) + 50 * (q1 - auc**2) + 57 * (q2 - auc**2)) / (51 * 58))
    assert se_hm == pytest.approx(0.032, abs=1e-3)
    # Our interval uses DeLong's nonparametric variance (DeLong et al. 1988): close to 0.032.
    assert (high - low) / (2 * Z95) == pytest.approx(0.032, abs=3e-3)


def test_harrell_c_against_scipy_somers_d():
    # Reference: scipy.stats.somersd(grade, score): Somers' D of the score given the grade,
    # over pairs not tied on the grade; Harrell's C = (D + 1) / 2 (Newson 2002).
    from scipy.stats import somersd

    rng = np.random.default_rng(0)
    grade = rng.integers(1, 8, 80).astype(float)
    score = np.round(grade / 7 + rng.normal(0, 0.3, 80), 1)  # rounded: ties in the score too
    assert harrell_c(grade, score) == pytest.approx((somersd(grade, score).statistic + 1) / 2, abs=1e-12)
    assert harrell_c(grade, -score) == pytest.approx(1 - harrell_c(grade, score), abs=1e-12)


def test_graded_answers_reach_the_check():
    from explore.attributes.prompts import attribute_vectors

    from test_attributes import HashTextEncoder, _unit

    enc = HashTextEncoder(dim=32)
    attr = Attribute("sunny", ["bright sunshine"], ["grey overcast"])
    vec = attribute_vectors(attr, ["{}"], enc.encode_texts)
    rng = np.random.default_rng(2)
    grade = rng.integers(1, 8, 60).astype(float)
    joint = _unit(rng.normal(scale=0.1, size=(60, 32)) + 0.08 * (grade[:, None] - 4) * (vec.positive - vec.negative))
    y = (grade >= 4).astype(int)
    result = A.check_attribute(attr, vec, y, joint, joint, enc, 0.5, "study", grades=grade)
    assert result.grade_n == 60 and result.grade_spearman > 0.5 and result.grade_harrell_c > 0.7
    assert "Harrell's C" in result.describe()


def test_corrected_shares_in_the_stage_use_zero_shot_not_the_probe():
    """A probe may be fitted on the very random labels that correct it; its in-sample
    predictions would make the rectifier look small and the interval too narrow. The
    stage must correct with the prompt pair's zero-shot probability."""
    from test_attributes import _toy_study_tables

    images, joint, enc, attr = _toy_study_tables()
    from explore.attributes.sampling import random_sample

    rng = np.random.default_rng(9)
    coef = rng.normal(0, 40, joint.shape[1])
    coef -= coef.mean()
    # The labels follow the probe (as a probe fitted on them would in-sample), not the prompt pair.
    p_probe = 1 / (1 + np.exp(-(joint @ coef - np.median(joint @ coef))))
    truth = (rng.random(len(images)) < p_probe).astype(int)
    sample = random_sample(images, 60, seed=1)
    labels = pd.DataFrame({"image_id": sample.image_id, "attribute": "sunny",
                           "label": truth[images.set_index("image_id").index.get_indexer(sample.image_id)],
                           "sample": "random"})
    probe = {"coef": coef.tolist(), "intercept": float(-np.median(joint @ coef)), "threshold": 0.5,
             "vectors": "cluster"}
    saved = {"sunny": {"encoder_id": enc.id, "probe": probe}}
    scoring = ScoringSettings(templates=["{}"], bootstrap_samples=0)
    tables, notes = A.attribute_tables(images, images.image_id.tolist(), joint, joint, [attr], scoring, enc,
                                       saved_checks=saved, labels=labels)
    assert tables["attribute_definitions"].scored_by.iloc[0] == "probe"
    long = tables["image_attributes"]
    zero = long[["image_id", "attribute", "zero_shot_probability"]].rename(columns={"zero_shot_probability": "probability"})
    want = A.corrected_shares(zero, images, labels)
    wrong = A.corrected_shares(long[["image_id", "attribute", "probability"]], images, labels)
    shares = tables["attribute_shares"].merge(want, on=["level", "brand", "category", "source", "attribute"],
                                              suffixes=("", "_want"))
    np.testing.assert_allclose(shares["share_low"], shares["share_low_want"])
    assert not np.allclose(wrong["share_low"].to_numpy(), want["share_low"].to_numpy())
    # the columns sit beside the yes-rate ones; the gaps table has the corrected gap
    cols = list(tables["attribute_shares"].columns)
    assert cols.index("share") == cols.index("yes_rate_index") + 1
    assert tables["attribute_gaps"]["share_gap"].notna().all()
    assert any("yes-rate with them is still the model's yes-rate, not a prevalence" in n for n in notes)
    assert any("attribute 'sunny': corrected shares from 60 random labels" in n for n in notes), notes  # every label, not one cell's
    # hand-written labels (no design): no corrected shares, and the notes say why
    plain = labels.drop(columns="sample").assign(sample="")
    tables, notes = A.attribute_tables(images, images.image_id.tolist(), joint, joint, [attr], scoring, enc,
                                       labels=plain)
    assert tables["attribute_shares"]["share"].isna().all()
    assert any("not to estimate shares" in n for n in notes)


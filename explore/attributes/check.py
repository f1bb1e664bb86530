"""Checking an attribute against hand labels.

ROC AUC with a DeLong interval, accuracy at the current and at the
Youden-optimal threshold, a reliability table, the best single description
and, with enough labels, a few-shot linear probe on the image vectors.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import pandas as pd

from explore.attributes.intervals import Z95
from explore.attributes.prompts import AttributeVectors, prompts_digest
from explore.attributes.scoring import attribute_bias, neutral_vector, pair_probabilities
from explore.study import Attribute

#: Below this many labels in either class the check prints a warning, not numbers.
#: Our rule of thumb: with fewer than ten of a class an AUC interval spans most of [0, 1].
MIN_LABELS_PER_CLASS = 10
#: A few-shot linear probe is fitted only from this many labels per class on.
PROBE_MIN_LABELS_PER_CLASS = 20


def roc_auc(labels: np.ndarray, scores: np.ndarray) -> float:
    """Area under the ROC curve from ranks (Mann-Whitney U / (n1 n0)); ties count half."""
    from scipy.stats import rankdata

    y = np.asarray(labels).astype(bool)
    n1, n0 = int(y.sum()), int((~y).sum())
    if n1 == 0 or n0 == 0:
        return float("nan")
    ranks = rankdata(np.asarray(scores, dtype=np.float64))
    return float((ranks[y].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def auc_interval(labels: np.ndarray, scores: np.ndarray, z: float = Z95) -> tuple[float, float, float]:
    """AUC with a 95 % interval from DeLong's variance (DeLong, DeLong & Clarke-Pearson 1988).

    The structural components come from mid-ranks (Sun & Xu 2014): for a
    positive, the share of negatives it outscores; for a negative, the share of
    positives that outscore it.

    Returns
    -------
    (auc, low, high), the bounds clipped to [0, 1].
    """
    from scipy.stats import rankdata

    y = np.asarray(labels).astype(bool)
    s = np.asarray(scores, dtype=np.float64)
    n1, n0 = int(y.sum()), int((~y).sum())
    if n1 < 2 or n0 < 2:
        return float("nan"), float("nan"), float("nan")
    r_all = rankdata(s)
    v10 = (r_all[y] - rankdata(s[y])) / n0
    v01 = 1.0 - (r_all[~y] - rankdata(s[~y])) / n1
    auc = float(v10.mean())
    se = float(np.sqrt(v10.var(ddof=1) / n1 + v01.var(ddof=1) / n0))
    return auc, max(0.0, auc - z * se), min(1.0, auc + z * se)


def roc_points(labels: np.ndarray, scores: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """False and true positive rates at every distinct score, calling ``score >= threshold``.

    Returns (fpr, tpr, thresholds) with thresholds decreasing.
    """
    y = np.asarray(labels).astype(bool)
    s = np.asarray(scores, dtype=np.float64)
    order = np.argsort(-s, kind="mergesort")
    s, y = s[order], y[order]
    last = np.r_[np.flatnonzero(np.diff(s)), len(s) - 1]
    tps = np.cumsum(y)[last]
    fps = (last + 1) - tps
    return fps / max(1, (~y).sum()), tps / max(1, y.sum()), s[last]


def youden_threshold(labels: np.ndarray, scores: np.ndarray, midpoint: bool = False) -> tuple[float, float]:
    """The threshold maximising Youden's J = TPR - FPR, and J.

    Calls are ``score >= threshold``. On ties in J the highest threshold wins.
    By default the threshold is the lowest score still called positive at the
    best operating point (as ``sklearn.metrics.roc_curve`` lists it); with
    ``midpoint`` it is halfway down to the next lower score, which gives the
    same calls on the labelled images and leaves a margin for new ones.
    """
    fpr, tpr, thresholds = roc_points(labels, scores)
    j = tpr - fpr
    k = int(np.argmax(j))
    threshold = float(thresholds[k])
    if midpoint and k + 1 < len(thresholds):
        threshold = float((thresholds[k] + thresholds[k + 1]) / 2)
    return threshold, float(j[k])


def accuracy_at(labels: np.ndarray, scores: np.ndarray, threshold: float) -> float:
    """Share of labels matched by calling ``score >= threshold`` positive."""
    y = np.asarray(labels).astype(bool)
    return float(((np.asarray(scores) >= threshold) == y).mean())


def reliability_table(labels: np.ndarray, probabilities: np.ndarray, bins: int = 10) -> pd.DataFrame:
    """Predicted against observed positive rate in equal-width probability bins.

    Empty bins are left out. Columns: bin_low, bin_high, n, mean_predicted, observed.
    """
    y = np.asarray(labels).astype(float)
    p = np.asarray(probabilities, dtype=np.float64)
    edges = np.linspace(0.0, 1.0, bins + 1)
    which = np.clip(np.searchsorted(edges[1:-1], p, side="left"), 0, bins - 1)
    rows = []
    for b in range(bins):
        mask = which == b
        if mask.any():
            rows.append((edges[b], edges[b + 1], int(mask.sum()), float(p[mask].mean()), float(y[mask].mean())))
    return pd.DataFrame(rows, columns=["bin_low", "bin_high", "n", "mean_predicted", "observed"])



def harrell_c(outcome: np.ndarray, score: np.ndarray) -> float:
    """Harrell's concordance index (Harrell, Califf, Pryor, Lee & Rosati 1982).

    Over pairs with different outcomes (graded answers), the share whose
    scores are ordered the same way; tied scores count one half. Counted
    pair by pair (O(n^2), fine for a labelling sheet).
    """
    y = np.asarray(outcome, dtype=np.float64)
    s = np.asarray(score, dtype=np.float64)
    dy = np.sign(y[:, None] - y[None, :])
    ds = np.sign(s[:, None] - s[None, :])
    pairs = dy != 0
    if not pairs.any():
        return float("nan")
    agree = (dy == ds) & pairs
    ties = (ds == 0) & pairs
    return float((agree.sum() + 0.5 * ties.sum()) / pairs.sum())


@dataclass
class AttributeCheck:
    """How well one attribute's zero-shot scores agree with hand labels."""

    attribute: str
    encoder_id: str
    n: int
    n_positive: int
    n_negative: int
    enough: bool
    warning: str = ""
    auc: float = float("nan")
    auc_low: float = float("nan")
    auc_high: float = float("nan")
    mann_whitney_p: float = float("nan")
    better_than_chance: bool = False
    threshold: float = float("nan")
    threshold_from: str = ""
    accuracy: float = float("nan")
    best_threshold: float = float("nan")
    best_accuracy: float = float("nan")
    youden_j: float = float("nan")
    chance_accuracy: float = float("nan")
    reliability: pd.DataFrame | None = None
    descriptions: pd.DataFrame | None = None
    probe_auc: float = float("nan")
    probe_auc_low: float = float("nan")
    probe_auc_high: float = float("nan")
    probe_note: str = ""
    #: How the labels were sampled (e.g. "random within brand x source (seed 7, sheet ...)").
    sampled: str = ""
    #: Graded answers (1-7): how many, Spearman's rho (with p) and Harrell's C against the probability.
    grade_n: int = 0
    grade_spearman: float = float("nan")
    grade_spearman_p: float = float("nan")
    grade_harrell_c: float = float("nan")
    #: What ``--save-...`` would store: {"threshold", "prompts_digest", "probe": {...}}.
    record: dict = field(default_factory=dict)

    def summary_row(self) -> dict:
        """One row for the ``attribute_check`` table."""
        keys = [
            "attribute", "encoder_id", "n", "n_positive", "n_negative", "enough", "warning", "auc",
            "auc_low", "auc_high", "mann_whitney_p", "better_than_chance", "threshold",
            "threshold_from", "accuracy", "best_threshold", "best_accuracy", "youden_j",
            "chance_accuracy", "probe_auc", "probe_auc_low", "probe_auc_high", "probe_note",
            "sampled", "grade_n", "grade_spearman", "grade_spearman_p", "grade_harrell_c",
        ]
        return {k: getattr(self, k) for k in keys}

    def headline(self) -> str:
        """One line for the run notes."""
        if not self.enough:
            return f"attribute '{self.attribute}': {self.warning}"
        verdict = "better than chance" if self.better_than_chance else "not shown to be better than chance"
        extra = ""
        if self.enough and np.isfinite(self.accuracy) and self.accuracy < self.chance_accuracy:
            extra = f"; accuracy {self.accuracy:.0%} is below always guessing the larger class ({self.chance_accuracy:.0%})"
        return (f"attribute '{self.attribute}': AUC {self.auc:.2f} (95 % {self.auc_low:.2f}-{self.auc_high:.2f}), "
                f"{verdict}, {self.n} labels ({self.sampled or 'sample not recorded'}){extra}")

    def describe(self) -> str:
        """A readable report for the terminal."""
        head = (
            f"attribute '{self.attribute}': {self.n} labelled images "
            f"({self.n_positive} positive, {self.n_negative} negative)"
            + (f"; {self.sampled}" if self.sampled else "")
        )
        if not self.enough:
            return f"{head}\n  WARNING: {self.warning}"
        lines = [head]
        verdict = "better than chance" if self.better_than_chance else "not shown to be better than chance (interval includes 0.5)"
        lines.append(
            f"  zero-shot ROC AUC {self.auc:.3f} (95% {self.auc_low:.3f}-{self.auc_high:.3f}, "
            f"Mann-Whitney one-sided p = {self.mann_whitney_p:.3g}): {verdict}"
        )
        lines.append(
            f"  accuracy {self.accuracy:.1%} at the current threshold {self.threshold:.3f} "
            f"({self.threshold_from}); {self.best_accuracy:.1%} at the Youden-optimal threshold "
            f"{self.best_threshold:.3f} (J = {self.youden_j:.2f}); always guessing the larger "
            f"class scores {self.chance_accuracy:.1%}"
        )
        if self.reliability is not None and len(self.reliability):
            lines.append("  reliability (predicted vs observed share positive):")
            for r in self.reliability.itertuples(index=False):
                lines.append(
                    f"    {r.bin_low:.1f}-{r.bin_high:.1f}  n={r.n:<5d} predicted {r.mean_predicted:.2f}"
                    f"  observed {r.observed:.2f}"
                )
        if self.descriptions is not None and len(self.descriptions):
            best = self.descriptions.iloc[0]
            lines.append(
                f"  best single description: {best.side} '{best.description}' (AUC {best.auc:.3f} on its own)"
            )
            for r in self.descriptions.iloc[1:].itertuples(index=False):
                lines.append(f"    then {r.side} '{r.description}' (AUC {r.auc:.3f})")
        if self.grade_n:
            lines.append(
                f"  graded answers (1-7, {self.grade_n} images): Spearman rho {self.grade_spearman:.3f} "
                f"(p = {self.grade_spearman_p:.3g}), Harrell's C {self.grade_harrell_c:.3f}"
            )
        if self.probe_note:
            lines.append(f"  linear probe: {self.probe_note}")
        else:
            lines.append(
                f"  linear probe (5-fold CV) AUC {self.probe_auc:.3f} (95% {self.probe_auc_low:.3f}-"
                f"{self.probe_auc_high:.3f}) beside zero-shot {self.auc:.3f}"
            )
        return "\n".join(lines)


def fit_probe(
    vectors: np.ndarray, labels: np.ndarray, seed: int = 0, folds: int = 5
) -> tuple[np.ndarray, dict]:
    """A few-shot linear probe: logistic regression on image vectors.

    Parameters
    ----------
    vectors : (n, d) image vectors of the labelled images.
    labels : (n,) 0/1.
    seed : shuffles the stratified folds.
    folds : number of stratified cross-validation folds.

    Returns
    -------
    cv_probabilities : out-of-fold probabilities (for an honest AUC and threshold).
    probe : {"coef", "intercept", "threshold"} of the model fitted on all labels,
        with the Youden-optimal threshold of the out-of-fold probabilities.
    """
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import StratifiedKFold, cross_val_predict

    X = np.asarray(vectors, dtype=np.float64)
    y = np.asarray(labels).astype(int)
    model = LogisticRegression(max_iter=2000)
    cv = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed)
    cv_probabilities = cross_val_predict(model, X, y, cv=cv, method="predict_proba")[:, 1]
    model.fit(X, y)
    threshold, _ = youden_threshold(y, cv_probabilities, midpoint=True)
    probe = {
        "coef": model.coef_[0].astype(float).tolist(),
        "intercept": float(model.intercept_[0]),
        "threshold": threshold,
    }
    return cv_probabilities, probe


def check_attribute(
    attribute: Attribute,
    vectors: AttributeVectors,
    labels: np.ndarray,
    joint: np.ndarray,
    cluster: np.ndarray,
    encoder,
    threshold: float,
    threshold_from: str,
    *,
    seed: int = 0,
    grades: np.ndarray | None = None,
) -> AttributeCheck:
    """Compare an attribute's zero-shot probabilities with hand labels.

    Parameters
    ----------
    attribute : the attribute checked.
    vectors : its text vectors (:func:`attribute_vectors`).
    labels : (n,) 0/1 hand labels.
    joint, cluster : (n, d) vectors of the labelled images, in label order.
    encoder : gives ``id``, ``logit_scale`` and ``logit_bias``.
    threshold, threshold_from : the threshold scoring uses now, and its origin.
    seed : the study seed (probe folds).
    grades : optional (n,) graded answers 1-7 (NaN where none): rank agreement with the probability.
    """
    from scipy.stats import mannwhitneyu

    y = np.asarray(labels).astype(int)
    n1, n0 = int(y.sum()), int(len(y) - y.sum())
    result = AttributeCheck(
        attribute=attribute.name, encoder_id=encoder.id, n=len(y), n_positive=n1, n_negative=n0,
        enough=min(n1, n0) >= MIN_LABELS_PER_CLASS, threshold=threshold, threshold_from=threshold_from,
    )
    if not result.enough:
        result.warning = (
            f"too few labels to say anything: {n1} positive and {n0} negative; label at least "
            f"{MIN_LABELS_PER_CLASS} of each class (and {PROBE_MIN_LABELS_PER_CLASS} of each for a linear probe)"
        )
        return result

    bias = attribute_bias(encoder, vectors, neutral_vector(encoder))
    p = pair_probabilities(joint, vectors.positive, vectors.negative, encoder.logit_scale, bias)
    if grades is not None:
        g = np.asarray(grades, dtype=np.float64)
        ok = np.isfinite(g)
        if ok.sum() >= 3 and len(np.unique(g[ok])) > 1:
            from scipy.stats import spearmanr

            rho = spearmanr(g[ok], p[ok])
            result.grade_n = int(ok.sum())
            result.grade_spearman, result.grade_spearman_p = float(rho.statistic), float(rho.pvalue)
            result.grade_harrell_c = harrell_c(g[ok], p[ok])
    result.auc, result.auc_low, result.auc_high = auc_interval(y, p)
    result.mann_whitney_p = float(mannwhitneyu(p[y == 1], p[y == 0], alternative="greater").pvalue)
    result.better_than_chance = bool(result.auc_low > 0.5)
    result.accuracy = accuracy_at(y, p, threshold)
    result.best_threshold, result.youden_j = youden_threshold(y, p, midpoint=True)
    result.best_accuracy = accuracy_at(y, p, result.best_threshold)
    result.chance_accuracy = max(n1, n0) / len(y)
    result.reliability = reliability_table(y, p)
    singles = []
    for side, text, vec in vectors.descriptions:
        sign = 1.0 if side == "positive" else -1.0
        singles.append((side, text, roc_auc(y, sign * (joint @ vec))))
    result.descriptions = (
        pd.DataFrame(singles, columns=["side", "description", "auc"])
        .sort_values("auc", ascending=False, kind="mergesort")
        .reset_index(drop=True)
    )
    result.record = {
        "encoder_id": encoder.id,
        "prompts_digest": prompts_digest(vectors),
        "threshold": result.best_threshold,
        "auc": result.auc,
        "n_positive": n1,
        "n_negative": n0,
    }
    if min(n1, n0) < PROBE_MIN_LABELS_PER_CLASS:
        result.probe_note = (
            f"not fitted: needs at least {PROBE_MIN_LABELS_PER_CLASS} labels of each class "
            f"(have {n1} positive, {n0} negative)"
        )
        return result
    cv_p, probe = fit_probe(cluster, y, seed=seed)
    result.probe_auc, result.probe_auc_low, result.probe_auc_high = auc_interval(y, cv_p)
    probe.update({"vectors": "cluster", "cv_auc": result.probe_auc})
    result.record["probe"] = probe
    return result


def checks_table(results: Sequence[AttributeCheck]) -> dict[str, pd.DataFrame]:
    """The tables ``explore check`` writes: summary, reliability bins, single descriptions."""
    summary = pd.DataFrame([r.summary_row() for r in results])
    reliability = [r.reliability.assign(attribute=r.attribute) for r in results if r.reliability is not None]
    singles = [r.descriptions.assign(attribute=r.attribute) for r in results if r.descriptions is not None]
    return {
        "attribute_check": summary,
        "attribute_check_reliability": (
            pd.concat(reliability, ignore_index=True) if reliability else pd.DataFrame(
                columns=["bin_low", "bin_high", "n", "mean_predicted", "observed", "attribute"])
        ),
        "attribute_check_descriptions": (
            pd.concat(singles, ignore_index=True) if singles else pd.DataFrame(
                columns=["side", "description", "auc", "attribute"])
        ),
    }


def saved_record(result: AttributeCheck, *, save_threshold: bool, save_probe: bool) -> tuple[dict | None, str]:
    """What to store for an attribute after a check, and a line saying what was (not) saved.

    ``save_probe`` stores the linear probe (later scoring then uses it and its
    threshold); ``save_threshold`` stores the zero-shot Youden threshold.
    """
    if not (save_threshold or save_probe):
        return None, ""
    name = f"attribute '{result.attribute}'"
    if not result.enough:
        return None, f"{name}: nothing saved ({result.warning})"
    record = {k: v for k, v in result.record.items() if k != "probe"}
    if save_probe and "probe" in result.record:
        record["probe"] = result.record["probe"]
        return record, (
            f"{name}: saved the linear probe (CV AUC {result.probe_auc:.3f}, "
            f"threshold {record['probe']['threshold']:.3f}); later runs score it with the probe"
        )
    if save_threshold:
        extra = f" (no probe: {result.probe_note})" if save_probe else ""
        return record, f"{name}: saved the zero-shot threshold {record['threshold']:.3f}{extra}"
    return None, f"{name}: nothing saved (no probe: {result.probe_note})"

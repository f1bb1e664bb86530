"""Scoring: per-image probabilities from prompt pairs (or a saved linear probe).

An image's probability of being on the positive side is the two-way softmax of
its scaled cosine similarities to the two sides, which is

    p = sigmoid(scale * (s_pos - s_neg) + bias)

with the encoder's ``logit_scale`` (CLIP's learned temperature for ``clip``;
see ``explore/encoders/bundled.py`` for ``bundled``) and a bias: 0 for
``clip``; for ``bundled``, the one per prompt pair that puts an uninformative
image at exactly 0.5 (:func:`attribute_bias`). Scoring is one matrix product
over cached vectors: a new attribute never re-embeds an image.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from explore.attributes.prompts import AttributeVectors, attribute_vectors, prompts_digest
from explore.study import Attribute, ScoringSettings


def _sigmoid(x: np.ndarray) -> np.ndarray:
    """Numerically stable logistic function (float32 in, float32 out)."""
    out = np.empty_like(x)
    pos = x >= 0
    out[pos] = 1.0 / (1.0 + np.exp(-x[pos]))
    e = np.exp(x[~pos])
    out[~pos] = e / (1.0 + e)
    return out


def pair_probabilities(
    joint: np.ndarray,
    positive: np.ndarray,
    negative: np.ndarray,
    scale: float,
    bias: float = 0.0,
) -> np.ndarray:
    """Probability that each image is on the positive side of a prompt pair.

    Two-way softmax of ``scale * cos(image, side)``, written as
    ``sigmoid(scale * (s_pos - s_neg) + bias)``.

    Parameters
    ----------
    joint : (n, d) L2-normalised image vectors in the text space.
    positive, negative : (d,) unit side vectors, or (d, k) for k attributes at once.
    scale : the encoder's logit scale.
    bias : the encoder's logit bias (0 for CLIP: a shared bias cancels in a softmax).

    Returns
    -------
    (n,) or (n, k) float32 probabilities.
    """
    direction = np.asarray(positive, dtype=np.float32) - np.asarray(negative, dtype=np.float32)
    margin = np.asarray(joint, dtype=np.float32) @ direction
    return _sigmoid(np.float32(scale) * margin + np.float32(bias))


def platt_common_slope(margins: Sequence[np.ndarray], labels: Sequence[np.ndarray]) -> float:
    """One logistic slope on the margin ``s_pos - s_neg`` shared by several prompt pairs.

    Platt scaling (Platt 1999) with an intercept per pair and a common slope,
    fitted by maximum likelihood (unpenalised logistic regression). This is
    how an encoder family's ``logit_scale`` can be calibrated from hand labels
    (benchmarks/bundled_fit.py chooses the bundled encoder's scale this way, on Debian's openclipart-png topic folders).

    Parameters
    ----------
    margins : one (n_i,) array of margins per prompt pair.
    labels : one (n_i,) 0/1 array per prompt pair.

    Returns
    -------
    The common slope.
    """
    from sklearn.linear_model import LogisticRegression

    blocks, ys = [], []
    for i, (m, y) in enumerate(zip(margins, labels)):
        onehot = np.zeros((len(m), len(margins)))
        onehot[:, i] = 1.0
        blocks.append(np.column_stack([np.asarray(m, dtype=np.float64), onehot]))
        ys.append(np.asarray(y).astype(int))
    model = LogisticRegression(C=1e8, fit_intercept=False, max_iter=10000, tol=1e-10)
    model.fit(np.vstack(blocks), np.concatenate(ys))
    return float(model.coef_[0, 0])


def neutral_vector(encoder) -> np.ndarray | None:
    """The joint vector of an image the encoder can say nothing about, for families that have one.

    For ``bundled`` (ConSE) this is the normalised mean of the embeddings of the
    1000 ImageNet class phrases: an image's ConSE vector is a convex
    combination of those phrases, and with no preference among classes it
    tends to their mean. ``clip`` has none (its learned scale is used as is).
    """
    if getattr(encoder, "family", "") != "bundled" or not hasattr(encoder, "label_embeddings"):
        return None
    centre = np.asarray(encoder.label_embeddings(), dtype=np.float64).mean(axis=0)
    return (centre / np.linalg.norm(centre)).astype(np.float32)


def attribute_bias(encoder, vectors: "AttributeVectors", neutral: np.ndarray | None = None) -> float:
    """The bias used for one prompt pair.

    The encoder's ``logit_bias``, and for a family with a neutral vector (see
    :func:`neutral_vector`) minus ``logit_scale`` times the neutral vector's
    margin, so that an uninformative image scores exactly 0.5 on every
    attribute. Without that, one side of a pair is often closer to every
    image in the ConSE space (a wording effect), and the shares of all brands
    pile up near 0 or 1. The correction changes sign with the sides, so
    swapping them still gives 1 - p.
    """
    bias = float(encoder.logit_bias)
    if neutral is not None:
        bias -= float(encoder.logit_scale) * float(neutral @ (vectors.positive - vectors.negative))
    return bias


def probe_probabilities(vectors: np.ndarray, coef: Sequence[float], intercept: float) -> np.ndarray:
    """Probabilities from a saved linear probe: sigmoid(X w + b)."""
    w = np.asarray(coef, dtype=np.float32)
    return _sigmoid(np.asarray(vectors, dtype=np.float32) @ w + np.float32(intercept))


def resolve_threshold(
    attribute: Attribute,
    scoring: ScoringSettings,
    saved: dict | None,
) -> tuple[float, str]:
    """The threshold used to call an image positive, and where it comes from.

    Order: a saved check for this attribute (its probe's threshold when a probe
    is used, else its zero-shot Youden threshold), then the attribute's own
    ``threshold`` in the study file, then ``scoring.threshold``.
    """
    if saved:
        if saved.get("probe"):
            return float(saved["probe"]["threshold"]), "check (probe, Youden J)"
        if saved.get("threshold") is not None:
            return float(saved["threshold"]), "check (zero-shot, Youden J)"
    if attribute.threshold is not None:
        return float(attribute.threshold), "study (attribute)"
    return float(scoring.threshold), "study (scoring.threshold)"


def usable_check(saved: dict | None, encoder_id: str, digest: str) -> tuple[dict | None, str]:
    """A saved check applies only with the same encoder (and, for thresholds, the same prompts).

    Returns the check (or None) and a note saying why one was ignored ("" when none).
    """
    if not saved:
        return None, ""
    if saved.get("encoder_id") != encoder_id:
        return None, (
            f"saved check ignored: made with encoder {saved.get('encoder_id')}, this run uses {encoder_id}"
        )
    if saved.get("probe"):
        return saved, ""
    if saved.get("prompts_digest") != digest:
        return None, "saved check ignored: the attribute's prompts changed since it was made"
    return saved, ""


def score_attributes(
    image_ids: Sequence[str],
    joint: np.ndarray,
    cluster: np.ndarray,
    attributes: Sequence[Attribute],
    scoring: ScoringSettings,
    encoder,
    saved_checks: dict | None = None,
) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
    """Score every attribute for every image.

    Parameters
    ----------
    image_ids : row ids of the vectors.
    joint : (n, d_j) image vectors in the text space (zero-shot scoring).
    cluster : (n, d_c) image vectors (used by a saved linear probe).
    attributes : the study's attributes.
    scoring : templates and default threshold.
    encoder : anything with ``id``, ``logit_scale``, ``logit_bias`` and ``encode_texts``.
    saved_checks : {attribute name: saved check record} from ``explore check --save-...``.

    Returns
    -------
    image_attributes : long table image_id, attribute, probability, positive,
        zero_shot_probability (the prompt pair's, also when a probe scores).
    attribute_definitions : one row per attribute with prompts, threshold and its origin.
    notes : one line per ignored saved check.
    """
    saved_checks = saved_checks or {}
    long_tables, definitions, notes = [], [], []
    neutral = neutral_vector(encoder) if attributes else None
    ids = np.asarray(list(image_ids), dtype=object)
    for attribute in attributes:
        vectors = attribute_vectors(attribute, scoring.templates, encoder.encode_texts)
        saved, note = usable_check(saved_checks.get(attribute.name), encoder.id, prompts_digest(vectors))
        if note:
            notes.append(f"attribute '{attribute.name}': {note}")
        threshold, threshold_from = resolve_threshold(attribute, scoring, saved)
        bias = attribute_bias(encoder, vectors, neutral)
        zero_shot = pair_probabilities(joint, vectors.positive, vectors.negative, encoder.logit_scale, bias)
        if saved and saved.get("probe"):
            probe = saved["probe"]
            source = cluster if probe.get("vectors", "cluster") == "cluster" else joint
            probability = probe_probabilities(source, probe["coef"], probe["intercept"])
            scored_by = "probe"
        else:
            probability = zero_shot
            scored_by = "zero-shot"
        long_tables.append(
            pd.DataFrame(
                {
                    "image_id": ids,
                    "attribute": attribute.name,
                    "probability": probability.astype(np.float32),
                    "positive": probability >= threshold,
                    # kept for corrected shares: a probe may have been fitted on the very labels
                    # that correct it, so the rectifier always uses the prompt pair's probability
                    "zero_shot_probability": np.asarray(zero_shot).astype(np.float32),
                }
            )
        )
        definitions.append(
            {
                "attribute": attribute.name,
                "positive_descriptions": " | ".join(attribute.positive),
                "negative_descriptions": " | ".join(attribute.negative),
                "positive_prompts": " | ".join(vectors.positive_prompts),
                "negative_prompts": " | ".join(vectors.negative_prompts),
                "threshold": threshold,
                "threshold_from": threshold_from,
                "scored_by": scored_by,
                "logit_scale": float(encoder.logit_scale),
                "logit_bias": bias,
                "prompts_digest": prompts_digest(vectors),
                "encoder_id": encoder.id,
            }
        )
    image_attributes = (
        pd.concat(long_tables, ignore_index=True)
        if long_tables
        else pd.DataFrame({"image_id": [], "attribute": [], "probability": [], "positive": [],
                           "zero_shot_probability": []})
    )
    return image_attributes, pd.DataFrame(definitions), notes

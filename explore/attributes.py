"""Attributes: prompt pairs -> per-image probabilities -> brand shares with intervals.

An attribute is a name with descriptions of its positive and its negative side.
Each side becomes one text vector by prompt ensembling (Radford et al. 2021,
"Learning Transferable Visual Models From Natural Language Supervision"):
every description is put into every template ("a photo that feels {}"), the
texts are encoded, and the mean of the normalised text vectors is normalised
again. An image's probability of being on the positive side is the two-way
softmax of its scaled cosine similarities to the two sides, which is

    p = sigmoid(scale * (s_pos - s_neg) + bias)

with the encoder's ``logit_scale`` (CLIP's learned temperature for ``clip``;
a Platt-fitted 15 for ``bundled``, see ``explore/encoders/bundled.py``) and a
bias: 0 for ``clip``; for ``bundled``, the one per prompt pair that puts an
uninformative image at exactly 0.5 (:func:`attribute_bias`). Scoring is one matrix product over cached vectors:
a new attribute never re-embeds an image.

Brand metrics are shares of positive calls with Wilson intervals (Wilson 1927),
mean probabilities with seeded bootstrap percentile intervals, and
consumer-vs-owned differences of shares with Newcombe's hybrid score interval
(Newcombe 1998, method 10).

The second half of the module checks an attribute against hand labels: ROC AUC
with a DeLong interval, accuracy at the current and at the Youden-optimal
threshold, a reliability table, the best single description and, with enough
labels, a few-shot linear probe on the image vectors.

Everything here is a pure function over numpy arrays and pandas DataFrames;
reading and writing files is left to ``explore.run`` and ``explore.cli``.
"""

from __future__ import annotations

import hashlib
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from explore.study import Attribute, ScoringSettings, StudyError, check_attributes, check_template

#: Two-sided 95 % normal quantile, scipy.stats.norm.ppf(0.975).
Z95 = 1.959963984540054

#: Below this many labels in either class the check prints a warning, not numbers.
#: Our rule of thumb: with fewer than ten of a class an AUC interval spans most of [0, 1].
MIN_LABELS_PER_CLASS = 10
#: A few-shot linear probe is fitted only from this many labels per class on.
PROBE_MIN_LABELS_PER_CLASS = 20

SOURCES = ("consumer", "owned")


# --------------------------------------------------------------------------
# Defining attributes on the command line


def parse_attribute_spec(spec: str) -> Attribute:
    """Turn a one-line attribute definition into an :class:`Attribute`.

    The line reads ``NAME: positive; positive ... / negative; negative ...``:
    the name, a colon, the positive descriptions separated by semicolons, one
    slash, the negative descriptions separated by semicolons. For example
    ``"sunny: bright sunshine; a clear blue sky / grey overcast weather; rain"``.

    Parameters
    ----------
    spec : the text given to ``--attribute``.

    Returns
    -------
    Attribute

    Raises
    ------
    StudyError naming the attribute (or quoting the text when it has no name).
    """
    if ":" not in spec:
        raise StudyError(
            f"--attribute '{spec}': expected 'NAME: positive; ... / negative; ...' (no colon found)"
        )
    name, _, body = spec.partition(":")
    name = name.strip()
    if not name:
        raise StudyError(f"--attribute '{spec}': the attribute has an empty name before the colon")
    label = f"--attribute '{name}'"
    sides = body.split("/")
    if len(sides) != 2:
        raise StudyError(
            f"{label}: expected exactly one '/' between the positive and the negative "
            f"descriptions, found {len(sides) - 1}"
        )

    def descriptions(text: str, side: str) -> list[str]:
        parts = [p.strip() for p in text.split(";")]
        if not any(parts):
            raise StudyError(f"{label} has no {side} description")
        if any(not p for p in parts):
            raise StudyError(f"{label} has an empty {side} description (two ';' in a row or a trailing ';')")
        return parts

    attribute = Attribute(
        name=name,
        positive=descriptions(sides[0], "positive"),
        negative=descriptions(sides[1], "negative"),
    )
    check_attributes([attribute], "--attribute")
    return attribute


def add_attributes(existing: list[Attribute], extra: Sequence[Attribute], where: str) -> list[Attribute]:
    """The study's attributes followed by ``extra``; refuses a name used twice."""
    combined = list(existing) + list(extra)
    check_attributes(combined, where)
    return combined


# --------------------------------------------------------------------------
# Prompts and text vectors


def build_prompts(descriptions: Sequence[str], templates: Sequence[str]) -> list[str]:
    """Every description in every template, description-major order."""
    for template in templates:
        check_template(template, "scoring.templates")
    return [template.format(d) for d in descriptions for template in templates]


def ensemble(vectors: np.ndarray) -> np.ndarray:
    """Mean of the L2-normalised rows, normalised again (prompt ensembling)."""
    v = np.asarray(vectors, dtype=np.float64)
    v = v / np.linalg.norm(v, axis=1, keepdims=True)
    mean = v.mean(axis=0)
    return (mean / np.linalg.norm(mean)).astype(np.float32)


@dataclass
class AttributeVectors:
    """The text side of one attribute: both side vectors and one vector per description."""

    name: str
    positive: np.ndarray  # (d,)
    negative: np.ndarray  # (d,)
    positive_prompts: list[str]
    negative_prompts: list[str]
    #: (side, description, vector) for every single description, templates ensembled.
    descriptions: list[tuple[str, str, np.ndarray]] = field(default_factory=list)


def attribute_vectors(
    attribute: Attribute,
    templates: Sequence[str],
    encode_texts: Callable[[list[str]], np.ndarray],
) -> AttributeVectors:
    """Encode an attribute's prompts (one call) and ensemble each side.

    Parameters
    ----------
    attribute : the attribute.
    templates : description templates, each with one ``{}``.
    encode_texts : the encoder's ``encode_texts`` (texts -> L2-normalised rows).
    """
    templates = list(templates) or ["{}"]
    pos_prompts = build_prompts(attribute.positive, templates)
    neg_prompts = build_prompts(attribute.negative, templates)
    vectors = np.asarray(encode_texts(pos_prompts + neg_prompts), dtype=np.float32)
    pos_v, neg_v = vectors[: len(pos_prompts)], vectors[len(pos_prompts):]
    t = len(templates)
    singles = []
    for side, texts, block in (("positive", attribute.positive, pos_v), ("negative", attribute.negative, neg_v)):
        for i, text in enumerate(texts):
            singles.append((side, text, ensemble(block[i * t:(i + 1) * t])))
    return AttributeVectors(
        name=attribute.name,
        positive=ensemble(pos_v),
        negative=ensemble(neg_v),
        positive_prompts=pos_prompts,
        negative_prompts=neg_prompts,
        descriptions=singles,
    )


def prompts_digest(vectors: AttributeVectors) -> str:
    """Short digest of an attribute's prompts: a saved check applies only to the same prompts."""
    text = "\n".join(vectors.positive_prompts) + "\n/\n" + "\n".join(vectors.negative_prompts)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


# --------------------------------------------------------------------------
# Scoring


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
    (it is how the bundled encoder's scale was chosen, on the demo scenario).

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
    image_attributes : long table image_id, attribute, probability, positive.
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
        if saved and saved.get("probe"):
            probe = saved["probe"]
            source = cluster if probe.get("vectors", "cluster") == "cluster" else joint
            probability = probe_probabilities(source, probe["coef"], probe["intercept"])
            scored_by = "probe"
        else:
            probability = pair_probabilities(
                joint, vectors.positive, vectors.negative, encoder.logit_scale, bias
            )
            scored_by = "zero-shot"
        long_tables.append(
            pd.DataFrame(
                {
                    "image_id": ids,
                    "attribute": attribute.name,
                    "probability": probability.astype(np.float32),
                    "positive": probability >= threshold,
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
        else pd.DataFrame({"image_id": [], "attribute": [], "probability": [], "positive": []})
    )
    return image_attributes, pd.DataFrame(definitions), notes


# --------------------------------------------------------------------------
# Intervals


def wilson_interval(count, n, z: float = Z95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for a binomial proportion (Wilson 1927).

    Parameters
    ----------
    count, n : positives and trials (scalars or arrays). n == 0 gives NaN.

    Returns
    -------
    (low, high) arrays.
    """
    count = np.asarray(count, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = count / n
        denom = 1.0 + z**2 / n
        centre = (p + z**2 / (2 * n)) / denom
        half = z / denom * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2))
        # At the ends the bounds are exactly 0 and 1 (the formula leaves rounding dust).
        low = np.where(n == 0, np.nan, np.where(count == 0, 0.0, centre - half))
        high = np.where(n == 0, np.nan, np.where(count == n, 1.0, centre + half))
    return low, high


def newcombe_interval(count1, n1, count2, n2, z: float = Z95) -> tuple[np.ndarray, np.ndarray]:
    """Hybrid score interval for p1 - p2 from two independent samples.

    Newcombe (1998), "Interval estimation for the difference between
    independent proportions", method 10: built from the two Wilson intervals.
    """
    p1 = np.asarray(count1, dtype=np.float64) / np.asarray(n1, dtype=np.float64)
    p2 = np.asarray(count2, dtype=np.float64) / np.asarray(n2, dtype=np.float64)
    l1, u1 = wilson_interval(count1, n1, z)
    l2, u2 = wilson_interval(count2, n2, z)
    d = p1 - p2
    low = d - np.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2)
    high = d + np.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)
    return low, high


def bootstrap_sums(
    values: np.ndarray,
    samples: int,
    rng: np.random.Generator,
    chunk_elements: int = 4_000_000,
) -> np.ndarray:
    """Column sums of ``samples`` bootstrap resamples of the rows of ``values``.

    The same resamples of rows serve every column, so one draw covers all
    attributes of a group. Drawn in chunks of bounded memory.

    Parameters
    ----------
    values : (n, k) array.
    samples : number of resamples.
    rng : seeded generator.

    Returns
    -------
    (samples, k) float64 sums.
    """
    v = np.asarray(values, dtype=np.float64)
    n, k = v.shape
    sums = np.zeros((samples, k))
    if n == 0:
        return sums
    rows = max(1, chunk_elements // n)
    for start in range(0, samples, rows):
        b = min(rows, samples - start)
        draws = rng.integers(0, n, size=(b, n))
        if k <= 8:  # gathering each column is faster than building count weights
            for j in range(k):
                sums[start:start + b, j] = v[:, j][draws].sum(axis=1)
        else:  # count weights times the value matrix: one matrix product for all columns
            counts = np.bincount((draws + n * np.arange(b)[:, None]).ravel(), minlength=b * n)
            sums[start:start + b] = counts.reshape(b, n).astype(np.float64) @ v
    return sums


def bootstrap_mean_interval(
    values: np.ndarray,
    samples: int,
    rng: np.random.Generator,
    level: float = 0.95,
    chunk_elements: int = 4_000_000,
) -> tuple[np.ndarray, np.ndarray]:
    """Percentile bootstrap interval of the column means of ``values`` (Efron 1979).

    Parameters
    ----------
    values : (n,) or (n, k) array.
    samples : number of bootstrap resamples.
    rng : seeded generator.

    Returns
    -------
    (low, high), each (k,) (or scalars for 1-d input); NaN when n == 0.
    """
    v = np.asarray(values, dtype=np.float64)
    flat = v.ndim == 1
    if flat:
        v = v[:, None]
    n, k = v.shape
    if n == 0 or samples < 1:
        nan = np.full(k, np.nan)
        return (nan[0], nan[0]) if flat else (nan, nan)
    means = bootstrap_sums(v, samples, rng, chunk_elements) / n
    low, high = _percentiles(means, level)
    return (low[0], high[0]) if flat else (low, high)


def _percentiles(means: np.ndarray, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    alpha = (1 - level) / 2
    low, high = np.quantile(means, [alpha, 1 - alpha], axis=0)
    return low, high


def _group_rng(seed: int, key: tuple) -> np.random.Generator:
    """A generator that depends on the study seed and the group, never on table order."""
    return np.random.default_rng([int(seed) & 0xFFFFFFFF, zlib.crc32(repr(key).encode("utf-8"))])


# --------------------------------------------------------------------------
# Brand metrics


def attribute_shares(
    image_attributes: pd.DataFrame,
    images: pd.DataFrame,
    definitions: pd.DataFrame,
    *,
    bootstrap_samples: int = 1000,
    seed: int = 0,
) -> pd.DataFrame:
    """Shares and mean probabilities per brand x source x attribute and per category.

    Parameters
    ----------
    image_attributes : long table from :func:`score_attributes`.
    images : the images table (image_id, brand, category, source).
    definitions : attribute_definitions (threshold, encoder_id per attribute).
    bootstrap_samples : resamples for the mean-probability interval.
    seed : the study seed.

    Returns
    -------
    attribute_shares table: level (brand/category), brand ("" on category rows),
    category, source (consumer/owned/all), attribute, n, positives, share,
    share_low, share_high (95 % Wilson), share_index (100 x share / the category's
    share for the same source and attribute; NaN when that is 0),
    mean_probability, mean_low, mean_high (95 % percentile bootstrap,
    resampling within each brand x source cell), threshold, encoder_id.
    """
    columns = [
        "level", "brand", "category", "source", "attribute", "n", "positives", "share",
        "share_low", "share_high", "mean_probability", "mean_low", "mean_high",
        "threshold", "encoder_id",
    ]
    if image_attributes.empty:
        return pd.DataFrame(columns=columns)
    names = list(definitions["attribute"])
    prob = image_attributes.pivot(index="image_id", columns="attribute", values="probability")[names]
    pos = image_attributes.pivot(index="image_id", columns="attribute", values="positive")[names]
    meta = images.set_index("image_id").loc[prob.index, ["brand", "category", "source"]].astype(str)
    prob_v = prob.to_numpy(np.float64)
    pos_v = pos.to_numpy(bool)

    # Bootstrap within each brand x source cell; a wider group (source "all", a
    # category) adds up its cells' resampled sums, so its resamples keep the
    # numbers of photos per cell as collected (a stratified bootstrap).
    cells = {}
    for key, frame in meta.groupby(["brand", "category", "source"], sort=True):
        index = meta.index.get_indexer(frame.index)
        sums = bootstrap_sums(prob_v[index], bootstrap_samples, _group_rng(seed, key))
        cells[key] = (index, sums)

    groups = []  # (level, brand, category, source, cell keys)
    for level in ("brand", "category"):
        owners = sorted({(k[0], k[1]) if level == "brand" else ("", k[1]) for k in cells})
        for brand, category in owners:
            mine = [k for k in cells if k[1] == category and (level == "category" or k[0] == brand)]
            groups.append((level, brand, category, "all", mine))
            for source in SOURCES:
                sub = [k for k in mine if k[2] == source]
                if sub:
                    groups.append((level, brand, category, source, sub))

    threshold = definitions.set_index("attribute")["threshold"]
    encoder_id = definitions.set_index("attribute")["encoder_id"]
    rows = []
    for level, brand, category, source, keys in groups:
        index = np.concatenate([cells[k][0] for k in keys])
        n = len(index)
        positives = pos_v[index].sum(axis=0)
        low, high = wilson_interval(positives, n)
        means = prob_v[index].mean(axis=0)
        if bootstrap_samples > 0:
            mean_low, mean_high = _percentiles(sum(cells[k][1] for k in keys) / n)
        else:
            mean_low = mean_high = np.full(len(names), np.nan)
        for j, name in enumerate(names):
            rows.append(
                (level, brand, category, source, name, n, int(positives[j]), positives[j] / n,
                 low[j], high[j], means[j], mean_low[j], mean_high[j],
                 float(threshold[name]), encoder_id[name])
            )
    table = pd.DataFrame(rows, columns=columns)
    # index = 100 x brand share / category share, same source (common marketing practice).
    category = table[table["level"] == "category"].set_index(["category", "source", "attribute"])["share"]
    base = category.reindex(pd.MultiIndex.from_frame(table[["category", "source", "attribute"]])).to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        table.insert(table.columns.get_loc("share_high") + 1, "share_index", np.where(base > 0, 100 * table["share"] / base, np.nan))
    return table


def attribute_gaps(shares: pd.DataFrame) -> pd.DataFrame:
    """Consumer-minus-owned difference of shares per brand and attribute.

    The interval is Newcombe's hybrid score interval (95 %); ``significant`` is
    true when it excludes zero. Brands lacking either source get a row with
    NaN numbers and ``significant`` false, so nothing disappears silently.
    """
    columns = [
        "brand", "category", "attribute", "consumer_n", "owned_n", "consumer_share",
        "owned_share", "gap", "gap_low", "gap_high", "significant", "threshold", "encoder_id",
    ]
    brand_rows = shares[shares["level"] == "brand"]
    if brand_rows.empty:
        return pd.DataFrame(columns=columns)
    keys = ["brand", "category", "attribute"]
    base = brand_rows[brand_rows["source"] == "all"][keys + ["threshold", "encoder_id"]]
    table = base
    for source in SOURCES:
        part = brand_rows[brand_rows["source"] == source][keys + ["n", "positives", "share"]]
        part = part.rename(columns={c: f"{source}_{c}" for c in ("n", "positives", "share")})
        table = table.merge(part, on=keys, how="left")
    cn = table["consumer_n"].fillna(0).to_numpy()
    on = table["owned_n"].fillna(0).to_numpy()
    ok = (cn > 0) & (on > 0)
    low = np.full(len(table), np.nan)
    high = np.full(len(table), np.nan)
    if ok.any():
        low[ok], high[ok] = newcombe_interval(
            table["consumer_positives"].to_numpy()[ok], cn[ok],
            table["owned_positives"].to_numpy()[ok], on[ok],
        )
    table["consumer_n"] = cn.astype(int)
    table["owned_n"] = on.astype(int)
    table["gap"] = np.where(ok, table["consumer_share"] - table["owned_share"], np.nan)
    table["gap_low"] = low
    table["gap_high"] = high
    table["significant"] = ok & ((low > 0) | (high < 0))
    return table[columns].reset_index(drop=True)


def attribute_tables(
    images: pd.DataFrame,
    image_ids: Sequence[str],
    joint: np.ndarray,
    cluster: np.ndarray,
    attributes: Sequence[Attribute],
    scoring: ScoringSettings,
    encoder,
    *,
    seed: int = 0,
    saved_checks: dict | None = None,
) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """The attributes stage: every table it writes, and notes for the run log.

    Returns
    -------
    ({"image_attributes", "attribute_definitions", "attribute_shares", "attribute_gaps"}, notes)
    """
    image_attributes, definitions, notes = score_attributes(
        image_ids, joint, cluster, attributes, scoring, encoder, saved_checks
    )
    shares = attribute_shares(
        image_attributes, images, definitions, bootstrap_samples=scoring.bootstrap_samples, seed=seed
    )
    return (
        {
            "image_attributes": image_attributes,
            "attribute_definitions": definitions,
            "attribute_shares": shares,
            "attribute_gaps": attribute_gaps(shares),
        },
        notes,
    )


# --------------------------------------------------------------------------
# Checking an attribute against hand labels


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


#: Columns of a labels CSV.
LABEL_COLUMNS = ("image", "attribute", "label")


def read_labels(
    table: pd.DataFrame,
    images: pd.DataFrame,
    attribute_names: Sequence[str],
    where: str = "labels",
    base: Path | None = None,
) -> tuple[pd.DataFrame, list[str]]:
    """Validate a labels table and match its images to the images table.

    Columns: ``image`` (an image_id, a path relative to the images root as in
    ``images.relpath``, or a file path, absolute or relative to the labels
    file's folder ``base``), ``attribute`` (a name in the study) and ``label``
    (1 = the positive side applies, 0 = it does not).

    Returns
    -------
    labels : image_id, attribute, label (int), one row per labelled pair.
    warnings : rows that could not be used (image unknown or not usable), one line each.

    Raises
    ------
    StudyError naming the file, row and column for a missing column, an
    unknown attribute, a label other than 0/1, or contradictory labels.
    """
    missing = [c for c in LABEL_COLUMNS if c not in table.columns]
    if missing:
        raise StudyError(
            f"{where}: missing column(s) {', '.join(missing)}; expected columns: {', '.join(LABEL_COLUMNS)}"
        )
    known = set(attribute_names)
    by_id = {str(i): str(i) for i in images["image_id"]}
    by_rel = {str(r): str(i) for r, i in zip(images.get("relpath", []), images["image_id"])}
    by_path = {str(Path(p).resolve()): str(i) for p, i in zip(images["path"], images["image_id"])}
    status = dict(zip(images["image_id"].astype(str), images["status"].astype(str)))
    kept = (
        dict(zip(images["image_id"].astype(str), images["duplicate_of"].fillna("").astype(str)))
        if "duplicate_of" in images.columns
        else {}
    )
    out, warnings = [], []
    for row_number, row in enumerate(table.itertuples(index=False), start=2):  # row 1 is the header
        image = str(getattr(row, "image")).strip()
        attribute = str(getattr(row, "attribute")).strip()
        raw_label = str(getattr(row, "label")).strip()
        if attribute not in known:
            raise StudyError(
                f"{where}: row {row_number}: attribute '{attribute}' is not in the study "
                f"(known: {', '.join(sorted(known)) or 'none'})"
            )
        if raw_label not in ("0", "1", "0.0", "1.0"):
            raise StudyError(f"{where}: row {row_number}: label '{raw_label}' must be 0 or 1")
        image_id = by_id.get(image) or by_rel.get(image)
        if image_id is None:
            candidate = Path(image).expanduser()
            if not candidate.is_absolute() and base is not None:
                candidate = base / candidate
            image_id = by_path.get(str(candidate.resolve()))
        if image_id is None:
            warnings.append(f"{where}: row {row_number}: image '{image}' is not in the study's images")
            continue
        if status.get(image_id) == "duplicate" and status.get(kept.get(image_id, "")) == "ok":
            image_id = kept[image_id]  # same content as a kept image: the label applies to it
        if status.get(image_id) != "ok":
            warnings.append(
                f"{where}: row {row_number}: image '{image}' is not usable ({status.get(image_id)})"
            )
            continue
        out.append((image_id, attribute, int(float(raw_label)), row_number))
    labels = pd.DataFrame(out, columns=["image_id", "attribute", "label", "row"])
    conflicts = labels.groupby(["image_id", "attribute"])["label"].nunique()
    conflicts = conflicts[conflicts > 1]
    if len(conflicts):
        image_id, attribute = conflicts.index[0]
        rows = labels[(labels.image_id == image_id) & (labels.attribute == attribute)]["row"].tolist()
        raise StudyError(
            f"{where}: rows {', '.join(map(str, rows))}: image '{image_id}' has both labels 0 and 1 "
            f"for attribute '{attribute}'"
        )
    labels = labels.drop_duplicates(["image_id", "attribute"]).drop(columns="row").reset_index(drop=True)
    return labels, warnings


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
    #: What ``--save-...`` would store: {"threshold", "prompts_digest", "probe": {...}}.
    record: dict = field(default_factory=dict)

    def summary_row(self) -> dict:
        """One row for the ``attribute_check`` table."""
        keys = [
            "attribute", "encoder_id", "n", "n_positive", "n_negative", "enough", "warning", "auc",
            "auc_low", "auc_high", "mann_whitney_p", "better_than_chance", "threshold",
            "threshold_from", "accuracy", "best_threshold", "best_accuracy", "youden_j",
            "chance_accuracy", "probe_auc", "probe_auc_low", "probe_auc_high", "probe_note",
        ]
        return {k: getattr(self, k) for k in keys}

    def describe(self) -> str:
        """A readable report for the terminal."""
        head = (
            f"attribute '{self.attribute}': {self.n} labelled images "
            f"({self.n_positive} positive, {self.n_negative} negative)"
        )
        if not self.enough:
            return f"{head}\n  WARNING: {self.warning}"
        lines = [head]
        verdict = "better than chance" if self.better_than_chance else "NOT better than chance (interval includes 0.5)"
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

"""Choose every constant of the bundled encoder on an outside labelled set (never the demo).

Set: benchmarks/outside_set.py (Debian openclipart-png topic folders). Search:
class phrasing (first synonym / full description / mean over synonyms /
first synonym with its WordNet 3.0 parent / mean of full and parent phrases;
the parents from explore/data/imagenet_class_phrases.tsv, written by
scripts/imagenet_class_phrases.py) x label template x ConSE top-T x softmax
temperature of the class probabilities, scored by (mean pair AUC + 10-way accuracy) / 2,
with the study's default prompt templates. Then, for the chosen encoder, the
logit scale is a Platt fit (Platt 1999; explore.attributes.platt_common_slope:
one slope, an intercept per pair) on the three pairs' margins, and the bias is
the mean of the per-pair intercepts left after attribute_bias's neutral shift.
Prints every candidate, the shipped constants' figures ("before": the
previous constants, "after": the chosen ones) and the values to write in
explore/encoders/bundled.py.

Usage::

    .venv/bin/python benchmarks/bundled_fit.py           # the search
    .venv/bin/python benchmarks/bundled_fit.py --check   # the shipped constants only;
                                                         # exit 1 when a target is missed
    .venv/bin/python benchmarks/bundled_fit.py --cv 5    # the search scored honestly: choose
                                                         # on 4 folds, score on the 5th

Targets (issue 14): mean pair AUC >= 0.80 and 10-way accuracy >= 0.35.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchmarks.outside_set import NAME, PAIRS, available, bundled_outputs, evaluate, load_set, topic_vectors  # noqa: E402

PHRASINGS = ("first", "full", "synonyms", "hypernym", "full+hypernym")
TEMPLATES = ("{name}", "a photo of a {name}", "a {name}")
TOP_T = (3, 10, 20, 50, 100, 200, 500)
TEMPERATURES = (1.0, 2.0, 3.0, 4.0)
# the constants before this fit
BEFORE = {"phrasing": "full", "template": "a photo of a {name}", "top_t": 200, "temperature": 3.0}
# Also measured with --cv 5 (same folds) and left out of the search, since they did not
# pay held out (10-way; the search above: 0.353, without the two WordNet phrasings 0.337):
# longer WordNet chains ("espresso, a kind of coffee, beverage": 0.313 alone; 3 and 4
# ancestors 0.279, 0.276); a class as the mean of its name and its 2 or 3 ancestors'
# names (0.308, 0.305); WordNet glosses ("tabby: a cat with a grey or tawny coat ...")
# alone 0.337, averaged with the full and parent phrases 0.345; synonyms + parent
# (added to the search: 0.342); each phrase averaged over the three templates (added:
# 0.358, within a fold standard error, not worth a template-list setting); T in
# {300, 1000} and temperatures 5 and 6 (added: 0.350, plain argmax 0.268 instead of 0.295).


TARGET_AUC, TARGET_10WAY = 0.80, 0.35


def check(data, probs, sides) -> int:
    """Figures of the shipped constants on the outside set, against the targets."""
    from explore.encoders.bundled import BundledEncoder, conse, soften

    enc = BundledEncoder()
    res = evaluate(conse(soften(probs, enc.temperature), enc.label_embeddings(), enc.top_t), data, sides)
    print(f"shipped ({enc.model_name}): " + ", ".join(f"{k} {v:.3f}" for k, v in res.items()))
    ok = res["mean_pair_auc"] >= TARGET_AUC and res["accuracy_10way"] >= TARGET_10WAY
    print(f"targets mean pair AUC >= {TARGET_AUC}, 10-way >= {TARGET_10WAY}: {'met' if ok else 'NOT met'}")
    return 0 if ok else 1


def candidate_vectors(probs: np.ndarray) -> list[tuple[tuple, np.ndarray]]:
    """Every candidate's image vectors on the outside set: ((phrasing, template, T, temperature), joint)."""
    from explore.encoders.bundled import BundledEncoder, conse, soften

    out = []
    for phrasing in PHRASINGS:
        for template in TEMPLATES:
            labels = BundledEncoder(top_t=1, label_template=template, phrasing=phrasing).label_embeddings()
            for top_t in TOP_T:
                for temperature in TEMPERATURES:
                    out.append(((phrasing, template, top_t, temperature), conse(soften(probs, temperature), labels, top_t)))
    return out


def subset(data, rows: np.ndarray):
    return type(data)(data.topics, data.labels[rows], [data.paths[i] for i in rows])


def cross_validate(data, probs, sides, folds: int, seed: int = 0) -> int:
    """Held-out figures of the whole search: the candidate is chosen on k-1 folds, scored on the k-th.

    Folds are stratified by topic (scikit-learn StratifiedKFold, shuffled with a fixed
    seed). The 10-way rule standardises similarities over the images it is given, so on
    a held-out fold it sees only that fold, as a study sees only its own images.
    """
    from sklearn.model_selection import StratifiedKFold

    candidates = candidate_vectors(probs)
    held = []
    split = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed)
    for k, (train, test) in enumerate(split.split(np.zeros(len(data.labels)), data.labels)):
        def score(joint, rows):
            res = evaluate(joint[rows], subset(data, rows), sides)
            return (res["mean_pair_auc"] + res["accuracy_10way"]) / 2

        chosen, joint = max(candidates, key=lambda c: score(c[1], train))
        res = evaluate(joint[test], subset(data, test), sides)
        held.append(res)
        print(f"fold {k + 1}/{folds}: chosen {chosen} on {len(train)} images; held-out {len(test)} images: "
              + ", ".join(f"{key} {v:.3f}" for key, v in res.items()), flush=True)
    mean = {key: float(np.mean([r[key] for r in held])) for key in held[0]}
    se = {key: float(np.std([r[key] for r in held], ddof=1) / np.sqrt(folds)) for key in held[0]}
    print(f"\n{folds}-fold held-out mean ({NAME}), +- standard error over the folds: "
          + ", ".join(f"{key} {mean[key]:.3f} +- {se[key]:.3f}" for key in mean))
    print(f"targets mean pair AUC >= {TARGET_AUC}, 10-way >= {TARGET_10WAY}")
    return 0


def main() -> int:
    if not available():
        print("Debian openclipart-png is not installed (/usr/share/openclipart/png)")
        return 1
    from explore.attributes.scoring import neutral_vector, platt_common_slope
    from explore.encoders.bundled import BundledEncoder, conse, soften
    from explore.study import DEFAULT_TEMPLATES

    data = load_set()
    print(f"outside set: {NAME}: {len(data.paths)} images, topics {', '.join(data.topics)}")
    print(f"prompt templates (study default): {DEFAULT_TEMPLATES}")
    start = time.perf_counter()
    base = BundledEncoder()
    _, probs = bundled_outputs(base, data)
    print(f"image model outputs in {time.perf_counter() - start:.0f} s")
    sides = topic_vectors(base.encode_texts, data.topics, DEFAULT_TEMPLATES)
    if "--check" in sys.argv[1:]:
        return check(data, probs, sides)

    if "--cv" in sys.argv[1:]:
        return cross_validate(data, probs, sides, int(sys.argv[sys.argv.index("--cv") + 1]))

    rows = []
    for phrasing in PHRASINGS:
        for template in TEMPLATES:
            enc = BundledEncoder(top_t=1, label_template=template, phrasing=phrasing)
            labels = enc.label_embeddings()
            for top_t in TOP_T:
                for temperature in TEMPERATURES:
                    res = evaluate(conse(soften(probs, temperature), labels, top_t), data, sides)
                    score = (res["mean_pair_auc"] + res["accuracy_10way"]) / 2
                    rows.append((score, phrasing, template, top_t, temperature, res))
                    print(
                        f"  {phrasing:<9} {template!r:<22} T={top_t:<4} temp={temperature:<4} pairs "
                        + " ".join(f"{res[f'auc_{a}_vs_{b}']:.3f}" for a, b in PAIRS)
                        + f"  mean {res['mean_pair_auc']:.3f}  10-way {res['accuracy_10way']:.3f}"
                        f" (raw argmax {res['accuracy_10way_raw']:.3f})  score {score:.3f}",
                        flush=True,
                    )
    score, phrasing, template, top_t, temperature, res = max(rows, key=lambda r: r[0])
    before = next(r for r in rows if r[1:5] == tuple(BEFORE.values()))

    # Logit scale and bias on the chosen encoder.
    enc = BundledEncoder(top_t=top_t, label_template=template, phrasing=phrasing, temperature=temperature)
    joint = conse(soften(probs, temperature), enc.label_embeddings(), top_t)
    neutral = neutral_vector(enc)
    margins, ys, shifts = [], [], []
    for a, b in PAIRS:
        ia, ib = data.topics.index(a), data.topics.index(b)
        keep = np.isin(data.labels, [ia, ib])
        margins.append(joint[keep] @ (sides[ia] - sides[ib]))
        ys.append((data.labels[keep] == ia).astype(int))
        shifts.append(float(neutral @ (sides[ia] - sides[ib])))
    scale = platt_common_slope(margins, ys)
    # One intercept shared by the pairs, with the slope fixed at `scale`, on top of
    # attribute_bias's neutral shift -scale * shift: maximum likelihood by a 1-d grid
    # search (the per-pair intercepts are printed to show how much they differ).
    grid = np.linspace(-10, 10, 4001)

    def nll(c, pairs):
        return sum(np.sum(np.logaddexp(0, -(2 * y - 1) * (scale * (m - shift) + c))) for m, y, shift in pairs)

    pairs = list(zip(margins, ys, shifts))
    intercepts = [float(grid[int(np.argmin([nll(c, [pair]) for c in grid]))]) for pair in pairs]
    # Which side of a pair is "positive" is arbitrary, and p must stay 1 - p when
    # the sides are swapped, so each pair enters in both orientations.
    both = pairs + [(-m, 1 - y, -shift) for m, y, shift in pairs]
    bias = float(grid[int(np.argmin([nll(c, both) for c in grid]))])
    print(f"\nbefore ({BEFORE}): " + ", ".join(f"{k} {v:.3f}" for k, v in before[5].items()))
    print(f"after  (phrasing {phrasing!r}, template {template!r}, T={top_t}, temperature {temperature}): "
          + ", ".join(f"{k} {v:.3f}" for k, v in res.items()))
    print(f"(chosen from {len(rows)} candidates on the same set: the figures after are optimistic by the search)")
    print(f"Platt common slope on the three pairs: {scale:.2f}; per-pair intercepts after the neutral shift: "
          + ", ".join(f"{c:+.2f}" for c in intercepts) + f"; shared intercept (pairs in both orientations) {bias:+.2f}")
    print("\nwrite in explore/encoders/bundled.py:")
    print(f"  DEFAULT_PHRASING = {phrasing!r}\n  DEFAULT_LABEL_TEMPLATE = {template!r}\n  DEFAULT_TOP_T = {top_t}")
    print(f"  DEFAULT_TEMPERATURE = {temperature}")
    print(f"  BUNDLED_LOGIT_SCALE = {scale:.1f}\n  BUNDLED_LOGIT_BIAS = {bias:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

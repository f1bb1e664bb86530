"""How well the naming rule names known contexts, on an outside labelled set (never the demo).

Set: benchmarks/outside_set.py (Debian openclipart-png topic folders, 10 topics).
Each topic folder is taken as a found context (its true images, so clustering
errors do not enter); the vocabulary is the shipped general list
(explore/data/context_vocabulary.txt) plus the ten topic names, so a context is
named right when it gets its own topic's name. Printed per rule: how many of
the 10 topics get their own name (unique names, linear_sum_assignment as
explore does), and, for the shipped rule, each topic's name confidence and
whether it is weak (explore/context_names.py), so the confidence can be read
against right and wrong names.

Rules compared (explore.contexts.distinctiveness is the first):
- mean-others: affinity minus the mean affinity of the other contexts;
- best-other: affinity minus the best other context's affinity;
- affinity: the context's mean standardised similarity alone.

Usage::

    .venv/bin/python benchmarks/context_naming.py
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchmarks.outside_set import NAME, available, bundled_outputs, load_set  # noqa: E402


def main() -> int:
    if not available():
        print("Debian openclipart-png is not installed (/usr/share/openclipart/png)")
        return 1
    from scipy.optimize import linear_sum_assignment

    from explore import contexts as ctx
    from explore.context_names import WEAK_BELOW
    from explore.encoders.bundled import BundledEncoder, conse, soften

    data = load_set()
    enc = BundledEncoder()
    _, probs = bundled_outputs(enc, data)
    joint = conse(soften(probs, enc.temperature), enc.label_embeddings(), enc.top_t)
    general = ctx.load_vocabulary(ctx.ContextSettings())
    phrases = list(dict.fromkeys(general + data.topics))
    vectors = np.asarray(enc.encode_texts(phrases), dtype=np.float32)
    labels = data.labels + 1  # contexts 1..10
    print(f"outside set: {NAME}: {len(labels)} images, {len(data.topics)} topics as contexts; "
          f"vocabulary {len(general)} general phrases + the {len(data.topics)} topic names")

    standard = ctx.standardised_similarities(joint, vectors)
    affinity = np.stack([standard[labels == c].mean(axis=0) for c in range(1, 11)])
    k = len(affinity)
    rules = {
        "mean-others": affinity - (affinity.sum(axis=0, keepdims=True) - affinity) / (k - 1),
        "best-other": affinity - np.stack([np.delete(affinity, r, axis=0).max(axis=0) for r in range(k)]),
        "affinity": affinity,
    }
    for rule, score in rules.items():
        rows, cols = linear_sum_assignment(score, maximize=True)
        right = sum(phrases[c] == data.topics[r] for r, c in zip(rows, cols))
        print(f"  {rule:<12} {right} of {k} topics get their own name")

    named = ctx.name_contexts(joint, labels, phrases, vectors, seed=0)
    right_conf, wrong_conf = [], []
    print(f"\nshipped rule, with confidence (weak below {WEAK_BELOW}):")
    for r in named.itertuples():
        topic = data.topics[r.context_id - 1]
        ok = r.suggested_name == topic
        (right_conf if ok else wrong_conf).append(r.name_confidence)
        print(f"  {topic:<15} -> {r.suggested_name!r:<40} confidence {r.name_confidence:.2f}"
              f"{' weak' if r.name_confidence < WEAK_BELOW else ''}  {'right' if ok else 'wrong'}; runner-up {r.runner_up!r}")
    strong_right = sum(c >= WEAK_BELOW for c in right_conf)
    strong_wrong = sum(c >= WEAK_BELOW for c in wrong_conf)
    print(f"\nnames shown (confidence >= {WEAK_BELOW}): {strong_right + strong_wrong}, of which right "
          f"{strong_right}; weak: {len(named) - strong_right - strong_wrong}, of which right {len(right_conf) - strong_right}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Precision and recall of the commercial-post flag on an outside labelled set (never the demo).

Set: ``benchmarks/commercial_set.py`` ("outside-commercial-v2", its docstring
defines it): pinned sources only (Debian base-files licence texts,
openclipart-png objects, mate-backgrounds and lomiri-wallpapers-16.04
photographs, scikit-image's sample photos, DejaVu fonts). Positives: products
on plain colour, shop listings, text screenshots, text-heavy adverts, memes;
negatives: photo crops, objects in photos, photos with a small caption, photos
padded to square. Seeded split into a fit half and a check half, stratified by
kind.

On the fit half: a logistic regression (scikit-learn) over the two signals of
``explore/commercial.py`` (plain border share, prompt margin) gives the
coefficients, and the threshold is the lowest at which at most
``MAX_FIT_FPR`` (10 %) of the fit half's negatives are flagged (a false
positive drops a genuine consumer photo from the shares); ``--fit`` prints
them (copy them into explore/commercial.py).
On the check half only: precision, recall (scikit-learn ``precision_score``,
``recall_score``) and ROC AUC of the shipped constants, per signal and combined;
recall per positive kind; false-positive rate per negative kind and per photo
source.

Encoders: ``bundled`` always; ``clip`` only when its weights are local (not on
the build machine: the row says so).

    .venv/bin/python benchmarks/commercial_flag.py [--fit] [--n 40]
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import commercial_set  # noqa: E402

from explore import commercial  # noqa: E402


#: The threshold rule (fit half only): a false positive drops a genuine consumer
#: photo from the shares, so at most this share of the fit half's negatives may be flagged.
MAX_FIT_FPR = 0.10


def fit_threshold(p: np.ndarray, y: np.ndarray) -> tuple[float, float, float]:
    """(threshold, false-positive rate, recall): the lowest threshold (0.30..0.95, step 0.01) whose
    false-positive rate on ``y == 0`` is at most ``MAX_FIT_FPR``."""
    for t in np.round(np.arange(0.30, 0.951, 0.01), 2):
        flagged = p >= t
        if flagged[y == 0].mean() <= MAX_FIT_FPR:
            return float(t), float(flagged[y == 0].mean()), float(flagged[y == 1].mean())
    flagged = p >= 0.95
    return 0.95, float(flagged[y == 0].mean()), float(flagged[y == 1].mean())


def joint_vectors(encoder, images) -> np.ndarray:
    import torch

    out = []
    for k in range(0, len(images), 32):
        batch = torch.stack([encoder.preprocess(im.convert("RGB")) for im in images[k:k + 32]])
        with torch.inference_mode():
            out.append(encoder.encode_images(batch)["joint"])
    return np.concatenate(out)


def main(argv=None) -> int:
    from sklearn.linear_model import LogisticRegression
    from sklearn.metrics import precision_score, recall_score, roc_auc_score

    from explore.encoders import EncoderUnavailable, load_encoder

    ap = argparse.ArgumentParser()
    ap.add_argument("--fit", action="store_true", help="print the logistic coefficients and threshold fitted on the fit half")
    ap.add_argument("--n", type=int, default=40, help="images per kind (nine kinds)")
    args = ap.parse_args(argv)

    images, labels, kinds, recipes = commercial_set.build(args.n)
    fit, check = commercial_set.halves(kinds)
    kinds = np.asarray(kinds)
    photo_source = np.array([r.split("photo=", 1)[1].split("/", 1)[0] if "photo=" in r else "" for r in recipes])
    plain = np.array([commercial.plain_border_share(im) for im in images])
    print(f"set: {commercial_set.NAME} (fingerprint {commercial_set.fingerprint(recipes)}), {len(labels)} images "
          f"({int(labels.sum())} commercial), fit half {int(fit.sum())}, check half {int(check.sum())}")
    os.environ.setdefault("HF_HUB_OFFLINE", "1")  # clip: local weights only, never a download here
    for name in ("bundled", "clip"):
        try:
            encoder, _ = load_encoder(name)
        except EncoderUnavailable as exc:
            print(f"{name}: not measured ({type(exc).__name__}: {str(exc).splitlines()[0][:160]})")
            continue
        margin = commercial.prompt_margin(joint_vectors(encoder, images), encoder.encode_texts)
        if args.fit:
            x = np.c_[plain, margin]
            model = LogisticRegression(C=1000.0).fit(x[fit], labels[fit])
            c_plain, c_margin, c0 = (round(float(v), 2) for v in (*model.coef_[0], model.intercept_[0]))
            p_fit = 1.0 / (1.0 + np.exp(-(c0 + c_plain * plain[fit] + c_margin * margin[fit])))
            t, fpr, rec = fit_threshold(p_fit, labels[fit])
            print(f"{name} fit half: COEF_PLAIN = {c_plain:.2f}, COEF_MARGIN = {c_margin:.2f}, INTERCEPT = {c0:.2f}, "
                  f"THRESHOLD = {t:.2f} (lowest with a fit-half false-positive rate <= {MAX_FIT_FPR}: "
                  f"{fpr:.2f}, fit-half recall {rec:.2f})")
        score = commercial.commercial_score(plain, margin)
        flagged = score >= commercial.THRESHOLD
        y = labels[check]
        print(f"{name} ({encoder.id}) check half, shipped constants, threshold {commercial.THRESHOLD}:")
        print(f"  combined: precision {precision_score(y, flagged[check]):.3f}, "
              f"recall {recall_score(y, flagged[check]):.3f}, AUC {roc_auc_score(y, score[check]):.3f}")
        at_half = score[check] >= 0.5
        print(f"  (at threshold 0.5 instead: precision {precision_score(y, at_half):.3f}, "
              f"recall {recall_score(y, at_half):.3f}, false-positive rate {at_half[y == 0].mean():.3f})")
        print(f"  false-positive rate over all negatives: {flagged[check][y == 0].mean():.3f}")
        print(f"  plain border share alone: AUC {roc_auc_score(y, plain[check]):.3f}; "
              f"prompt margin alone: AUC {roc_auc_score(y, margin[check]):.3f}")
        for kind in commercial_set.POSITIVE_KINDS:
            m = check & (kinds == kind)
            print(f"  recall, {kind}: {flagged[m].mean():.2f} ({int(flagged[m].sum())} of {int(m.sum())} flagged; "
                  f"median plain {np.median(plain[m]):.2f}, margin {np.median(margin[m]):+.3f})")
        for kind in commercial_set.NEGATIVE_KINDS:
            m = check & (kinds == kind)
            print(f"  false positives, {kind}: {flagged[m].mean():.2f} ({int(flagged[m].sum())} of {int(m.sum())}; "
                  f"median plain {np.median(plain[m]):.2f}, margin {np.median(margin[m]):+.3f})")
        negative = check & (labels == 0)
        for source in sorted(set(photo_source[negative])):
            m = negative & (photo_source == source)
            print(f"  false positives, negatives from {source} photos: {int(flagged[m].sum())} of {int(m.sum())}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Commercial-post flag: consumer photos that look like shop listings, product shots, screenshots or adverts.

A stage after embed (and near-duplicates). Two signals per image, combined by a
logistic model whose coefficients were fitted by ``benchmarks/commercial_flag.py``
on one half of an outside labelled set (never the demo) and checked on the other:

- ``plain``: the share of the picture's border that is near-uniform (within
  ``TOLERANCE`` of the border's median colour). Product-on-plain-background
  shots, screenshots and most adverts have one; photos rarely do.
- ``margin``: the zero-shot margin of the image's joint vector between
  prompts for commercial pictures and prompts for ordinary photos (mean cosine
  to each set, the encoder's own text vectors).

Study key ``images.commercial_posts``: ``exclude`` (default: flagged consumer
photos get status ``commercial`` and leave the consumer shares) or ``keep``
(flagged, counted). Owned photos are never excluded: a brand's own feed is
commercial by nature, so the flag is only computed for ``consumer`` rows.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

#: Colour distance (0-255 per channel, max over channels) counted as "the same" as the border median.
TOLERANCE = 12
#: Width of the border strip, as a fraction of the shorter side.
BORDER = 0.08
#: Side the picture is reduced to before measuring (cheap; plainness survives).
SIDE = 128
#: Names the measurement, so remembered plain shares (``known_plain``) of other settings are not reused.
PLAIN_VERSION = f"plain-v1-{SIDE}-{BORDER}-{TOLERANCE}"

COMMERCIAL_PROMPTS = (
    "a product photo on a plain white background",
    "a shop listing of a product for sale",
    "a screenshot of a web page with text",
    "an advertisement poster with large text",
)
PHOTO_PROMPTS = (
    "a candid photo of people outdoors",
    "a photo of a room",
    "a snapshot taken with a phone",
    "a photo of a landscape",
)

#: Logistic model over (plain, margin) and its threshold: fitted by
#: ``benchmarks/commercial_flag.py --fit`` (bundled encoder) on the fit half (180
#: images) of the outside set "outside-commercial-v2" (benchmarks/commercial_set.py,
#: fingerprint b4ad17b14106bf62); figures on its check half: see README "Commercial posts".
#: The prompt margin lives in the bundled joint space, so they are refitted whenever its
#: vectors change (these: bundled-v5).
COEF_PLAIN = 2.12
COEF_MARGIN = 64.66
INTERCEPT = 1.74
#: Probability at or above which a photo is flagged: the lowest at which at most 10 % of
#: the fit half's ordinary photos are flagged (a false positive drops a genuine consumer photo).
THRESHOLD = 0.66
#: ``plain`` at or above which the reason names the plain background.
PLAIN_REASON = 0.6
#: Prompt margin above which the reason names the prompts (the margin that flags a photo whose border is half plain).
MARGIN_REASON = float((np.log(THRESHOLD / (1 - THRESHOLD)) - INTERCEPT - COEF_PLAIN * 0.5) / COEF_MARGIN)

MODES = ("exclude", "keep")


def plain_border_share(image) -> float:
    """Share of the border strip within ``TOLERANCE`` of its median colour (0..1).

    Parameters
    ----------
    image : a PIL image (any mode).
    """
    im = image.convert("RGB")
    im.thumbnail((SIDE, SIDE))
    a = np.asarray(im, dtype=np.int16)
    h, w = a.shape[:2]
    b = max(1, int(round(BORDER * min(h, w))))
    strip = np.concatenate([a[:b].reshape(-1, 3), a[-b:].reshape(-1, 3),
                            a[b:-b, :b].reshape(-1, 3), a[b:-b, -b:].reshape(-1, 3)])
    median = np.median(strip, axis=0)
    return float((np.abs(strip - median).max(axis=1) <= TOLERANCE).mean())


def plain_shares(paths, log=None) -> np.ndarray:
    """``plain_border_share`` of each file (NaN where it cannot be read)."""
    from PIL import Image

    out = np.full(len(paths), np.nan)
    for k, path in enumerate(paths):
        try:
            with Image.open(path) as im:
                im.draft("RGB", (SIDE * 2, SIDE * 2))  # JPEG: decode at a reduced size
                out[k] = plain_border_share(im)
        except (OSError, ValueError) as exc:
            if log:
                log(f"commercial: {path}: not measured ({type(exc).__name__})")
    return out


def prompt_margin(joint: np.ndarray, encode_texts) -> np.ndarray:
    """Mean cosine to ``COMMERCIAL_PROMPTS`` minus mean cosine to ``PHOTO_PROMPTS`` per row of ``joint``."""
    def unit(v):
        v = np.asarray(v, dtype=np.float32)
        return v / np.maximum(np.linalg.norm(v, axis=1, keepdims=True), 1e-12)

    pos = unit(encode_texts(list(COMMERCIAL_PROMPTS)))
    neg = unit(encode_texts(list(PHOTO_PROMPTS)))
    joint = np.asarray(joint, dtype=np.float32)
    return (joint @ pos.T).mean(axis=1) - (joint @ neg.T).mean(axis=1)


def commercial_score(plain: np.ndarray, margin: np.ndarray) -> np.ndarray:
    """Probability-like score (logistic over the two signals); a missing ``plain`` counts as 0."""
    plain = np.nan_to_num(np.asarray(plain, dtype=float), nan=0.0)
    z = INTERCEPT + COEF_PLAIN * plain + COEF_MARGIN * np.asarray(margin, dtype=float)
    return 1.0 / (1.0 + np.exp(-z))


def reasons(plain: np.ndarray, margin: np.ndarray, flagged: np.ndarray) -> list[str]:
    """Why each flagged photo was flagged ("" where not flagged)."""
    out = []
    for p, m, f in zip(plain, margin, flagged):
        if not f:
            out.append("")
            continue
        parts = []
        if np.isfinite(p) and p >= PLAIN_REASON:
            parts.append(f"plain background ({100 * p:.0f} % of the border)")
        if m > MARGIN_REASON:
            parts.append(f"closer to shop/screenshot/advert prompts (margin {m:+.3f})")
        out.append("; ".join(parts) or "combined signals")
    return out


def flag_commercial(images: pd.DataFrame, embeddings, encode_texts, mode: str = "exclude", log=None,
                    known_plain: dict | None = None):
    """Flag consumer photos that look commercial; with ``exclude`` drop them from the rows used.

    Parameters
    ----------
    images : the images table (``status``, ``source``, ``path``, ``image_id``, ``sha256``).
    embeddings : ``embed.Embeddings`` of its usable rows.
    encode_texts : the encoder's text function (prompt vectors).
    mode : ``exclude`` (status ``commercial``, vectors dropped) or ``keep`` (columns only).
    known_plain : {sha256: plain border share} measured before (``PLAIN_VERSION``);
        those files are not opened again (a re-run reads no image here).

    Returns
    -------
    (images, embeddings, notes): the table with ``commercial_plain``,
    ``commercial_score``, ``commercial_flagged``, ``commercial_reason`` (NaN /
    False / "" outside the usable consumer rows), the embeddings of the rows
    still ``ok``, notes.
    """
    if mode not in MODES:
        raise ValueError(f"images.commercial_posts is '{mode}'; expected one of {', '.join(MODES)}")
    table = images.copy()
    table["commercial_plain"] = np.nan
    table["commercial_score"] = np.nan
    table["commercial_flagged"] = False
    table["commercial_reason"] = ""
    row_of = {image_id: k for k, image_id in enumerate(embeddings.image_ids)}
    ids = table["image_id"].map(row_of)
    target = table.index[(table["status"] == "ok") & (table["source"] == "consumer") & ids.notna()]
    if len(target):
        rows = ids[target].astype(int).to_numpy()
        known = known_plain or {}
        shas = table.loc[target, "sha256"].astype(str).to_numpy() if "sha256" in table else np.full(len(target), "")
        plain = np.array([known.get(sha, np.nan) for sha in shas], dtype=float)
        todo = np.flatnonzero(~np.isfinite(plain))
        if len(todo):
            plain[todo] = plain_shares(table.loc[target[todo], "path"].astype(str).tolist(), log=log)
        table.loc[target, "commercial_plain"] = plain
        margin = prompt_margin(embeddings.joint[rows], encode_texts)
        score = commercial_score(plain, margin)
        flagged = score >= THRESHOLD
        table.loc[target, "commercial_score"] = score
        table.loc[target, "commercial_flagged"] = flagged
        table.loc[target, "commercial_reason"] = reasons(plain, margin, flagged)
    n_flag = int(table["commercial_flagged"].sum())
    note = (f"commercial posts: {n_flag} of {len(target)} consumer photos flagged (score >= {THRESHOLD}); "
            f"images.commercial_posts = '{mode}'")
    if mode == "keep" or not n_flag:
        return table, embeddings, [note + ("" if not n_flag else ": still counted in the consumer shares")]
    hit = table["commercial_flagged"].astype(bool)
    table.loc[hit, "status"] = "commercial"
    table.loc[hit, "reason"] = ("looks like a shop listing, product shot, screenshot or advert: "
                                + table.loc[hit, "commercial_reason"]
                                + " (left out of consumer shares; images.commercial_posts = 'keep' counts it)")
    keep = set(table.loc[table["status"] == "ok", "image_id"])
    rows = [k for k, image_id in enumerate(embeddings.image_ids) if image_id in keep]
    kept = replace(embeddings, image_ids=[embeddings.image_ids[k] for k in rows],
                   cluster=embeddings.cluster[rows], joint=embeddings.joint[rows])
    return table, kept, [note + f": {n_flag} left out of the consumer shares"]

"""Context names the analyst can defend: a confidence per name, and the analyst's own edits.

Part of the contexts stage (``explore.contexts`` calls it); pure functions over
arrays and DataFrames.

**Confidence.** A context is named with the vocabulary phrase that is most
distinctive for it (``explore.contexts.distinctiveness``). How sure is that
choice? The photos of a context are a sample, so we resample them (a seeded
bootstrap, Efron 1979): ``name_confidence`` is the share of resamples in which
the chosen phrase stays more distinctive than every other phrase still free
for this context (phrases given to other contexts are not rivals, since names
are unique). ``runner_up`` is the strongest such rival, ``name_margin`` the
distinctiveness gap to it on all photos. A name is **weak** when its
confidence is below ``WEAK_BELOW`` (0.8: our own rule, the same 80 % of
bootstrap replicates the brand map asks before it names the brand that moves
most; not fitted on any data). A weak name is shown as "context N" with its
three best candidate phrases, so nobody quotes a guess as a finding.

**Edits.** ``[[contexts.edits]]`` in the study renames, merges or drops
contexts, each addressed by its number in the run or by an image it contains
(an image id or a path relative to the images root), so that an edit made
after one run still finds its context after a re-run that numbers contexts
differently. Merges and drops are applied to the image labels before any
table is computed (a merged context's photos count together in every share
and test; a dropped context's photos become unassigned); renames replace the
shown name. An edit that finds no context is an error naming the edit.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from explore.study import ContextEdit, StudyError

#: Below this bootstrap confidence a name is weak and shown as "context N".
WEAK_BELOW = 0.8
#: Bootstrap resamples of each context's photos.
NAME_RESAMPLES = 200
#: Candidate phrases shown for a weak name.
CANDIDATES = 3
UNASSIGNED_ID = -1


def name_confidence(
    standardised: np.ndarray,
    labels: np.ndarray,
    ids: np.ndarray,
    chosen: dict[int, int],
    *,
    resamples: int = NAME_RESAMPLES,
    seed: int = 0,
) -> pd.DataFrame:
    """Bootstrap confidence of each context's chosen phrase against its free rivals.

    Parameters
    ----------
    standardised : (n, m) image x phrase similarities, standardised per phrase.
    labels : (n,) context per image (-1 unassigned); ids : the contexts, in order.
    chosen : context id -> column of its chosen phrase.

    Returns
    -------
    DataFrame: context_id, name_confidence, name_margin, runner_up_column,
    candidate_columns (the three best phrases for the context, chosen first
    when it is among them).
    """
    k = len(ids)
    affinity = np.stack([standardised[labels == c].mean(axis=0) for c in ids]) if k else np.zeros((0, 0))
    others = ((affinity.sum(axis=0, keepdims=True) - affinity) / (k - 1)) if k > 1 else np.zeros_like(affinity)
    taken = {col for col in chosen.values()}
    rng = np.random.default_rng(seed)
    rows = []
    for r, cid in enumerate(ids):
        cid = int(cid)
        score = affinity[r] - others[r]
        order = np.argsort(-score, kind="stable")
        a = chosen.get(cid)
        if a is None:
            rows.append((cid, np.nan, np.nan, -1, [int(j) for j in order[:CANDIDATES]]))
            continue
        rivals = np.array([j for j in range(score.shape[0]) if j != a and j not in taken - {a}], dtype=int)
        if not len(rivals):
            rows.append((cid, 1.0, np.nan, -1, [a]))
            continue
        members = standardised[labels == cid]
        m = len(members)
        wins = 0
        for start in range(0, resamples, 50):
            b = min(50, resamples - start)
            counts = rng.multinomial(m, np.full(m, 1.0 / m), size=b).astype(np.float32)
            resampled = counts @ members / m - others[r]  # (b, phrases)
            wins += int((resampled[:, a] > resampled[:, rivals].max(axis=1)).sum())
        best_rival = int(rivals[np.argmax(score[rivals])])
        candidates = [a] + [int(j) for j in order if j != a and j in set(rivals.tolist())][: CANDIDATES - 1]
        rows.append((cid, wins / resamples, float(score[a] - score[best_rival]), best_rival, candidates))
    return pd.DataFrame(rows, columns=["context_id", "name_confidence", "name_margin", "runner_up_column",
                                       "candidate_columns"])


# --------------------------------------------------------------------------
# Analyst edits


def resolve_image(image: str, image_ids: np.ndarray, relpaths: dict[str, str] | None) -> int | None:
    """Row of an image named by id or by path relative to the images root (None when unknown)."""
    where = np.flatnonzero(image_ids == image)
    if len(where):
        return int(where[0])
    if relpaths:
        key = image.replace("\\", "/").lstrip("./")
        for image_id, rel in relpaths.items():
            if rel.replace("\\", "/") == key:
                where = np.flatnonzero(image_ids == image_id)
                if len(where):
                    return int(where[0])
    return None


def _context_of(edit: ContextEdit, ref, labels: np.ndarray, image_ids: np.ndarray, relpaths, what: str) -> int:
    fitted = set(int(c) for c in np.unique(labels[labels > 0]))
    if isinstance(ref, int):
        if ref not in fitted:
            raise StudyError(
                f"contexts.edits[{edit.position}]: {what} context {ref} does not exist in this run "
                f"(contexts 1 to {max(fitted) if fitted else 0}); address it by an image it contains "
                "(key 'image') so the edit survives re-runs"
            )
        return ref
    row = resolve_image(ref, image_ids, relpaths)
    if row is None:
        raise StudyError(f"contexts.edits[{edit.position}]: {what} image '{ref}' is not among this run's "
                         "embedded images (give its image_id from images.csv or its path relative to the images root)")
    if labels[row] == UNASSIGNED_ID:
        raise StudyError(f"contexts.edits[{edit.position}]: {what} image '{ref}' is in no context in this run "
                         "(unassigned); name the context by another of its images")
    return int(labels[row])


def apply_edits(
    labels: np.ndarray,
    image_ids,
    edits: list[ContextEdit],
    relpaths: dict[str, str] | None = None,
) -> tuple[np.ndarray, dict[int, str], pd.DataFrame]:
    """Apply merges and drops to the labels; collect renames.

    Every edit is resolved against the contexts as found (before any edit),
    so the order of edits does not change what they address; merges chain
    (A into B, B into C puts A and B into C). Context numbers are kept (no
    renumbering), so a merged context keeps the number of the one it went into.

    Returns
    -------
    (edited labels, renames {context id: name}, a log table: edit, target,
    action, context_id, result).
    """
    labels = np.asarray(labels).copy()
    image_ids = np.asarray(image_ids).astype(str)
    found = labels.copy()
    parent: dict[int, int] = {int(c): int(c) for c in np.unique(found[found > 0])}

    def root(c: int) -> int:
        while parent[c] != c:
            c = parent[c]
        return c

    dropped: set[int] = set()
    renames: dict[int, tuple[int, str]] = {}
    log = []
    for edit in edits:
        target = _context_of(edit, edit.context if edit.context is not None else edit.image, found, image_ids,
                             relpaths, "the")
        if edit.drop:
            dropped.add(target)
            log.append((edit.position, edit.target(), "drop", target, f"context {target}'s photos become unassigned"))
        elif edit.merge_into is not None:
            into = _context_of(edit, edit.merge_into, found, image_ids, relpaths, "merge_into:")
            if root(into) == root(target):
                raise StudyError(f"contexts.edits[{edit.position}]: {edit.target()} is already context {root(into)}; "
                                 "nothing to merge")
            parent[root(target)] = root(into)
            log.append((edit.position, edit.target(), "merge", target, f"context {target} merged into context {into}"))
        else:
            renames[target] = (edit.position, edit.name)
            log.append((edit.position, edit.target(), "rename", target, f"context {target} named '{edit.name}'"))
    for c in list(parent):
        if root(c) in dropped or c in dropped:
            dropped.add(c)
    mask = labels > 0
    labels[mask] = [UNASSIGNED_ID if int(c) in dropped else root(int(c)) for c in labels[mask]]
    names: dict[int, str] = {}
    for target, (position, name) in renames.items():
        if target in dropped:
            raise StudyError(f"contexts.edits[{position}]: renames context {target}, which another edit drops")
        names[root(target)] = name
    table = pd.DataFrame(log, columns=["edit", "target", "action", "context_id", "result"])
    return labels, names, table

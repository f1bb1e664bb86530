"""Usage contexts: find them in the photos, name them, and index brands on them.

A *context* is a cluster of images that show one usage situation (a campfire,
a desk, a beach ...). Contexts are found from the photos themselves, not from a
list the analyst already had:

1. UMAP (McInnes, Healy and Melville, 2018; cosine metric, seeded) reduces the
   cluster vectors to a few dimensions for clustering and, separately, to two
   dimensions for the map;
2. HDBSCAN (Campello, Moulavi and Sander, 2013; the ``hdbscan`` package)
   clusters the reduced points. Images it leaves as noise stay in every table
   as context ``-1`` "unassigned", with their count reported;
3. each context is named zero-shot with the vocabulary phrase that is most
   *distinctive* for it (similar to its images, dissimilar to the other
   contexts), so two contexts never share one generic name;
4. per brand, source and context: count, share, index = 100 x brand share /
   category share (100 = parity; common marketing practice), a two-sided
   Fisher exact test of the brand against the rest of its category and
   Benjamini-Hochberg false-discovery control across the table;
5. findings: signature contexts, unexpected contexts and contexts whose share
   differs between a brand's consumer and owned photos.

Reproducibility versus speed: UMAP runs single-threaded when it is seeded
(umap-learn turns parallel layout off for a fixed ``random_state``). We keep
the seed, because the same study and seed must give the same contexts, and buy
the speed back in two ways: the nearest-neighbour graph is computed once and
shared by both layouts (exact, by matrix products), and above ``fit_sample``
images UMAP and HDBSCAN are fitted on a seeded sample: every other image is
placed on the map from its nearest sampled neighbours, as ``UMAP.transform``
starts (see ``place_by_neighbours``), and given a context by HDBSCAN's
``approximate_predict`` (see ``cluster_points``).

Everything here works on arrays and DataFrames; ``umap`` and ``hdbscan`` are
imported inside the functions that use them.
"""

from __future__ import annotations

import time
import warnings
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from explore.study import ContextSettings

UNASSIGNED_ID = -1
UNASSIGNED = "unassigned"
SOURCES = ("consumer", "owned", "all")
DEFAULT_VOCABULARY = Path(__file__).resolve().parent / "data" / "context_vocabulary.txt"


# --------------------------------------------------------------------------
# Parameters that scale with the number of images


def resolve_parameters(n: int, settings: ContextSettings, seed: int = 0) -> dict:
    """The clustering parameters actually used for ``n`` images.

    ``None`` in the settings means "scale with n":

    - neighbours (UMAP ``n_neighbors``): round(sqrt(n) / 2), kept within
      [30, 50]. UMAP's own default is 15; for clustering its documentation
      ("Using UMAP for Clustering", from memory) uses 30, since larger
      neighbourhoods keep the global structure clustering needs. The
      square-root rule is our own rule of thumb;
    - min_cluster_size (HDBSCAN): 0.5 % of the images, kept within [20, 500],
      so a context is never a handful of near-duplicates and, at 100,000
      images, a context still needs only 500 of them;
    - min_samples (HDBSCAN): min(min_cluster_size, 10). HDBSCAN's own default
      (= min_cluster_size) calls many border images noise; a smaller value
      keeps more of them in their context;
    - cluster_selection_method: the study's ``cluster_selection`` ("leaf" by
      default: HDBSCAN's "eom" often returns one large parent cluster where
      several usage situations touch; on the demo scenario it merged
      breakfast, dinner and gym photos, "leaf" kept them apart).

    These defaults were chosen on the demo scenario (bundled encoder, seeds
    0, 1, 7) and on random clustered vectors (benchmarks/contexts_scale.py).

    Parameters
    ----------
    n : number of images to cluster.
    settings : the study's context settings (explicit values win).
    seed : the study seed, recorded with the parameters.

    Returns
    -------
    dict with neighbours, min_cluster_size, min_samples, cluster_dimensions,
    fit_sample, umap_min_dist_cluster, umap_min_dist_map, metric, seed, n.
    """
    if n < 3:
        raise ValueError(f"contexts: need at least 3 images to find contexts, got {n}")
    neighbours = settings.neighbours
    if neighbours is None:
        neighbours = int(np.clip(round(np.sqrt(n) / 2), 30, 50))
    neighbours = int(max(2, min(neighbours, n - 1)))
    min_cluster_size = settings.min_cluster_size
    if min_cluster_size is None:
        min_cluster_size = int(np.clip(round(0.005 * n), 20, 500))
    min_cluster_size = int(max(2, min(min_cluster_size, n)))
    min_samples = settings.min_samples
    if min_samples is None:
        min_samples = min(min_cluster_size, 10)
    min_samples = int(max(1, min(min_samples, n - 1)))
    dims = int(max(2, min(settings.cluster_dimensions, n - 2)))
    return {
        "n": int(n),
        "seed": int(seed),
        "metric": "cosine",
        "neighbours": neighbours,
        "cluster_dimensions": dims,
        "umap_min_dist_cluster": 0.0,
        "umap_min_dist_map": 0.1,
        "fit_sample": int(settings.fit_sample),
        "min_cluster_size": min_cluster_size,
        "min_samples": min_samples,
        "cluster_selection_method": settings.cluster_selection,
    }


# --------------------------------------------------------------------------
# Finding contexts


@dataclass
class ContextFit:
    """Contexts found in one set of vectors.

    labels : (n,) int, context id per image, 1..K by decreasing size, -1 = unassigned.
    membership : (n,) float, HDBSCAN membership probability (0 for unassigned).
    points : (n, d) float32, the UMAP points HDBSCAN clustered.
    map_xy : (n, 2) float32, the 2-D UMAP map.
    parameters : the values used (see ``resolve_parameters``).
    """

    labels: np.ndarray
    membership: np.ndarray
    points: np.ndarray
    map_xy: np.ndarray
    parameters: dict = field(default_factory=dict)
    seconds: dict = field(default_factory=dict)

    @property
    def n_contexts(self) -> int:
        return int(self.labels.max()) if (self.labels > 0).any() else 0

    @property
    def n_unassigned(self) -> int:
        return int((self.labels == UNASSIGNED_ID).sum())


def exact_neighbours(
    vectors: np.ndarray, k: int, base: np.ndarray | None = None, chunk: int = 1024
) -> tuple[np.ndarray, np.ndarray]:
    """Exact k nearest neighbours by cosine distance, by matrix products.

    The vectors are L2-normalised, so cosine similarity is a matrix product,
    done in row chunks to bound memory. Deterministic, and for tens of
    thousands of images faster than approximate search (plus its JIT
    compilation) on a laptop.

    Parameters
    ----------
    vectors : (n, d) query vectors.
    k : neighbours per query.
    base : (m, d) vectors searched; ``None`` means ``vectors`` themselves, and
        then every point is its own first neighbour (as UMAP expects).

    Returns
    -------
    indices : (n, k) int64 rows of ``base``; distances : (n, k) float32,
    1 - cosine, ascending (ties by row number).
    """
    x = _normalise(vectors)
    b = x if base is None else _normalise(base)
    n = len(x)
    indices = np.empty((n, k), dtype=np.int64)
    distances = np.empty((n, k), dtype=np.float32)
    for start in range(0, n, chunk):
        sim = x[start : start + chunk] @ b.T
        if base is None:
            rows = np.arange(len(sim))
            sim[rows, start + rows] = np.inf  # self first, even among exact duplicates
        part = np.argpartition(-sim, k - 1, axis=1)[:, :k]
        part_sim = np.take_along_axis(sim, part, axis=1)
        order = np.lexsort((part, -part_sim), axis=1)
        indices[start : start + chunk] = np.take_along_axis(part, order, axis=1)
        best = np.take_along_axis(part_sim, order, axis=1)
        if base is None:
            best[:, 0] = 1.0
        distances[start : start + chunk] = np.clip(1.0 - best, 0.0, 2.0)
    return indices, distances


def place_by_neighbours(
    indices: np.ndarray, distances: np.ndarray, embedding: np.ndarray, k: int
) -> np.ndarray:
    """Place new points at the weighted mean of their fitted neighbours' UMAP points.

    The weights are UMAP's own fuzzy membership strengths,
    exp(-(d - rho) / sigma) with rho and sigma from ``umap.umap_.smooth_knn_dist``,
    and the weighted mean is how ``UMAP.transform`` initialises new points
    (``umap.umap_.init_transform``). We stop there, before the refinement
    epochs of ``transform``: measured here on 100,000 clustered 512-d vectors
    (2 shared cores), ``UMAP.transform`` of the 80,000 images outside a
    20,000 sample had not finished one layout after 6 minutes, while this
    placement takes seconds and the contexts still matched the generating
    clusters (adjusted Rand index 0.999, benchmarks/contexts_scale.py).
    """
    from umap.umap_ import smooth_knn_dist

    d = distances.astype(np.float32)
    sigmas, rhos = smooth_knn_dist(d, float(k), local_connectivity=1.0)
    weights = np.exp(-np.maximum(d - rhos[:, None], 0.0) / sigmas[:, None])
    weights /= weights.sum(axis=1, keepdims=True)
    return np.einsum("nk,nkd->nd", weights, embedding[indices]).astype(np.float32)


def sample_rows(n: int, parameters: dict) -> np.ndarray:
    """The rows UMAP and HDBSCAN are fitted on: all, or a seeded sample of ``fit_sample``."""
    if n <= parameters["fit_sample"]:
        return np.arange(n)
    rng = np.random.default_rng(parameters["seed"])
    return np.sort(rng.choice(n, size=parameters["fit_sample"], replace=False))


def reduce_with_umap(
    vectors: np.ndarray, parameters: dict, seconds: dict | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """UMAP points for clustering (``cluster_dimensions``-D) and for the map (2-D).

    The exact neighbour graph is computed once and shared by both layouts.
    Above ``fit_sample`` images both layouts are fitted on a seeded sample of
    ``fit_sample`` images and every other image is placed from its
    ``neighbours`` nearest sampled images (``place_by_neighbours``).

    ``seconds``, when given, receives the wall time of each step.

    Returns
    -------
    points : (n, cluster_dimensions) float32; map_xy : (n, 2) float32.
    """
    import umap

    seconds = {} if seconds is None else seconds
    start = time.perf_counter()
    x = _normalise(vectors)
    n = len(x)
    k = parameters["neighbours"]
    seed = parameters["seed"]
    fit_rows = sample_rows(n, parameters)
    rest = np.setdiff1d(np.arange(n), fit_rows)
    knn = exact_neighbours(x[fit_rows], k) + (None,)
    rest_knn = exact_neighbours(x[rest], k, base=x[fit_rows]) if len(rest) else None
    seconds["neighbours"] = round(time.perf_counter() - start, 2)
    results = []
    for dims, min_dist in (
        (parameters["cluster_dimensions"], parameters["umap_min_dist_cluster"]),
        (2, parameters["umap_min_dist_map"]),
    ):
        reducer = umap.UMAP(
            n_neighbors=k,
            n_components=dims,
            min_dist=min_dist,
            metric="cosine",
            random_state=seed,
            precomputed_knn=knn,
            low_memory=True,
        )
        start = time.perf_counter()
        out = np.empty((n, dims), dtype=np.float32)
        with warnings.catch_warnings():
            # "n_jobs overridden by setting random_state" and "no search index":
            # both expected, see the module docstring.
            warnings.simplefilter("ignore")
            out[fit_rows] = reducer.fit_transform(x[fit_rows])
        if rest_knn is not None:
            out[rest] = place_by_neighbours(rest_knn[0], rest_knn[1], out[fit_rows], k)
        seconds[f"umap_{dims}d"] = round(time.perf_counter() - start, 2)
        results.append(out)
    return results[0], results[1]


def cluster_points(
    points: np.ndarray, parameters: dict, fit_rows: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """HDBSCAN labels (1..K by decreasing size, -1 = noise) and membership probabilities.

    With ``fit_rows`` (a sample, fewer than all points) HDBSCAN is fitted on
    the sample alone and every other point gets the cluster and membership
    strength of ``hdbscan.approximate_predict`` (the package's way to place
    new points in a fitted hierarchy without re-clustering). The sample's
    ``min_cluster_size`` is scaled by sample / n, so a context needs the same
    share of images as in a full fit; ``min_samples`` (a density, not a share)
    stays, capped at that size. Agreement with a full fit is measured by
    benchmarks/contexts_scale.py (``--compare``).
    """
    import hdbscan

    n = len(points)
    points = np.asarray(points, dtype=np.float64)
    if fit_rows is None or len(fit_rows) >= n:
        fit_rows, min_cluster_size = np.arange(n), parameters["min_cluster_size"]
    else:
        min_cluster_size = max(2, round(parameters["min_cluster_size"] * len(fit_rows) / n))
    model = hdbscan.HDBSCAN(
        min_cluster_size=int(min_cluster_size),
        min_samples=int(max(1, min(parameters["min_samples"], min_cluster_size))),
        cluster_selection_method=parameters["cluster_selection_method"],
        core_dist_n_jobs=1,
        prediction_data=len(fit_rows) < n,
    )
    raw = np.full(n, -1, dtype=np.int64)
    membership = np.zeros(n, dtype=np.float64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        raw[fit_rows] = model.fit_predict(points[fit_rows])
        membership[fit_rows] = model.probabilities_
        rest = np.setdiff1d(np.arange(n), fit_rows)
        if len(rest):
            rest_labels, rest_strength = hdbscan.approximate_predict(model, points[rest])
            raw[rest], membership[rest] = rest_labels, rest_strength
    return relabel_by_size(raw), np.where(raw < 0, 0.0, membership)


def relabel_by_size(raw: np.ndarray) -> np.ndarray:
    """Renumber cluster labels 1..K by decreasing size (ties: first row first); -1 stays."""
    raw = np.asarray(raw)
    labels = np.full(len(raw), UNASSIGNED_ID, dtype=np.int64)
    found = [c for c in np.unique(raw) if c >= 0]
    first = {c: int(np.argmax(raw == c)) for c in found}
    size = {c: int((raw == c).sum()) for c in found}
    for new, c in enumerate(sorted(found, key=lambda c: (-size[c], first[c])), start=1):
        labels[raw == c] = new
    return labels


def find_contexts(vectors: np.ndarray, settings: ContextSettings, seed: int = 0) -> ContextFit:
    """Find usage contexts in L2-normalised cluster vectors (UMAP, then HDBSCAN).

    Parameters
    ----------
    vectors : (n, d) cluster vectors, one row per usable image.
    settings : the study's context settings.
    seed : the study seed (UMAP random_state and the fit sample).

    Returns
    -------
    ContextFit
    """
    vectors = np.asarray(vectors, dtype=np.float32)
    if vectors.ndim != 2:
        raise ValueError(f"contexts: vectors must be a 2-D array, got shape {vectors.shape}")
    if not np.isfinite(vectors).all():
        raise ValueError("contexts: vectors contain NaN or infinite values")
    parameters = resolve_parameters(len(vectors), settings, seed)
    seconds: dict[str, float] = {}
    points, map_xy = reduce_with_umap(vectors, parameters, seconds)
    start = time.perf_counter()
    labels, membership = cluster_points(points, parameters, sample_rows(len(vectors), parameters))
    seconds["hdbscan"] = round(time.perf_counter() - start, 2)
    fit = ContextFit(labels, membership, points, map_xy, parameters, seconds)
    parameters["contexts_found"] = fit.n_contexts
    parameters["unassigned"] = fit.n_unassigned
    return fit


STABILITY_COLUMNS = [
    "main_seed", "refit_seed", "images", "main_contexts", "refit_contexts", "both_assigned", "ari",
    "ari_with_unassigned", "main_unassigned_share", "refit_unassigned_share", "method",
]
#: Largest number of images refitted for the stability check (a seeded sample above it).
STABILITY_MAX_IMAGES = 5000
#: Above this share of unassigned photos the notes and the brand view give advice.
UNASSIGNED_ADVICE_SHARE = 0.30
#: Below this adjusted Rand index the run notes advise reading the contexts with care.
STABILITY_ADVICE_ARI = 0.8


def context_stability(vectors: np.ndarray, labels: np.ndarray, settings: ContextSettings, seed: int = 0,
                      *, max_images: int = STABILITY_MAX_IMAGES) -> pd.DataFrame:
    """Refit the contexts on another seed and compare with the main fit (adjusted Rand index).

    The refit uses seed + 1 on the same images (a seeded sample of
    ``max_images`` above that). Agreement is the adjusted Rand index
    (Hubert and Arabie 1985; ``sklearn.metrics.adjusted_rand_score``) of
    the two labelings on the images assigned to a context in both fits (1 =
    the same partition up to renumbering, about 0 = chance), and, stricter,
    on all images with "unassigned" as one more group.

    Returns
    -------
    One-row DataFrame: ``main_seed``, ``refit_seed``, ``images``,
    ``main_contexts``, ``refit_contexts``, ``both_assigned``, ``ari``,
    ``ari_with_unassigned``, ``main_unassigned_share``,
    ``refit_unassigned_share``, ``method``.
    """
    from sklearn.metrics import adjusted_rand_score

    vectors = np.asarray(vectors, dtype=np.float32)
    labels = np.asarray(labels)
    n = len(vectors)
    if n > max_images:
        idx = np.sort(np.random.default_rng([seed, 17]).choice(n, max_images, replace=False))
        method = f"refit with seed {seed + 1} on a seeded sample of {max_images:,} of {n:,} images"
    else:
        idx = np.arange(n)
        method = f"refit with seed {seed + 1} on all {n:,} images"
    refit = find_contexts(vectors[idx], settings, seed + 1)
    main, other = labels[idx], refit.labels
    both = (main != UNASSIGNED_ID) & (other != UNASSIGNED_ID)
    ari = float(adjusted_rand_score(main[both], other[both])) if both.sum() >= 2 else float("nan")
    return pd.DataFrame([{
        "main_seed": seed, "refit_seed": seed + 1, "images": len(idx),
        "main_contexts": int(main.max()) if (main > 0).any() else 0,
        "refit_contexts": refit.n_contexts,
        "both_assigned": int(both.sum()),
        "ari": ari,
        "ari_with_unassigned": float(adjusted_rand_score(main, other)),
        "main_unassigned_share": float(np.mean(main == UNASSIGNED_ID)),
        "refit_unassigned_share": float(np.mean(other == UNASSIGNED_ID)),
        "method": method,
    }])


# --------------------------------------------------------------------------
# Naming contexts


def load_vocabulary(settings: ContextSettings) -> list[str]:
    """The phrases contexts are named from: the default list, a study file, extras.

    ``vocabulary`` (a text file, one phrase a line, ``#`` comments) is added to
    the default list, or replaces it when ``replace_vocabulary`` is true;
    ``extra_phrases`` are always added. Duplicates are dropped, order kept.
    """
    phrases: list[str] = []
    if not settings.replace_vocabulary:
        phrases += _read_phrases(DEFAULT_VOCABULARY)
    if settings.vocabulary is not None:
        phrases += _read_phrases(Path(settings.vocabulary))
    elif settings.replace_vocabulary and not settings.extra_phrases:
        raise ValueError(
            "contexts: replace_vocabulary is true but neither 'contexts.vocabulary' "
            "nor 'contexts.extra_phrases' gives any phrase"
        )
    phrases += [p.strip() for p in settings.extra_phrases if p.strip()]
    unique = list(dict.fromkeys(phrases))
    if not unique:
        raise ValueError("contexts: the context vocabulary is empty")
    return unique


def _read_phrases(path: Path) -> list[str]:
    if not path.is_file():
        raise ValueError(f"contexts: vocabulary file {path} not found")
    lines = path.read_text(encoding="utf-8").splitlines()
    return [s.strip() for s in lines if s.strip() and not s.strip().startswith("#")]


def standardised_similarities(joint: np.ndarray, phrase_vectors: np.ndarray) -> np.ndarray:
    """Cosine similarity of every image to every phrase, standardised per phrase over the images."""
    sims = _normalise(joint) @ _normalise(phrase_vectors).T
    return (sims - sims.mean(axis=0)) / (sims.std(axis=0) + 1e-12)


def _context_ids(labels: np.ndarray) -> np.ndarray:
    """The context ids present (sorted; after merges or drops there may be gaps)."""
    labels = np.asarray(labels)
    return np.unique(labels[labels > 0]).astype(int)


def distinctiveness(joint: np.ndarray, labels: np.ndarray, phrase_vectors: np.ndarray) -> np.ndarray:
    """Distinctiveness of each phrase for each context: (K, m).

    Similarities (cosine) of every image to every phrase are standardised per
    phrase over all images, which removes phrases that are close to every
    image. A context's affinity to a phrase is the mean standardised
    similarity of its images; its distinctiveness is that affinity minus the
    mean affinity of the *other* contexts (each context counted once,
    whatever its size). A phrase close to every context scores about zero
    everywhere. With a single context, the affinity itself is used (it is
    already relative to all images).

    Measured on an outside labelled set (``benchmarks/context_naming.py``:
    Debian openclipart-png topic folders taken as contexts, the shipped
    vocabulary plus the topic names, bundled encoder): subtracting the mean of
    the other contexts names 5 of 10 topics with their own name, subtracting
    the best other context 2 of 10 (it punishes a phrase for one similar
    rival), the affinity alone 5 of 10. The one name there with confidence
    >= 0.8 (``explore.context_names``) was right; the weak ones were right in
    4 of 9, which is why weak names are not shown as names. (Figures with
    bundled-v4; bundled-v5's WordNet class phrasing lets descriptive
    vocabulary phrases beat the bare topic names: 2, 1 and 2 of 10, the one
    confident name, "children's party with balloons" for party, counted
    wrong by that exact-name rule, the weak ones right in 2 of 9.)
    """
    sims = standardised_similarities(joint, phrase_vectors)
    ids = _context_ids(labels)
    affinity = np.stack([sims[labels == c].mean(axis=0) for c in ids]) if len(ids) else np.zeros((0, sims.shape[1]))
    if len(ids) <= 1:
        return affinity
    k = len(ids)
    others_mean = (affinity.sum(axis=0, keepdims=True) - affinity) / (k - 1)
    return affinity - others_mean


def name_contexts(
    joint: np.ndarray | None,
    labels: np.ndarray,
    phrases: list[str] | None = None,
    phrase_vectors: np.ndarray | None = None,
    alternatives: int = 3,
    *,
    renames: dict[int, str] | None = None,
    seed: int = 0,
) -> pd.DataFrame:
    """One unique name per context, chosen zero-shot by distinctiveness, with its confidence.

    Names are assigned jointly (``scipy.optimize.linear_sum_assignment``,
    maximising total distinctiveness), so every context gets a different
    phrase. Without phrases (or with more contexts than phrases) the leftover
    contexts are called "context N". Each chosen phrase gets a bootstrap
    confidence against its free rivals (``explore.context_names``); a weak
    one (below ``WEAK_BELOW``) is shown as "context N" and its candidates
    are listed. ``renames`` (from the study's edits) override the shown name.

    Returns
    -------
    DataFrame: context_id, context (the name shown), suggested_name (the
    phrase the model chose), name_source (zero-shot | zero-shot, weak |
    analyst | none), name_confidence (share of bootstrap resamples of the
    context's photos in which the phrase stays the most distinctive free
    phrase), name_margin (its distinctiveness minus the runner-up's),
    runner_up, candidates (three best phrases, " | "-separated), name_score
    (its distinctiveness), alternatives (next best phrases).
    """
    from scipy.optimize import linear_sum_assignment

    from explore.context_names import WEAK_BELOW, name_confidence

    ids = _context_ids(labels)
    names = {int(c): f"context {c}" for c in ids}
    scores = {int(c): np.nan for c in ids}
    others = {int(c): "" for c in ids}
    confidence = pd.DataFrame(columns=["context_id", "name_confidence", "name_margin", "runner_up_column",
                                       "candidate_columns"])
    if len(ids) and phrases and phrase_vectors is not None and joint is not None:
        standard = standardised_similarities(joint, phrase_vectors)
        score = distinctiveness(joint, labels, phrase_vectors)
        rows, cols = linear_sum_assignment(score, maximize=True)
        chosen = {}
        for r, c in zip(rows, cols):
            names[int(ids[r])] = phrases[c]
            scores[int(ids[r])] = float(score[r, c])
            chosen[int(ids[r])] = int(c)
        for r, cid in enumerate(ids):
            order = [j for j in np.argsort(-score[r], kind="stable") if phrases[j] != names[int(cid)]]
            others[int(cid)] = " | ".join(phrases[j] for j in order[:alternatives])
        confidence = name_confidence(standard, np.asarray(labels), ids, chosen, seed=seed)
    by_id = confidence.set_index("context_id") if len(confidence) else None
    rows_out = []
    for c in ids:
        c = int(c)
        suggested = names[c] if np.isfinite(scores[c]) else ""
        conf = float(by_id.loc[c, "name_confidence"]) if by_id is not None and c in by_id.index else np.nan
        margin = float(by_id.loc[c, "name_margin"]) if by_id is not None and c in by_id.index else np.nan
        runner = int(by_id.loc[c, "runner_up_column"]) if by_id is not None and c in by_id.index else -1
        cands = list(by_id.loc[c, "candidate_columns"]) if by_id is not None and c in by_id.index else []
        if renames and c in renames:
            shown, source = renames[c], "analyst"
        elif not suggested:
            shown, source = f"context {c}", "none"
        elif not conf >= WEAK_BELOW:
            shown, source = f"context {c}", "zero-shot, weak"
        else:
            shown, source = suggested, "zero-shot"
        rows_out.append((c, shown, suggested, source, conf, margin,
                         phrases[runner] if phrases and runner >= 0 else "",
                         " | ".join(phrases[j] for j in cands) if phrases else "", scores[c], others[c]))
    return pd.DataFrame(rows_out, columns=["context_id", "context", "suggested_name", "name_source",
                                           "name_confidence", "name_margin", "runner_up", "candidates",
                                           "name_score", "alternatives"])


def exemplars(vectors: np.ndarray, labels: np.ndarray, k: int) -> dict[int, np.ndarray]:
    """Row numbers of the ``k`` images nearest each context's centre (cosine, cluster vectors)."""
    x = _normalise(vectors)
    out = {}
    for c in np.unique(labels[labels > 0]):
        rows = np.flatnonzero(labels == c)
        centre = x[rows].mean(axis=0)
        centre /= np.linalg.norm(centre) + 1e-12
        sim = x[rows] @ centre
        out[int(c)] = rows[np.argsort(-sim, kind="stable")[:k]]
    return out


# --------------------------------------------------------------------------
# Statistics


def fisher_pvalues(a, b, c, d) -> np.ndarray:
    """Two-sided Fisher exact p-values for 2x2 tables [[a, b], [c, d]] (scipy.stats.fisher_exact).

    Identical tables are tested once. A table with an empty row or column
    (nothing to compare) gets p = 1.
    """
    from scipy.stats import fisher_exact

    tables = np.stack([np.asarray(v, dtype=np.int64) for v in (a, b, c, d)], axis=1)
    if (tables < 0).any():
        raise ValueError("fisher_pvalues: negative count in a 2x2 table")
    unique, inverse = np.unique(tables, axis=0, return_inverse=True)
    p = np.empty(len(unique))
    for i, (ta, tb, tc, td) in enumerate(unique):
        if min(ta + tb, tc + td, ta + tc, tb + td) == 0:
            p[i] = 1.0
        else:
            p[i] = fisher_exact([[ta, tb], [tc, td]], alternative="two-sided").pvalue
    return p[np.ravel(inverse)]


def benjamini_hochberg(p_values) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p-values (q-values); NaN stays NaN.

    One implementation serves every corrected family:
    ``explore.attributes.testing.benjamini_hochberg`` (attributes is an earlier stage).
    """
    from explore.attributes.testing import benjamini_hochberg as adjust

    return adjust(p_values)


#: Poster permutations per test (p = (1 + hits) / (1 + permutations)).
POSTER_PERMUTATIONS = 1999
FISHER_TEST = "Fisher exact (photos assumed independent)"


def poster_units(frame: pd.DataFrame, by: list[str]) -> pd.Series | None:
    """Resampling unit per photo: its poster within ``by`` (brand, source ...), or None without posters.

    Returns None when the table has no ``poster`` column or every poster is
    empty (photos are then assumed independent). A photo with an empty
    poster is its own unit.
    """
    poster = frame.get("poster")
    if poster is None:
        return None
    text = poster.fillna("").astype(str).str.strip()
    if not (text != "").any():
        return None
    own = pd.Series([f"photo:{k}" for k in range(len(frame))], index=frame.index)
    key = frame[by].astype(str).agg("\x1f".join, axis=1)
    return key + "\x1f" + text.where(text != "", own)


def cluster_permutation_pvalues(
    focal: np.ndarray, counts: np.ndarray, permutations: int = POSTER_PERMUTATIONS, seed=0,
) -> np.ndarray:
    """Two-sided permutation p-values of a share difference with whole units (posters) permuted.

    The units (rows of ``counts``, one per poster; columns = contexts) are
    split into the focal group (``focal`` True: the brand's posters, or its
    consumer posters) and the rest. Under the null that the group label is
    exchangeable between posters, every split with the same number of focal
    posters is equally likely (a cluster-level permutation test, as for
    cluster-randomised designs: Gail et al. 1996, Statistics in Medicine
    15:1069). The statistic per context is |focal share - rest share| of
    photos; p = share of splits at least as extreme. When the number of
    possible splits is at most ``permutations`` every split is enumerated
    (exact); otherwise p = (1 + hits) / (1 + permutations) over seeded random
    splits.

    Returns
    -------
    (n_contexts,) p-values (1 where either group has no photo).
    """
    import itertools
    import math

    focal = np.asarray(focal, dtype=bool)
    counts = np.asarray(counts, dtype=np.float64)
    n_unit = counts.sum(axis=1)
    u, m = len(focal), int(focal.sum())
    total, total_n = counts.sum(axis=0), n_unit.sum()

    def stat(member: np.ndarray) -> np.ndarray:  # member: (B, U) 0/1
        fc, fn = member @ counts, member @ n_unit
        rn = total_n - fn
        with np.errstate(invalid="ignore", divide="ignore"):
            d = fc / fn[:, None] - (total - fc) / rn[:, None]
        return np.abs(np.where((fn[:, None] > 0) & (rn[:, None] > 0), d, 0.0))

    if m == 0 or m == u:
        return np.ones(counts.shape[1])
    observed = stat(focal[None, :].astype(np.float64))[0]
    tol = 1e-12
    splits = math.comb(u, m)
    if splits <= permutations:
        member = np.zeros((splits, u))
        for k, chosen in enumerate(itertools.combinations(range(u), m)):
            member[k, list(chosen)] = 1.0
        hits = (stat(member) >= observed - tol).sum(axis=0)
        return hits / splits
    rng = np.random.default_rng(seed)
    hits = np.zeros(counts.shape[1])
    step = max(1, min(500, 4_000_000 // u))  # splits per block: about 32 MB of membership rows at most
    for start in range(0, permutations, step):
        b = min(step, permutations - start)
        order = np.argsort(rng.random((b, u)), axis=1)[:, :m]
        member = np.zeros((b, u))
        np.put_along_axis(member, order, 1.0, axis=1)
        hits += (stat(member) >= observed - tol).sum(axis=0)
    return (1 + hits) / (1 + permutations)


def _poster_test(sub: pd.DataFrame, units: pd.Series, focal_mask: pd.Series, context_ids: list, seed) -> np.ndarray:
    """Poster-permutation p per context for the photos ``sub`` (focal group vs the rest)."""
    codes, uniq = pd.factorize(units.loc[sub.index])
    counts = np.zeros((len(uniq), len(context_ids)))
    col = {c: k for k, c in enumerate(context_ids)}
    np.add.at(counts, (codes, sub["context_id"].map(col).to_numpy()), 1.0)
    focal = np.zeros(len(uniq), dtype=bool)
    focal[codes[focal_mask.loc[sub.index].to_numpy()]] = True
    return cluster_permutation_pvalues(focal, counts, seed=seed)


def poster_test_name(permutations: int = POSTER_PERMUTATIONS) -> str:
    return (f"poster permutation ({permutations:,} random splits of posters, or every split when fewer; "
            "photos of one poster move together)")


# --------------------------------------------------------------------------
# Brand x context


def brand_context_table(
    images: pd.DataFrame, labels: np.ndarray, names: dict[int, str] | None = None, min_margin: int = 0,
    seed: int = 0,
) -> pd.DataFrame:
    """Count, share, index and Fisher test per brand, source and context.

    For each source (``consumer``, ``owned`` and ``all``), each brand with
    images of that source, and each context (including -1 "unassigned"):

    - count: the brand's images in the context; brand_n: the brand's images;
      share = count / brand_n;
    - category_share: the same share over all images of the brand's category
      (the brand included), and index = 100 x share / category_share
      (100 = parity; common marketing practice);
    - rest_count, rest_n, rest_share: the rest of the category (the brand
      left out), the group the brand is tested against;
    - p_value: two-sided Fisher exact test of [[count, brand_n - count],
      [rest_count, rest_n - rest_count]] (NaN when the brand is alone in its
      category, and for "unassigned", which is not a context to test);
    - q_value: Benjamini-Hochberg over the tested rows of this table whose
      category count (count + rest_count, a margin of the 2x2 table) is at
      least ``min_margin``; NaN for the others. Leaving out rows that could
      never pass ``min_count`` before adjusting is "independent filtering"
      (Bourgon, Gentleman and Huber, 2010, PNAS 107:9546): Fisher's test
      conditions on its margins, so the filter does not bias the p-values
      that remain, and the family is not padded with empty cells.
    - test: how p_value was computed. Fisher's test treats photos as
      independent; when ``images`` has a non-empty ``poster`` column the
      p-value comes from :func:`cluster_permutation_pvalues` instead (the
      brand's posters against the rest of its category's, photos of one
      poster kept together), seeded by ``seed``.

    Parameters
    ----------
    images : one row per clustered image, with brand, category, source.
    labels : context id per row of ``images``.
    names : context id -> name.
    min_margin : see q_value (run_contexts passes ``min_count``).
    """
    _require(images, ["brand", "category", "source"], "images")
    frame = images[["brand", "category", "source"]].reset_index(drop=True).copy()
    frame["context_id"] = np.asarray(labels, dtype=np.int64)
    units = poster_units(images.reset_index(drop=True), ["brand"])
    context_ids = sorted(frame["context_id"].unique())
    parts = []
    for source in SOURCES:
        sub = frame if source == "all" else frame[frame["source"] == source]
        if sub.empty:
            continue
        counts = pd.crosstab([sub["category"], sub["brand"]], sub["context_id"])
        counts = counts.reindex(columns=context_ids, fill_value=0)
        long = counts.stack().rename("count").reset_index()
        long["brand_n"] = long.groupby(["category", "brand"])["count"].transform("sum")
        long["category_count"] = long.groupby(["category", "context_id"])["count"].transform("sum")
        long["category_n"] = long.groupby(["category", "context_id"])["brand_n"].transform("sum")
        long["source"] = source
        parts.append(long)
    table = pd.concat(parts, ignore_index=True)
    table["share"] = table["count"] / table["brand_n"]
    table["category_share"] = table["category_count"] / table["category_n"]
    table["index"] = 100.0 * table["share"] / table["category_share"].where(table["category_share"] > 0)
    table["rest_count"] = table["category_count"] - table["count"]
    table["rest_n"] = table["category_n"] - table["brand_n"]
    table["rest_share"] = table["rest_count"] / table["rest_n"].where(table["rest_n"] > 0)
    tested = (table["rest_n"] > 0) & (table["context_id"] != UNASSIGNED_ID)
    table["p_value"] = np.nan
    table["test"] = ""
    if tested.any() and units is None:
        t = table[tested]
        table.loc[tested, "p_value"] = fisher_pvalues(
            t["count"], t["brand_n"] - t["count"], t["rest_count"], t["rest_n"] - t["rest_count"]
        )
        table.loc[tested, "test"] = FISHER_TEST
    elif tested.any():
        for (source, category, brand), idx in table[tested].groupby(["source", "category", "brand"]).groups.items():
            sub = frame[frame["category"] == category]
            if source != "all":
                sub = sub[sub["source"] == source]
            p = dict(zip(context_ids, _poster_test(sub, units, frame["brand"] == brand, context_ids,
                                                   [seed, zlib.crc32(f"{source}|{brand}".encode())])))
            table.loc[idx, "p_value"] = table.loc[idx, "context_id"].map(p).to_numpy()
            table.loc[idx, "test"] = poster_test_name()
    family = (table["category_count"] >= min_margin).to_numpy()
    table["q_value"] = np.nan
    table.loc[family, "q_value"] = benjamini_hochberg(table.loc[family, "p_value"].to_numpy())
    table["context"] = table["context_id"].map(lambda c: _name(c, names))
    columns = [
        "brand", "category", "source", "context_id", "context", "count", "brand_n", "share",
        "category_share", "index", "rest_count", "rest_n", "rest_share", "p_value", "q_value", "test",
    ]
    table = table[columns].sort_values(["category", "brand", "source", "context_id"], kind="stable")
    return table.reset_index(drop=True)


def signature_contexts(table: pd.DataFrame, settings: ContextSettings) -> pd.DataFrame:
    """Contexts where a brand over-indexes significantly.

    A row of ``brand_context_table`` is a signature context when q_value <=
    fdr, index >= min_index, count >= min_count and the brand's share exceeds
    the rest of its category's. Ranked within brand and source by index.
    """
    over = _over_indexed(table, settings).copy()
    over = over.sort_values(["brand", "source", "index", "q_value"], ascending=[True, True, False, True], kind="stable")
    over["rank"] = over.groupby(["brand", "source"]).cumcount() + 1
    return over.reset_index(drop=True)


def unexpected_contexts(table: pd.DataFrame, settings: ContextSettings) -> pd.DataFrame:
    """Significant over-indexes in contexts that are not the category's own.

    A signature row (see ``signature_contexts``) is unexpected when its
    category is rarely there (category_share < rare_category_share) or
    another category dominates the context: that category's share of its own
    images in the context (same source) is the highest of all categories and
    at least ``dominance_ratio`` times the brand's category share. Adds
    dominant_category, dominant_share and reason; ranked by index, overall
    (rank) and within brand (brand_rank).
    """
    over = _over_indexed(table, settings)
    cat = (
        table[table["context_id"] != UNASSIGNED_ID]
        .drop_duplicates(["source", "category", "context_id"])[["source", "category", "context_id", "category_share"]]
        .sort_values(["source", "context_id", "category_share", "category"], ascending=[True, True, False, True], kind="stable")
        .drop_duplicates(["source", "context_id"])
        .rename(columns={"category": "dominant_category", "category_share": "dominant_share"})
    )
    out = over.merge(cat, on=["source", "context_id"], how="left")
    rare = out["category_share"] < settings.rare_category_share
    dominated = (out["dominant_category"] != out["category"]) & (
        out["dominant_share"] >= settings.dominance_ratio * out["category_share"]
    )
    out = out[rare | dominated].copy()
    reasons = []
    for _, row in out.iterrows():
        why = []
        if row["category_share"] < settings.rare_category_share:
            why.append(
                f"its category is rarely here ({row['category_share']:.1%} of category images, "
                f"below {settings.rare_category_share:.0%})"
            )
        if row["dominant_category"] != row["category"] and row["dominant_share"] >= settings.dominance_ratio * row["category_share"]:
            why.append(
                f"typical of category {row['dominant_category']} ({row['dominant_share']:.1%} of its images "
                f"vs {row['category_share']:.1%})"
            )
        reasons.append("; ".join(why))
    out["reason"] = reasons
    out = out.sort_values(["index", "q_value", "brand"], ascending=[False, True, True], kind="stable")
    out["rank"] = np.arange(1, len(out) + 1)
    out["brand_rank"] = out.groupby(["brand", "source"]).cumcount() + 1
    return out.reset_index(drop=True)


def source_context_gaps(
    images: pd.DataFrame, labels: np.ndarray, settings: ContextSettings, names: dict[int, str] | None = None,
    seed: int = 0,
) -> pd.DataFrame:
    """Per brand and context: consumer share vs owned share, Fisher test, BH.

    Only brands with both consumer and owned images. gap = consumer_share -
    owned_share; p_value is the two-sided Fisher exact test of
    [[consumer_count, consumer_n - consumer_count], [owned_count, owned_n -
    owned_count]]; q_value is Benjamini-Hochberg over the tested rows whose
    consumer_count + owned_count (a margin) is at least min_count, NaN for the
    rest (independent filtering, as in ``brand_context_table``; "unassigned"
    rows are reported, not tested). significant: q_value <= fdr and the larger
    of the two counts >= min_count. direction says which
    source shows the context more. test: ``Fisher exact (photos assumed
    independent)``, or, when ``images`` has a non-empty ``poster`` column, a
    permutation of the brand's posters between its consumer and owned photos
    (:func:`cluster_permutation_pvalues`), seeded by ``seed``.
    """
    _require(images, ["brand", "category", "source"], "images")
    frame = images[["brand", "category", "source"]].reset_index(drop=True).copy()
    frame["context_id"] = np.asarray(labels, dtype=np.int64)
    units = poster_units(images.reset_index(drop=True), ["brand", "source"])
    frame = frame[frame["source"].isin(["consumer", "owned"])]
    context_ids = sorted(np.unique(np.asarray(labels)))
    columns = [
        "brand", "category", "context_id", "context", "consumer_count", "consumer_n", "consumer_share",
        "owned_count", "owned_n", "owned_share", "gap", "p_value", "q_value", "significant", "direction", "test",
    ]
    if frame.empty:
        return pd.DataFrame(columns=columns)
    counts = pd.crosstab([frame["category"], frame["brand"], frame["context_id"]], frame["source"])
    counts = counts.reindex(columns=["consumer", "owned"], fill_value=0)
    full = pd.MultiIndex.from_product(
        [counts.index.droplevel(2).unique(), context_ids], names=["cb", "context_id"]
    )
    rows = []
    for (category, brand), cid in full:
        key = (category, brand, cid)
        cc, oc = (counts.loc[key, "consumer"], counts.loc[key, "owned"]) if key in counts.index else (0, 0)
        rows.append((brand, category, int(cid), int(cc), int(oc)))
    out = pd.DataFrame(rows, columns=["brand", "category", "context_id", "consumer_count", "owned_count"])
    out["consumer_n"] = out.groupby("brand")["consumer_count"].transform("sum")
    out["owned_n"] = out.groupby("brand")["owned_count"].transform("sum")
    out = out[(out["consumer_n"] > 0) & (out["owned_n"] > 0)].copy()
    out["consumer_share"] = out["consumer_count"] / out["consumer_n"]
    out["owned_share"] = out["owned_count"] / out["owned_n"]
    out["gap"] = out["consumer_share"] - out["owned_share"]
    tested = out["context_id"] != UNASSIGNED_ID
    out["p_value"] = np.nan
    out["test"] = ""
    if tested.any() and units is None:
        t = out[tested]
        out.loc[tested, "p_value"] = fisher_pvalues(
            t["consumer_count"], t["consumer_n"] - t["consumer_count"],
            t["owned_count"], t["owned_n"] - t["owned_count"],
        )
        out.loc[tested, "test"] = FISHER_TEST
    elif tested.any():
        for brand, idx in out[tested].groupby("brand").groups.items():
            sub = frame[frame["brand"] == brand]
            p = dict(zip(context_ids, _poster_test(sub, units, frame["source"] == "consumer", context_ids,
                                                   [seed, zlib.crc32(f"gap|{brand}".encode())])))
            out.loc[idx, "p_value"] = out.loc[idx, "context_id"].map(p).to_numpy()
            out.loc[idx, "test"] = poster_test_name()
    family = ((out["consumer_count"] + out["owned_count"]) >= settings.min_count).to_numpy()
    out["q_value"] = np.nan
    out.loc[family, "q_value"] = benjamini_hochberg(out.loc[family, "p_value"].to_numpy())
    out["significant"] = (out["q_value"] <= settings.fdr) & (
        np.maximum(out["consumer_count"], out["owned_count"]) >= settings.min_count
    )
    out["direction"] = np.where(
        out["gap"] > 0, "more in consumer photos", np.where(out["gap"] < 0, "more in owned photos", "equal")
    )
    out["context"] = out["context_id"].map(lambda c: _name(c, names))
    return out[columns].sort_values(["category", "brand", "context_id"], kind="stable").reset_index(drop=True)


# --------------------------------------------------------------------------
# The stage


def run_contexts(
    images: pd.DataFrame,
    image_ids: list[str],
    cluster: np.ndarray,
    joint: np.ndarray | None,
    settings: ContextSettings,
    *,
    seed: int = 0,
    encode_texts=None,
    encoder_id: str = "",
    seconds: dict | None = None,
    stability: bool = True,
) -> dict[str, pd.DataFrame]:
    """The whole contexts stage: find, name, index, and list the findings.

    Parameters
    ----------
    images : the images table (at least image_id, brand, category, source);
        rows are matched to ``image_ids``.
    image_ids : the ids of the embedded images, row-aligned with the vectors.
    cluster : (n, d_c) cluster vectors; joint : (n, d_j) joint vectors or None.
    settings : the study's context settings; seed : the study seed.
    encode_texts : callable phrases -> (m, d_j) vectors in the joint space
        (the encoder's ``encode_texts``); without it contexts are numbered.
    encoder_id : recorded in the contexts table.
    seconds : optional dict that receives the wall time of each step.
    stability : refit on another seed and report the agreement
        (:func:`context_stability`; table ``context_stability``).

    Returns
    -------
    dict of tables: image_contexts, contexts, brand_contexts,
    signature_contexts, unexpected_contexts, source_context_gaps, and
    context_stability (empty when ``stability`` is False).
    """
    _require(images, ["image_id", "brand", "category", "source"], "images")
    cluster = np.asarray(cluster)
    if len(image_ids) != len(cluster):
        raise ValueError(f"contexts: {len(image_ids)} image ids but {len(cluster)} cluster vectors")
    if joint is not None and len(joint) != len(cluster):
        raise ValueError(f"contexts: {len(joint)} joint vectors but {len(cluster)} cluster vectors")
    by_id = images.drop_duplicates("image_id").set_index("image_id")
    missing = [i for i in image_ids if i not in by_id.index]
    if missing:
        raise ValueError(f"contexts: image ids not in the images table, e.g. {missing[:3]}")
    keep = ["brand", "category", "source"] + (["poster"] if "poster" in by_id.columns else [])
    rows = by_id.loc[list(image_ids), keep].reset_index()

    fit = find_contexts(cluster, settings, seed)
    labels, renames, edit_log = fit.labels, {}, pd.DataFrame(columns=["edit", "target", "action", "context_id", "result"])
    if settings.edits:
        from explore.context_names import apply_edits

        relpaths = (dict(zip(by_id.index.astype(str), by_id["relpath"].astype(str)))
                    if "relpath" in by_id.columns else None)
        labels, renames, edit_log = apply_edits(fit.labels, image_ids, settings.edits, relpaths)
    start = time.perf_counter()
    phrases = load_vocabulary(settings) if encode_texts is not None else None
    phrase_vectors = np.asarray(encode_texts(phrases), dtype=np.float32) if phrases else None
    named = name_contexts(joint, labels, phrases, phrase_vectors, renames=renames, seed=seed)
    names = dict(zip(named["context_id"], named["context"]))

    image_contexts = pd.DataFrame(
        {
            "image_id": list(image_ids),
            "context_id": labels,
            "context": [_name(c, names) for c in labels],
            "membership": fit.membership,
            "map_x": fit.map_xy[:, 0],
            "map_y": fit.map_xy[:, 1],
        }
    )

    near = exemplars(cluster, labels, settings.exemplars)
    ids = np.asarray(image_ids)
    contexts = named.copy()
    contexts["size"] = [int((labels == c).sum()) for c in contexts["context_id"]]
    contexts["exemplars"] = [" ".join(ids[near[int(c)]]) for c in contexts["context_id"]]
    unassigned = pd.DataFrame(
        [{"context_id": UNASSIGNED_ID, "context": UNASSIGNED, "suggested_name": "", "name_source": "none",
          "name_confidence": np.nan, "name_margin": np.nan, "runner_up": "", "candidates": "",
          "name_score": np.nan, "alternatives": "", "size": int((labels == UNASSIGNED_ID).sum()), "exemplars": ""}]
    )
    contexts = pd.concat([contexts, unassigned], ignore_index=True)
    contexts["share"] = contexts["size"] / len(labels)
    for key, value in settings_record(fit.parameters, settings, encoder_id, phrases).items():
        contexts[key] = value
    first = ["context_id", "context", "size", "share", "name_source", "suggested_name", "name_confidence",
             "name_margin", "runner_up", "candidates", "name_score", "alternatives", "exemplars"]
    contexts = contexts[first + [c for c in contexts.columns if c not in first]]

    after_naming = time.perf_counter()
    table = brand_context_table(rows, labels, names, min_margin=settings.min_count, seed=seed)
    result = {
        "image_contexts": image_contexts,
        "contexts": contexts,
        "brand_contexts": table,
        "signature_contexts": signature_contexts(table, settings),
        "unexpected_contexts": unexpected_contexts(table, settings),
        "source_context_gaps": source_context_gaps(rows, labels, settings, names, seed=seed),
        "context_edits": edit_log,
    }
    before_stability = time.perf_counter()
    result["context_stability"] = (
        context_stability(cluster, fit.labels, settings, seed) if stability and len(labels) >= 3
        else pd.DataFrame(columns=STABILITY_COLUMNS)
    )
    if seconds is not None:
        seconds["stability_refit"] = round(time.perf_counter() - before_stability, 2)
        seconds.update(fit.seconds)
        seconds["names_exemplars"] = round(after_naming - start, 2)
        seconds["brand_tables"] = round(before_stability - after_naming, 2)
    return result


def settings_record(parameters: dict, settings: ContextSettings, encoder_id: str = "", phrases=None) -> dict:
    """Flat record of what produced the contexts (written as columns of ``contexts``)."""
    record = {f"setting_{k}": v for k, v in parameters.items() if k not in ("contexts_found", "unassigned")}
    record.update(
        {
            "setting_fdr": settings.fdr,
            "setting_min_index": settings.min_index,
            "setting_min_count": settings.min_count,
            "setting_rare_category_share": settings.rare_category_share,
            "setting_dominance_ratio": settings.dominance_ratio,
            "setting_vocabulary_size": len(phrases) if phrases else 0,
            "encoder_id": encoder_id,
        }
    )
    return record


# --------------------------------------------------------------------------
# Helpers


def _over_indexed(table: pd.DataFrame, settings: ContextSettings) -> pd.DataFrame:
    keep = (
        (table["context_id"] != UNASSIGNED_ID)
        & (table["q_value"] <= settings.fdr)
        & (table["index"] >= settings.min_index)
        & (table["count"] >= settings.min_count)
        & (table["share"] > table["rest_share"])
    )
    return table[keep.fillna(False)]


def _name(context_id, names: dict[int, str] | None) -> str:
    context_id = int(context_id)
    if context_id == UNASSIGNED_ID:
        return UNASSIGNED
    if names and context_id in names:
        return names[context_id]
    return f"context {context_id}"


def _normalise(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float32)
    return x / (np.linalg.norm(x, axis=1, keepdims=True) + 1e-12)


def _require(frame: pd.DataFrame, columns: list[str], what: str) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(f"contexts: {what} table lacks column(s) {', '.join(missing)}")


def describe(tables: dict[str, pd.DataFrame]) -> list[str]:
    """One-line notes for run.json: what was found and the settings used."""
    cx = tables["contexts"]
    real = cx[cx["context_id"] != UNASSIGNED_ID]
    unassigned = int(cx.loc[cx["context_id"] == UNASSIGNED_ID, "size"].sum())
    total = int(cx["size"].sum())
    settings = {k[len("setting_"):]: v for k, v in cx.iloc[0].items() if k.startswith("setting_")}
    gaps = tables["source_context_gaps"]
    return [
        f"contexts: {len(real)} contexts found in {total} images; {unassigned} unassigned "
        f"({unassigned / max(total, 1):.1%}), kept as context -1",
        "contexts: settings used " + ", ".join(f"{k}={_plain(v)}" for k, v in settings.items()),
        f"contexts: {_all(tables['signature_contexts'])} signature and "
        f"{_all(tables['unexpected_contexts'])} unexpected brand contexts over all photos "
        f"({len(tables['signature_contexts'])} and {len(tables['unexpected_contexts'])} counting the "
        f"consumer-only and owned-only rows), "
        f"{int(gaps['significant'].sum()) if len(gaps) else 0} consumer-vs-owned differences",
    ] + _naming_notes(tables) + _stability_notes(tables.get("context_stability"), unassigned / max(total, 1)) \
        + _test_notes(tables)


def _naming_notes(tables: dict[str, pd.DataFrame]) -> list[str]:
    """How sure the names are, and what the analyst's edits did."""
    from explore.context_names import NAME_RESAMPLES, WEAK_BELOW

    cx = tables["contexts"]
    real = cx[cx["context_id"] != UNASSIGNED_ID]
    notes = []
    if "name_source" in real.columns and len(real):
        weak = real[real["name_source"] == "zero-shot, weak"]
        named = real[real["name_source"].isin(["zero-shot", "zero-shot, weak"])]
        if len(named):
            notes.append(
                f"contexts: {len(named) - len(weak)} of {len(named)} zero-shot names hold in at least "
                f"{WEAK_BELOW:.0%} of {NAME_RESAMPLES} bootstrap resamples of their photos; "
                + (f"{len(weak)} weak, shown as 'context N' with candidates: "
                   + "; ".join(f"{r.context} ({r.candidates})" for r in weak.itertuples()) if len(weak) else "none weak")
            )
    edits = tables.get("context_edits")
    if edits is not None and len(edits):
        notes.append("contexts: study edits applied: " + "; ".join(edits["result"]))
    return notes


def _stability_notes(stability: pd.DataFrame | None, unassigned_share: float) -> list[str]:
    notes = []
    if stability is not None and len(stability):
        r = stability.iloc[0]
        line = (f"contexts: stability: {r['method']} found {int(r['refit_contexts'])} contexts "
                f"(main fit {int(r['main_contexts'])}); adjusted Rand index {r['ari']:.2f} on the "
                f"{int(r['both_assigned'])} images assigned in both ({r['ari_with_unassigned']:.2f} counting "
                "unassigned as a group)")
        if not r["ari"] >= STABILITY_ADVICE_ARI:
            line += (f"; below {STABILITY_ADVICE_ARI}: contexts change with the seed, so read small contexts "
                     "and their names with care")
        notes.append(line)
    if unassigned_share > UNASSIGNED_ADVICE_SHARE:
        notes.append(
            f"contexts: {unassigned_share:.0%} of the photos fit no context (above {UNASSIGNED_ADVICE_SHARE:.0%}): "
            "context shares describe only part of each brand's photos; more photos per brand, or a smaller "
            "min_cluster_size, usually assign more"
        )
    return notes


def _test_notes(tables: dict[str, pd.DataFrame]) -> list[str]:
    bc = tables.get("brand_contexts")
    if bc is None or "test" not in bc or not (bc["test"] != "").any():
        return []
    method = bc.loc[bc["test"] != "", "test"].iloc[0]
    return [f"contexts: brand x context tests: {method}; Benjamini-Hochberg over the rows with a category "
            "count of at least min_count"]


def _all(table: pd.DataFrame) -> int:
    return int((table["source"] == "all").sum()) if len(table) else 0


def _plain(value):
    return value.item() if hasattr(value, "item") else value

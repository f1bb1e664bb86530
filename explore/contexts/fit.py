"""Finding contexts: UMAP, then HDBSCAN, on the cluster vectors; the stability refit.

Reproducibility versus speed: UMAP runs single-threaded when it is seeded
(umap-learn turns parallel layout off for a fixed ``random_state``). We keep
the seed, because the same study and seed must give the same contexts, and buy
the speed back in two ways: the nearest-neighbour graph is computed once and
shared by both layouts (exact, by matrix products), and above ``fit_sample``
images UMAP and HDBSCAN are fitted on a seeded sample: every other image is
placed on the map from its nearest sampled neighbours, as ``UMAP.transform``
starts (see ``place_by_neighbours``), and given a context by HDBSCAN's
``approximate_predict`` (see ``cluster_points``).

``umap`` and ``hdbscan`` are imported inside the functions that use them.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from explore.contexts.common import UNASSIGNED_ID, _normalise
from explore.study import ContextSettings


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


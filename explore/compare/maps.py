"""Compare, maps: PCA biplots per source, the image-vector map (classical MDS),
Procrustes alignment, and each brand's displacement between its views."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from explore.compare.agreement import MIN_BRANDS
from explore.compare.survey import METRICS

#: The brand-map sources, in a fixed order (the first is the alignment target).
MAP_SOURCES = ("consumer", "owned", "survey")


def rank_gaps(metrics: pd.DataFrame, against: str, reference: str = "consumer_share") -> pd.DataFrame:
    """Mean absolute rank difference per brand between two metrics.

    Within each category and attribute the brands are ranked by ``reference``
    and by ``against`` (average ranks for ties, rank 1 = highest); a brand's
    gap is the mean over attributes of |rank difference|. A brand the two
    metrics place very differently among its competitors gets a large gap.

    Returns
    -------
    DataFrame with columns ``brand``, ``category``, ``rank_gap``, ``attributes``
    (how many attributes entered the mean).
    """
    from scipy.stats import rankdata

    parts = []
    for _, g in metrics.groupby(["category", "attribute"], sort=True):
        g = g[g[reference].notna() & g[against].notna()]
        if len(g) < 2:
            continue
        gap = np.abs(rankdata(-g[reference].to_numpy()) - rankdata(-g[against].to_numpy()))
        parts.append(pd.DataFrame({"brand": g["brand"].to_numpy(), "category": g["category"].to_numpy(), "gap": gap}))
    if not parts:
        return pd.DataFrame(columns=["brand", "category", "rank_gap", "attributes"])
    gaps = pd.concat(parts)
    return (
        gaps.groupby(["brand", "category"], sort=True)["gap"]
        .agg(rank_gap="mean", attributes="size")
        .reset_index()
    )


# --------------------------------------------------------------------------
# PCA, classical MDS and Procrustes in numpy


def standardise(profile: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Z-score each column (mean 0, population standard deviation 1).

    Columns with no spread carry no information about the brands; they are
    set to 0 and flagged in the returned mask (False = constant).
    """
    profile = np.asarray(profile, dtype=float)
    mean = profile.mean(axis=0)
    sd = profile.std(axis=0)
    varies = sd > 1e-12 * np.maximum(1.0, np.abs(mean))
    z = np.zeros_like(profile)
    z[:, varies] = (profile[:, varies] - mean[varies]) / sd[varies]
    return z, varies


def pca(x: np.ndarray, n_components: int = 2) -> dict:
    """Principal component analysis by singular value decomposition.

    The data are centred (not scaled: standardise first for a correlation
    PCA). Signs are fixed so that in every component the attribute with the
    largest absolute weight has a positive weight, which makes maps
    reproducible.

    Parameters
    ----------
    x : (n, p) array, rows are brands.
    n_components : components kept; fewer when the data have fewer
        (at most min(n - 1, p)); missing ones are returned as zeros.

    Returns
    -------
    dict with ``scores`` (n, k): row coordinates U S (the same as
    ``sklearn.decomposition.PCA.fit_transform`` up to sign), ``components``
    (k, p): unit directions, ``explained_variance`` (k,): S**2 / (n - 1),
    ``explained_variance_ratio`` (k,), ``singular_values`` (k,).
    """
    x = np.asarray(x, dtype=float)
    n, p = x.shape
    centred = x - x.mean(axis=0)
    u, s, vt = np.linalg.svd(centred, full_matrices=False)
    rank = int(np.sum(s > 1e-10 * max(1.0, s[0] if len(s) else 0.0)))
    total = float(np.sum(s**2))
    k = n_components
    scores = np.zeros((n, k))
    components = np.zeros((k, p))
    sv = np.zeros(k)
    for c in range(min(k, rank)):
        v = vt[c]
        sign = 1.0 if v[np.argmax(np.abs(v))] >= 0 else -1.0
        components[c] = sign * v
        scores[:, c] = sign * u[:, c] * s[c]
        sv[c] = s[c]
    denom = max(n - 1, 1)
    return {
        "scores": scores,
        "components": components,
        "singular_values": sv,
        "explained_variance": sv**2 / denom,
        "explained_variance_ratio": sv**2 / total if total > 0 else np.zeros(k),
    }


def classical_mds(distances: np.ndarray, n_components: int = 2) -> dict:
    """Classical (Torgerson) multidimensional scaling.

    Double-centres the squared distances, B = -1/2 J D**2 J, and takes the
    top eigenvectors scaled by the square roots of their eigenvalues
    (Torgerson 1952; Gower 1966). For Euclidean distances between points in
    ``n_components`` dimensions the recovered coordinates reproduce the
    distances exactly. Non-Euclidean distances (such as cosine distances) can
    give negative eigenvalues; those directions are dropped.

    Returns
    -------
    dict with ``coordinates`` (n, n_components), ``eigenvalues`` (all, in
    descending order) and ``fit``: the share of the positive eigenvalue mass
    carried by the kept dimensions (1 = distances fully represented).
    """
    d = np.asarray(distances, dtype=float)
    if d.ndim != 2 or d.shape[0] != d.shape[1]:
        raise ValueError("distances must be a square matrix")
    n = d.shape[0]
    j = np.eye(n) - np.ones((n, n)) / n
    b = -0.5 * j @ (d**2) @ j
    b = (b + b.T) / 2
    values, vectors = np.linalg.eigh(b)
    order = np.argsort(values)[::-1]
    values, vectors = values[order], vectors[:, order]
    coords = np.zeros((n, n_components))
    for c in range(min(n_components, n)):
        if values[c] <= 1e-12 * max(1.0, values[0]):
            break
        v = vectors[:, c]
        sign = 1.0 if v[np.argmax(np.abs(v))] >= 0 else -1.0
        coords[:, c] = sign * v * math.sqrt(values[c])
    positive = values[values > 0].sum()
    kept = values[: n_components][values[: n_components] > 0].sum()
    return {"coordinates": coords, "eigenvalues": values, "fit": float(kept / positive) if positive > 0 else 0.0}


def procrustes(target: np.ndarray, moving: np.ndarray) -> dict:
    """Align ``moving`` onto ``target`` by translation, orthogonal rotation and scale.

    Minimises ||target - (s * (moving - mean_m) R + mean_t)|| over orthogonal
    R (reflections allowed, since the sign of a principal component is
    arbitrary) and a scale s > 0 (Gower 1975; Schoenemann 1966): with
    U S V^T = SVD((moving - mean_m)^T (target - mean_t)), R = U V^T and
    s = trace(S) / ||moving - mean_m||**2.

    Returns
    -------
    dict with ``aligned`` (moving in target's units), ``rotation`` R,
    ``scale`` s, ``translation`` (mean_t - s * mean_m R) and ``disparity``:
    the sum of squared differences after both are centred and target is
    scaled to unit norm (the same quantity as ``scipy.spatial.procrustes``).
    The transform can be applied to further points as
    ``s * (points - mean_m) @ R + mean_t``; see ``mean_moving``/``mean_target``.
    """
    a = np.asarray(target, dtype=float)
    b = np.asarray(moving, dtype=float)
    if a.shape != b.shape:
        raise ValueError(f"procrustes: shapes differ ({a.shape} vs {b.shape})")
    mean_a, mean_b = a.mean(axis=0), b.mean(axis=0)
    ac, bc = a - mean_a, b - mean_b
    norm_a, norm_b = np.linalg.norm(ac), np.linalg.norm(bc)
    if norm_a == 0 or norm_b == 0:
        raise ValueError("procrustes: a configuration has all points in one place")
    u, s, vt = np.linalg.svd(bc.T @ ac)
    rotation = u @ vt
    scale = float(s.sum() / norm_b**2)
    aligned = scale * bc @ rotation + mean_a
    disparity = float(np.sum(((aligned - mean_a) / norm_a - ac / norm_a) ** 2))
    return {
        "aligned": aligned,
        "rotation": rotation,
        "scale": scale,
        "translation": mean_a - scale * mean_b @ rotation,
        "mean_target": mean_a,
        "mean_moving": mean_b,
        "disparity": disparity,
    }


# --------------------------------------------------------------------------
# Brand maps


def profile_matrix(metrics: pd.DataFrame, column: str) -> pd.DataFrame:
    """Brands x attributes matrix of one metric, keeping complete rows and columns.

    Attributes missing for some brand are dropped first (a survey may not ask
    every attribute), then brands with no value at all.
    """
    wide = metrics.pivot_table(index="brand", columns="attribute", values=column, aggfunc="first")
    wide = wide.dropna(axis=0, how="all")
    wide = wide.dropna(axis=1, how="any")
    return wide.sort_index(axis=0).sort_index(axis=1)


def brand_maps(
    metrics: pd.DataFrame, *, min_brands: int = MIN_BRANDS, seed: int = 0
) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
    """PCA brand maps per source, aligned onto the consumer map.

    For each source (consumer share, owned share, survey score) the brands x
    attributes profile is standardised per attribute and reduced by PCA to two
    components. Brand coordinates are principal coordinates (U S); attribute
    loadings are the correlations of each attribute with each component
    (V S / sqrt(n) for population-standardised data), so a biplot (Gabriel
    1971) draws brands as points and attributes as arrows from the origin.
    The owned and survey maps are then aligned onto the consumer map by
    Procrustes on the two map coordinates (rotation or reflection, uniform
    scale and shift; fitted on the brands both maps hold), which removes the
    arbitrary orientation of each PCA so the maps can be read side by side.
    The consumer map is its own alignment. Because each map keeps only two
    components, a brand's displacement between aligned maps is a picture;
    :func:`profile_distances` measures the same difference over every
    attribute.

    Returns
    -------
    (brand_map, loadings, notes).
    brand_map: ``source``, ``brand``, ``category``, ``pc1``, ``pc2``,
    ``aligned_x``, ``aligned_y``, ``explained_1``, ``explained_2`` (explained
    variance ratios), ``n_brands``, ``n_attributes``, ``disparity``
    (Procrustes disparity against the consumer map; 0 for consumer),
    ``protest_p``, ``protest_correlation``, ``protest_method`` (PROTEST,
    Jackson 1995, of that alignment: see ``explore.compare.uncertainty``;
    NaN / empty for consumer). ``seed`` seeds PROTEST's random orderings.
    loadings: ``source``, ``attribute``, ``loading_1``, ``loading_2``
    (correlations), ``direction_1``, ``direction_2`` (unit component
    weights), ``aligned_1``, ``aligned_2`` (loadings rotated like the
    aligned map), ``used`` (False for attributes constant over brands).
    """
    from explore.compare.uncertainty import protest  # uncertainty builds on this module

    categories = metrics.drop_duplicates("brand").set_index("brand")["category"].to_dict()
    maps, loads, notes = {}, {}, []
    for source, column in zip(MAP_SOURCES, METRICS):
        profile = profile_matrix(metrics, column)
        if profile.empty:
            continue
        n, p = profile.shape
        if n < min_brands:
            notes.append(f"brand map ({source}): too few brands ({n}; a map needs at least {min_brands})")
            continue
        z, varies = standardise(profile.to_numpy())
        if varies.sum() < 1:
            notes.append(f"brand map ({source}): every attribute is the same for all brands; no map")
            continue
        result = pca(z[:, varies], 2)
        scores = result["scores"]
        direction = np.zeros((p, 2))
        direction[varies] = result["components"].T
        loading = direction * result["singular_values"] / math.sqrt(n)
        dropped = [a for a, v in zip(profile.columns, varies) if not v]
        if dropped:
            notes.append(f"brand map ({source}): attribute(s) equal for all brands, left out: {', '.join(dropped)}")
        maps[source] = pd.DataFrame(
            {
                "source": source,
                "brand": profile.index,
                "category": [categories.get(b, "") for b in profile.index],
                "pc1": scores[:, 0],
                "pc2": scores[:, 1],
                "explained_1": result["explained_variance_ratio"][0],
                "explained_2": result["explained_variance_ratio"][1],
                "n_brands": n,
                "n_attributes": int(varies.sum()),
            }
        )
        loads[source] = pd.DataFrame(
            {
                "source": source,
                "attribute": profile.columns,
                "loading_1": loading[:, 0],
                "loading_2": loading[:, 1],
                "direction_1": direction[:, 0],
                "direction_2": direction[:, 1],
                "used": varies,
            }
        )

    target = maps.get("consumer")
    for source, table in maps.items():
        xy = table[["pc1", "pc2"]].to_numpy()
        aligned = np.full_like(xy, np.nan)
        rotation = np.full((2, 2), np.nan)
        disparity = float("nan")
        test = {"p_value": float("nan"), "correlation": float("nan"), "method": ""}
        if target is None:
            pass
        elif source == "consumer":
            aligned, rotation, disparity = xy, np.eye(2), 0.0
        else:
            common = sorted(set(table["brand"]) & set(target["brand"]))
            if len(common) < min_brands:
                notes.append(
                    f"brand map ({source}): only {len(common)} brand(s) shared with the consumer map; not aligned"
                )
            else:
                t = target.set_index("brand").loc[common, ["pc1", "pc2"]].to_numpy()
                m = table.set_index("brand").loc[common, ["pc1", "pc2"]].to_numpy()
                fit = procrustes(t, m)
                aligned = fit["scale"] * (xy - fit["mean_moving"]) @ fit["rotation"] + fit["mean_target"]
                rotation, disparity = fit["rotation"], fit["disparity"]
                test = protest(t, m, seed=seed)
        table["aligned_x"], table["aligned_y"] = aligned[:, 0], aligned[:, 1]
        table["disparity"] = disparity
        table["protest_p"] = test["p_value"]
        table["protest_correlation"] = test["correlation"]
        table["protest_method"] = test["method"]
        ld = loads[source]
        turned = ld[["loading_1", "loading_2"]].to_numpy() @ rotation
        ld["aligned_1"], ld["aligned_2"] = turned[:, 0], turned[:, 1]

    map_cols = [
        "source", "brand", "category", "pc1", "pc2", "aligned_x", "aligned_y",
        "explained_1", "explained_2", "n_brands", "n_attributes", "disparity",
        "protest_p", "protest_correlation", "protest_method",
    ]
    load_cols = [
        "source", "attribute", "loading_1", "loading_2", "direction_1", "direction_2",
        "aligned_1", "aligned_2", "used",
    ]
    brand_map = pd.concat(maps.values(), ignore_index=True) if maps else pd.DataFrame(columns=map_cols)
    loadings = pd.concat(loads.values(), ignore_index=True) if loads else pd.DataFrame(columns=load_cols)
    return brand_map[map_cols], loadings[load_cols], notes


def brand_vector_map(images: pd.DataFrame, embeddings, *, vectors: str = "cluster") -> tuple[pd.DataFrame, dict]:
    """Map brands by what their photos look like: mean image vectors and MDS.

    For every brand and source (and ``all`` for both together) the mean of
    the images' L2-normalised vectors is taken; brands are compared by the
    cosine distance between mean vectors (1 - cosine similarity) and placed in
    2-D by classical MDS. Consumer, owned and all positions share one MDS, so
    they can be compared directly without alignment.

    We use the ``cluster`` vectors by default: they are the encoder's
    general-purpose image features (for CLIP the same as ``joint``; for the
    bundled encoder the CNN's pooled feature, which keeps more of what a
    photo looks like than the ConSE text-space vector).

    Parameters
    ----------
    images : the images table (``image_id``, ``brand``, ``category``, ``source``).
    embeddings : an ``Embeddings`` (``image_ids``, ``cluster``, ``joint``).
    vectors : ``"cluster"`` or ``"joint"``.

    Returns
    -------
    (table, info). table: ``brand``, ``category``, ``source``, ``n_images``,
    ``x``, ``y``, ``nearest_brand`` (the other brand whose same-source mean
    is closest in cosine distance), ``nearest_distance``, ``vectors``.
    info: ``distances`` (DataFrame of cosine distances between the rows),
    ``fit`` (MDS fit, see :func:`classical_mds`).
    """
    if vectors not in ("cluster", "joint"):
        raise ValueError(f"vectors must be 'cluster' or 'joint', not {vectors!r}")
    matrix = np.asarray(getattr(embeddings, vectors), dtype=float)
    ids = list(embeddings.image_ids)
    if matrix.shape[0] != len(ids):
        raise ValueError(f"embeddings: {len(ids)} image ids but {matrix.shape[0]} {vectors} vectors")
    meta = images.set_index("image_id").reindex(ids)
    if meta["brand"].isna().any():
        missing = [i for i, b in zip(ids, meta["brand"]) if pd.isna(b)][:5]
        raise ValueError(f"embeddings: image id(s) not in the images table: {', '.join(missing)}")
    keys, means, counts = [], [], []
    brands = meta["brand"].to_numpy()
    sources = meta["source"].to_numpy()
    category = meta.groupby("brand")["category"].first().to_dict() if "category" in meta else {}
    for brand in sorted(set(brands)):
        for source in ("consumer", "owned", "all"):
            mask = (brands == brand) if source == "all" else (brands == brand) & (sources == source)
            if not mask.any():
                continue
            keys.append((brand, source))
            means.append(matrix[mask].mean(axis=0))
            counts.append(int(mask.sum()))
    cols = ["brand", "category", "source", "n_images", "x", "y", "nearest_brand", "nearest_distance", "vectors"]
    if not keys:
        return pd.DataFrame(columns=cols), {"distances": pd.DataFrame(), "fit": float("nan")}
    m = np.vstack(means)
    unit = m / np.maximum(np.linalg.norm(m, axis=1, keepdims=True), 1e-12)
    dist = np.clip(1.0 - unit @ unit.T, 0.0, 2.0)
    np.fill_diagonal(dist, 0.0)
    mds = classical_mds(dist, 2)
    nearest, nearest_d = [], []
    for i, (brand, source) in enumerate(keys):
        others = [k for k, (b, s) in enumerate(keys) if s == source and b != brand]
        if others:
            best = min(others, key=lambda k: dist[i, k])
            nearest.append(keys[best][0])
            nearest_d.append(float(dist[i, best]))
        else:
            nearest.append("")
            nearest_d.append(float("nan"))
    table = pd.DataFrame(
        {
            "brand": [k[0] for k in keys],
            "category": [category.get(k[0], "") for k in keys],
            "source": [k[1] for k in keys],
            "n_images": counts,
            "x": mds["coordinates"][:, 0],
            "y": mds["coordinates"][:, 1],
            "nearest_brand": nearest,
            "nearest_distance": nearest_d,
            "vectors": vectors,
        }
    )
    labels = [f"{b} ({s})" for b, s in keys]
    return table[cols], {"distances": pd.DataFrame(dist, index=labels, columns=labels), "fit": mds["fit"]}


def profile_distances(metrics: pd.DataFrame, reference: str, other: str) -> pd.Series:
    """Distance per brand between its standardised profiles under two metrics.

    Each metric's brands x attributes profile is standardised per attribute
    over all brands (as for the brand maps); a brand's distance is the root
    mean square over the shared attributes of the difference between its two
    standardised profiles. It is what the map displacement shows in 2-D, but
    measured over every attribute, so nothing is lost to the projection or
    the alignment. 0 = the brand stands out (or not) among the brands in the
    same way under both metrics; about 1.4 = as different as two unrelated
    profiles (sqrt(2), both having unit variance).

    Returns
    -------
    Series indexed by brand (NaN for brands lacking either profile).
    """
    a, b = profile_matrix(metrics, reference), profile_matrix(metrics, other)
    attrs = sorted(set(a.columns) & set(b.columns))
    brands = sorted(set(a.index) & set(b.index))
    if len(brands) < 2 or not attrs:
        return pd.Series(dtype=float)
    za, _ = standardise(a.loc[:, attrs].to_numpy())
    zb, _ = standardise(b.loc[:, attrs].to_numpy())
    za = pd.DataFrame(za, index=a.index, columns=attrs).loc[brands]
    zb = pd.DataFrame(zb, index=b.index, columns=attrs).loc[brands]
    return ((za - zb) ** 2).mean(axis=1).pow(0.5)


def brand_displacement(
    brand_map: pd.DataFrame,
    vector_map: pd.DataFrame | None,
    vector_distances: pd.DataFrame | None,
    metrics: pd.DataFrame,
) -> pd.DataFrame:
    """How far each brand moves between its consumer and owned (and survey) views.

    Returns
    -------
    DataFrame, one row per brand: ``brand``, ``category``, ``consumer_x``,
    ``consumer_y``, ``owned_x``, ``owned_y``, ``displacement`` (consumer to
    owned, in consumer-map units after alignment), ``survey_x``, ``survey_y``,
    ``survey_displacement`` (consumer to survey), ``owned_profile_distance``
    and ``survey_profile_distance`` (see :func:`profile_distances`, against
    consumer share), ``owned_rank_gap`` and ``survey_rank_gap`` (see
    :func:`rank_gaps`, against consumer share),
    ``vector_distance`` (cosine distance between the brand's consumer and owned
    mean image vectors) and ``vector_displacement`` (the same pair's distance
    on the 2-D vector map), sorted by displacement, largest first.
    """
    brands = metrics.drop_duplicates("brand")[["brand", "category"]].sort_values("brand")
    out = brands.set_index("brand")
    for source in MAP_SOURCES:
        part = brand_map[brand_map["source"] == source].set_index("brand")
        # astype(float): an empty map (too few brands) reindexes to object dtype.
        out[f"{source}_x"] = part["aligned_x"].reindex(out.index).astype(float)
        out[f"{source}_y"] = part["aligned_y"].reindex(out.index).astype(float)
    out["displacement"] = np.hypot(out["owned_x"] - out["consumer_x"], out["owned_y"] - out["consumer_y"])
    out["survey_displacement"] = np.hypot(out["survey_x"] - out["consumer_x"], out["survey_y"] - out["consumer_y"])
    for name, metric in (("owned_profile_distance", "owned_share"), ("survey_profile_distance", "survey_score")):
        dist = profile_distances(metrics, "consumer_share", metric) if metrics[metric].notna().any() else pd.Series(dtype=float)
        out[name] = dist.reindex(out.index).astype(float)
    for name, metric in (("owned_rank_gap", "owned_share"), ("survey_rank_gap", "survey_score")):
        gaps = rank_gaps(metrics, metric).set_index("brand")["rank_gap"] if metrics[metric].notna().any() else pd.Series(dtype=float)
        out[name] = gaps.reindex(out.index).astype(float)
    out["vector_distance"] = np.nan
    out["vector_displacement"] = np.nan
    if vector_map is not None and len(vector_map):
        vm = vector_map.set_index(["brand", "source"])
        for brand in out.index:
            if (brand, "consumer") in vm.index and (brand, "owned") in vm.index:
                c, o = vm.loc[(brand, "consumer")], vm.loc[(brand, "owned")]
                out.loc[brand, "vector_displacement"] = math.hypot(o["x"] - c["x"], o["y"] - c["y"])
                if vector_distances is not None:
                    out.loc[brand, "vector_distance"] = vector_distances.loc[f"{brand} (consumer)", f"{brand} (owned)"]
    out = out.reset_index()
    cols = [
        "brand", "category", "consumer_x", "consumer_y", "owned_x", "owned_y", "displacement",
        "survey_x", "survey_y", "survey_displacement", "owned_profile_distance",
        "survey_profile_distance", "owned_rank_gap", "survey_rank_gap",
        "vector_distance", "vector_displacement",
    ]
    return out[cols].sort_values("displacement", ascending=False, na_position="last").reset_index(drop=True)

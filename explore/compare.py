"""Compare: survey agreement, brand maps, and consumer / owned / survey views.

This stage answers two questions a brand team asks of a photo metric:

1. Does it agree with what they already measure? For each category and
   attribute, and each pair of metrics among *consumer share*, *owned share*
   and *survey score*, we count the brand pairs the two metrics rank the same
   way and give Kendall's tau-b, Spearman's rho and Pearson's r with their
   p-values.
2. Where does each brand sit among its competitors? Per source, a principal
   component map of the brands' standardised attribute profiles (a biplot,
   Gabriel 1971), a map from the brands' mean image vectors (classical
   multidimensional scaling of cosine distances, Torgerson 1952), maps of
   different sources aligned onto the consumer map by Procrustes rotation, and
   the displacement of each brand between its consumer and owned positions.

Everything here is a plain function over DataFrames and numpy arrays, except
:func:`read_survey`, which reads the survey CSV at the boundary and validates
it. PCA, classical MDS and Procrustes are written out in numpy (a few lines
each) so the maths is visible; the tests check them against scikit-learn and
scipy.

Tables returned by :func:`compare_study` (columns are documented in
DEVELOPERS.md): ``survey``, ``agreement``, ``brand_map``,
``brand_map_loadings``, ``brand_vector_map``, ``brand_displacement``.
"""

from __future__ import annotations

import difflib
import math
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from explore.study import StudyError

#: The three brand metrics compared with each other, in a fixed order.
METRICS = ("consumer_share", "owned_share", "survey_score")
#: The brand-map sources, in a fixed order (the first is the alignment target).
MAP_SOURCES = ("consumer", "owned", "survey")
#: Fewest brands for which rank statistics are computed.
MIN_BRANDS = 3
#: Name of the pooled rows that compare brands across all categories at once.
ALL_CATEGORIES = "all categories"

SURVEY_REQUIRED = ("brand", "attribute", "score")
SURVEY_OPTIONAL = ("category", "sample_size")


class SurveyError(StudyError):
    """The survey CSV is not valid; the message names the file, row and column.

    A survey is part of a study's input, so this is a kind of ``StudyError``
    (the command line prints it as such, without a traceback).
    """


# --------------------------------------------------------------------------
# Survey input


def read_survey(path: str | Path) -> pd.DataFrame:
    """Read and validate a survey CSV (our columns: brand, attribute, score).

    Optional columns: ``category`` (checked against the study's category of the
    brand) and ``sample_size`` (respondents behind the score, recorded only).
    Other columns are kept aside and named in a note by :func:`join_survey`.

    Parameters
    ----------
    path : the CSV file (UTF-8, a byte-order mark is accepted).

    Returns
    -------
    DataFrame with columns ``row`` (line number in the file, header = 1),
    ``brand``, ``attribute``, ``score`` (float), ``category`` (text, empty when
    not given), ``sample_size`` (float, NaN when not given); the attribute
    ``df.attrs["ignored_columns"]`` lists unknown columns.

    Raises
    ------
    SurveyError naming the file, the row and the column at fault.
    """
    path = Path(path)
    if not path.is_file():
        raise SurveyError(f"{path}: survey file not found")
    try:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise SurveyError(f"{path}: not a readable CSV file: {exc}") from exc
    raw.columns = [str(c).strip().lower() for c in raw.columns]
    missing = [c for c in SURVEY_REQUIRED if c not in raw.columns]
    if missing:
        raise SurveyError(
            f"{path}: missing column(s) {', '.join(missing)}; a survey needs brand, attribute, "
            f"score (optional: {', '.join(SURVEY_OPTIONAL)}); found: {', '.join(raw.columns)}"
        )
    ignored = [c for c in raw.columns if c not in SURVEY_REQUIRED + SURVEY_OPTIONAL]

    rows = []
    seen: dict[tuple[str, str], int] = {}
    for i, rec in enumerate(raw.to_dict("records")):
        line = i + 2
        where = f"{path}: row {line}"
        brand = rec["brand"].strip()
        attribute = rec["attribute"].strip()
        if not brand:
            raise SurveyError(f"{where}: column 'brand' is empty")
        if not attribute:
            raise SurveyError(f"{where}: column 'attribute' is empty")
        score = _number(rec["score"], where, "score")
        if score is None:
            raise SurveyError(f"{where}: column 'score' is empty; every row needs a score")
        size = _number(rec.get("sample_size", ""), where, "sample_size")
        if size is not None and (size <= 0 or size != int(size)):
            raise SurveyError(f"{where}: column 'sample_size' is {size!r}; expected a whole number above 0")
        key = (brand, attribute)
        if key in seen:
            raise SurveyError(
                f"{where}: brand '{brand}', attribute '{attribute}' already scored in row {seen[key]}"
            )
        seen[key] = line
        rows.append(
            {
                "row": line,
                "brand": brand,
                "attribute": attribute,
                "score": score,
                "category": rec.get("category", "").strip(),
                "sample_size": float("nan") if size is None else size,
            }
        )
    if not rows:
        raise SurveyError(f"{path}: the survey has a header but no rows")
    table = pd.DataFrame(rows)
    table.attrs["ignored_columns"] = ignored
    return table


def _number(text: str, where: str, column: str) -> float | None:
    text = (text or "").strip()
    if not text:
        return None
    try:
        value = float(text)
    except ValueError:
        raise SurveyError(f"{where}: column '{column}' is '{text}'; expected a number") from None
    if not math.isfinite(value):
        raise SurveyError(f"{where}: column '{column}' is '{text}'; expected a finite number")
    return value


def join_survey(
    survey: pd.DataFrame,
    brand_categories: dict[str, str],
    attributes: list[str],
) -> tuple[pd.DataFrame, list[str]]:
    """Join survey rows to the study's brands and attributes, flagging the rest.

    Nothing is dropped: every survey row stays in the returned table with a
    ``status`` saying whether it is used. Unknown brands and attributes are
    named in the notes, with the closest known name when one is close.

    Parameters
    ----------
    survey : output of :func:`read_survey`.
    brand_categories : the study's brands, brand -> category.
    attributes : the study's attribute names.

    Returns
    -------
    (table, notes). The table has the columns of ``survey`` plus
    ``survey_category`` (the category the survey gave), ``category`` (the
    study's), ``known_brand``, ``known_attribute``, ``status`` (``used``,
    ``unknown brand``, ``unknown attribute``, ``unknown brand and attribute``)
    and ``note``.
    """
    table = survey.copy()
    known_attrs = set(attributes)
    table["survey_category"] = table["category"].astype(str)
    table["known_brand"] = table["brand"].isin(brand_categories.keys())
    table["known_attribute"] = table["attribute"].isin(known_attrs)
    table["category"] = [brand_categories.get(b, "") for b in table["brand"]]
    status, row_notes = [], []
    for rec in table.to_dict("records"):
        if rec["known_brand"] and rec["known_attribute"]:
            status.append("used")
        elif rec["known_attribute"]:
            status.append("unknown brand")
        elif rec["known_brand"]:
            status.append("unknown attribute")
        else:
            status.append("unknown brand and attribute")
        note = []
        if not rec["known_brand"]:
            note.append(_did_you_mean(rec["brand"], brand_categories.keys()))
        if not rec["known_attribute"]:
            note.append(_did_you_mean(rec["attribute"], known_attrs))
        given = rec["survey_category"]
        if rec["known_brand"] and given and given != rec["category"]:
            note.append(f"survey says category '{given}', the study says '{rec['category']}'")
        row_notes.append("; ".join(n for n in note if n))
    table["status"] = status
    table["note"] = row_notes

    notes = []
    bad_brands = sorted(set(table.loc[~table["known_brand"], "brand"]))
    bad_attrs = sorted(set(table.loc[~table["known_attribute"], "attribute"]))
    if bad_brands:
        notes.append(
            "survey: brand(s) not in the study, rows not used: "
            + ", ".join(_with_hint(b, brand_categories.keys()) for b in bad_brands)
        )
    if bad_attrs:
        notes.append(
            "survey: attribute(s) not in the study, rows not used: "
            + ", ".join(_with_hint(a, known_attrs) for a in bad_attrs)
        )
    mismatched = sorted(
        set(
            table.loc[
                table["known_brand"]
                & (table["survey_category"] != "")
                & (table["survey_category"] != table["category"]),
                "brand",
            ]
        )
    )
    if mismatched:
        notes.append(
            "survey: category differs from the study for "
            + ", ".join(mismatched)
            + " (the study's category is used)"
        )
    used = table[table["status"] == "used"]
    unscored = sorted(set(brand_categories) - set(used["brand"]))
    if unscored:
        notes.append("survey: no scores for brand(s) " + ", ".join(unscored))
    ignored = survey.attrs.get("ignored_columns", [])
    if ignored:
        notes.append("survey: column(s) ignored: " + ", ".join(ignored))
    columns = [
        "row", "brand", "category", "survey_category", "attribute", "score", "sample_size",
        "known_brand", "known_attribute", "status", "note",
    ]
    return table[columns].reset_index(drop=True), notes


def _did_you_mean(name: str, known) -> str:
    close = difflib.get_close_matches(name, list(known), n=1, cutoff=0.6)
    if not close:
        lowered = {k.lower(): k for k in known}
        if name.lower() in lowered:
            close = [lowered[name.lower()]]
    return f"did you mean '{close[0]}'?" if close else ""


def _with_hint(name: str, known) -> str:
    hint = _did_you_mean(name, known)
    return f"'{name}' ({hint})" if hint else f"'{name}'"


# --------------------------------------------------------------------------
# Brand metrics side by side


def brand_metrics(
    attribute_shares: pd.DataFrame,
    survey: pd.DataFrame | None = None,
    *,
    value: str = "yes_rate",
) -> pd.DataFrame:
    """One row per brand and attribute with the three metrics side by side.

    Parameters
    ----------
    attribute_shares : the ``attribute_shares`` table (rows with ``level ==
        "brand"`` are used).
    survey : the joined survey (output of :func:`join_survey`); rows whose
        status is not ``used`` are left out. ``None``: no survey.
    value : which column of ``attribute_shares`` is the photo metric
        (``yes_rate``, the default: the corrected ``share`` where random hand
        labels give one, else the model's yes-rate, recorded per row in
        ``consumer_from`` / ``owned_from``; or ``mean_probability``).

    Returns
    -------
    DataFrame with columns ``category``, ``brand``, ``attribute``,
    ``consumer_share``, ``owned_share``, ``survey_score`` (NaN where missing).
    """
    need = {"level", "brand", "category", "source", "attribute", value}
    missing = need - set(attribute_shares.columns)
    if missing:
        raise ValueError(f"attribute_shares: missing column(s) {', '.join(sorted(missing))}")
    rows = attribute_shares[attribute_shares["level"] == "brand"]
    # The corrected share (from random hand labels) where it exists, else the model's yes-rate.
    corrected = value == "yes_rate" and "share" in rows
    if corrected:
        rows = rows.assign(_metric=rows["share"].where(rows["share"].notna(), rows["yes_rate"]),
                           _from=np.where(rows["share"].notna(), "share", "yes_rate"))
    wide = rows.pivot_table(
        index=["category", "brand", "attribute"], columns="source", values="_metric" if corrected else value,
        aggfunc="first",
    )
    out = pd.DataFrame(index=wide.index)
    for source in ("consumer", "owned"):
        out[f"{source}_share"] = wide[source] if source in wide.columns else np.nan
    if corrected:
        origin = rows.pivot_table(index=["category", "brand", "attribute"], columns="source", values="_from",
                                  aggfunc="first")
        for source in ("consumer", "owned"):
            out[f"{source}_from"] = origin[source].reindex(out.index) if source in origin.columns else ""
    out = out.reset_index()
    if survey is not None and len(survey):
        used = survey[survey["status"] == "used"][["brand", "attribute", "score"]]
        out = out.merge(used, on=["brand", "attribute"], how="left").rename(columns={"score": "survey_score"})
    else:
        out["survey_score"] = np.nan
    out["survey_score"] = out["survey_score"].astype(float)
    return out.sort_values(["category", "brand", "attribute"]).reset_index(drop=True)


# --------------------------------------------------------------------------
# Agreement between two metrics over brands


def pair_counts(x, y) -> dict:
    """Count concordant, discordant and tied brand pairs of two metrics.

    A pair of brands (i, j) is concordant when both metrics order them the
    same way, discordant when they order them oppositely, and tied when either
    metric gives the two brands the same value. Only brands with both values
    are used.

    Returns
    -------
    dict with ``n_brands``, ``pairs``, ``concordant``, ``discordant``, ``ties``
    (pairs tied in either metric), ``ties_a``, ``ties_b`` (pairs tied in x, in
    y) and ``concordant_share`` (concordant / pairs; with no ties it equals
    (1 + Kendall's tau-a) / 2).
    """
    x, y = _finite_pairs(x, y)
    n = len(x)
    i, j = np.triu_indices(n, 1)
    dx = np.sign(x[i] - x[j])
    dy = np.sign(y[i] - y[j])
    pairs = len(i)
    concordant = int(np.sum(dx * dy > 0))
    discordant = int(np.sum(dx * dy < 0))
    return {
        "n_brands": n,
        "pairs": pairs,
        "concordant": concordant,
        "discordant": discordant,
        "ties": pairs - concordant - discordant,
        "ties_a": int(np.sum(dx == 0)),
        "ties_b": int(np.sum(dy == 0)),
        "concordant_share": concordant / pairs if pairs else float("nan"),
    }


def pair_agreement(x, y, *, min_brands: int = MIN_BRANDS) -> dict:
    """Agreement of two brand metrics: pair counts plus tau-b, rho and r.

    Kendall's tau-b is computed from the pair counts,
    (C - D) / sqrt((P - T_x)(P - T_y)) (Kendall 1945); its p-value, Spearman's
    rho and Pearson's r with their p-values come from ``scipy.stats``. With
    fewer than ``min_brands`` brands, or a metric that is constant over the
    brands, the statistics are NaN and ``note`` says why.

    Returns
    -------
    dict: the keys of :func:`pair_counts` plus ``kendall_tau``, ``kendall_p``,
    ``spearman_rho``, ``spearman_p``, ``pearson_r``, ``pearson_p``, ``note``.
    """
    from scipy import stats

    out = pair_counts(x, y)
    nan = float("nan")
    out.update(
        kendall_tau=nan, kendall_p=nan, spearman_rho=nan, spearman_p=nan,
        pearson_r=nan, pearson_p=nan, note="",
    )
    n = out["n_brands"]
    if n == 0:
        out["note"] = "no brand has both values"
        return out
    if n < min_brands:
        out["note"] = f"too few brands ({n}; statistics need at least {min_brands})"
        return out
    x, y = _finite_pairs(x, y)
    constant = [name for name, v in (("first", x), ("second", y)) if np.all(v == v[0])]
    if constant:
        out["note"] = f"the {' and '.join(constant)} metric is the same for every brand; no statistics"
        return out
    p = out["pairs"]
    out["kendall_tau"] = (out["concordant"] - out["discordant"]) / math.sqrt(
        (p - out["ties_a"]) * (p - out["ties_b"])
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns about small n; the note column says it
        out["kendall_p"] = float(stats.kendalltau(x, y).pvalue)
        rho = stats.spearmanr(x, y)
        out["spearman_rho"], out["spearman_p"] = float(rho.statistic), float(rho.pvalue)
        r = stats.pearsonr(x, y)
        out["pearson_r"], out["pearson_p"] = float(r.statistic), float(r.pvalue)
    if out["ties"]:
        out["note"] = f"{out['ties']} of {p} brand pairs tied"
    return out


def _finite_pairs(x, y) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.shape != y.shape or x.ndim != 1:
        raise ValueError("both metrics must be 1-D and of the same length (one value per brand)")
    keep = np.isfinite(x) & np.isfinite(y)
    return x[keep], y[keep]


def agreement_table(metrics: pd.DataFrame, *, min_brands: int = MIN_BRANDS) -> pd.DataFrame:
    """Agreement for each category, attribute and pair of metrics.

    When the study has more than one category, rows with category
    ``"all categories"`` compare all brands at once as well.

    Parameters
    ----------
    metrics : output of :func:`brand_metrics`.

    Returns
    -------
    DataFrame with columns ``category``, ``attribute``, ``metric_a``,
    ``metric_b``, then the keys of :func:`pair_agreement`. Pairs involving the
    survey appear only when some survey score is present.
    """
    present = [m for m in METRICS if metrics[m].notna().any()]
    metric_pairs = [(a, b) for k, a in enumerate(present) for b in present[k + 1:]]
    groups = [(c, g) for c, g in metrics.groupby("category", sort=True)]
    if len(groups) > 1:
        groups.append((ALL_CATEGORIES, metrics))
    rows = []
    for category, g in groups:
        for attribute, ga in g.groupby("attribute", sort=True):
            for a, b in metric_pairs:
                stats = pair_agreement(ga[a].to_numpy(), ga[b].to_numpy(), min_brands=min_brands)
                rows.append({"category": category, "attribute": attribute, "metric_a": a, "metric_b": b, **stats})
    columns = [
        "category", "attribute", "metric_a", "metric_b", "n_brands", "pairs", "concordant",
        "discordant", "ties", "concordant_share", "kendall_tau", "kendall_p", "spearman_rho",
        "spearman_p", "pearson_r", "pearson_p", "note",
    ]
    return pd.DataFrame(rows, columns=columns)


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


def brand_maps(metrics: pd.DataFrame, *, min_brands: int = MIN_BRANDS) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
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
    (Procrustes disparity against the consumer map; 0 for consumer).
    loadings: ``source``, ``attribute``, ``loading_1``, ``loading_2``
    (correlations), ``direction_1``, ``direction_2`` (unit component
    weights), ``aligned_1``, ``aligned_2`` (loadings rotated like the
    aligned map), ``used`` (False for attributes constant over brands).
    """
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
        table["aligned_x"], table["aligned_y"] = aligned[:, 0], aligned[:, 1]
        table["disparity"] = disparity
        ld = loads[source]
        turned = ld[["loading_1", "loading_2"]].to_numpy() @ rotation
        ld["aligned_1"], ld["aligned_2"] = turned[:, 0], turned[:, 1]

    map_cols = [
        "source", "brand", "category", "pc1", "pc2", "aligned_x", "aligned_y",
        "explained_1", "explained_2", "n_brands", "n_attributes", "disparity",
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


# --------------------------------------------------------------------------
# Summary and the whole stage


def attribute_agreement(agreement: pd.DataFrame, metric_a: str, metric_b: str) -> pd.DataFrame:
    """Agreement per attribute pooled over categories: concordant pairs / all pairs.

    Only within-category rows are pooled (brands compete within a category).

    Returns
    -------
    DataFrame with ``attribute``, ``concordant``, ``pairs``, ``ties``,
    ``concordant_share``, sorted from best to worst agreement.
    """
    rows = agreement[
        (agreement["metric_a"] == metric_a)
        & (agreement["metric_b"] == metric_b)
        & (agreement["category"] != ALL_CATEGORIES)
    ]
    if rows.empty:
        return pd.DataFrame(columns=["attribute", "concordant", "pairs", "ties", "concordant_share"])
    pooled = rows.groupby("attribute", sort=True)[["concordant", "pairs", "ties"]].sum().reset_index()
    pooled = pooled[pooled["pairs"] > 0]
    pooled["concordant_share"] = pooled["concordant"] / pooled["pairs"]
    return pooled.sort_values(["concordant_share", "attribute"], ascending=[False, True]).reset_index(drop=True)


_METRIC_WORDS = {
    "consumer_share": "consumer photos",
    "owned_share": "owned photos",
    "survey_score": "survey",
}


def summarise(tables: dict[str, pd.DataFrame], *, top: int = 2) -> list[str]:
    """A few plain lines: where metrics agree best and worst, who moves most.

    Parameters
    ----------
    tables : the tables of :func:`compare_study`.
    top : how many attributes / brands to name per line.

    Returns
    -------
    list of one-line texts, most useful first.
    """
    lines = []
    agreement = tables.get("agreement")
    if agreement is not None and len(agreement):
        for a, b in (("consumer_share", "survey_score"), ("owned_share", "survey_score"), ("consumer_share", "owned_share")):
            per = attribute_agreement(agreement, a, b)
            if per.empty:
                continue

            def fmt(r):
                tie = f", {int(r.ties)} tied" if r.ties else ""
                return f"{r.attribute} ({int(r.concordant)}/{int(r.pairs)} pairs{tie})"

            words = f"agreement {_METRIC_WORDS[a]} vs {_METRIC_WORDS[b]} (brand pairs ranked alike)"
            if per["concordant_share"].nunique() == 1:
                alike = "" if len(per) == 1 else "alike for every attribute: "
                lines.append(f"{words}: {alike}{', '.join(fmt(r) for r in per.head(3).itertuples())}")
                continue
            hi, lo = per["concordant_share"].max(), per["concordant_share"].min()
            best = [fmt(r) for r in per[per["concordant_share"] > lo].head(top).itertuples()]
            worst = [fmt(r) for r in per[per["concordant_share"] < hi].iloc[::-1].head(top).itertuples()]
            lines.append(f"{words}: best {', '.join(best)}; worst {', '.join(worst)}")
    disp = tables.get("brand_displacement")
    if disp is not None and len(disp):
        moved = disp.dropna(subset=["displacement"]).sort_values("displacement", ascending=False)
        if len(moved):
            fit = ""
            bm = tables.get("brand_map")
            if bm is not None and (bm["source"] == "owned").any():
                fit = f" (Procrustes disparity {bm.loc[bm['source'] == 'owned', 'disparity'].iloc[0]:.2f})"
            line = f"brand map, consumer -> owned photos{fit}, moves most: " + ", ".join(
                f"{r.brand} ({r.displacement:.2f})" for r in moved.head(top).itertuples()
            )
            far = moved.dropna(subset=["owned_profile_distance"]).sort_values("owned_profile_distance", ascending=False)
            if len(far):
                line += "; most different attribute profiles: " + ", ".join(
                    f"{r.brand} ({r.owned_profile_distance:.2f})" for r in far.head(top).itertuples()
                )
            lines.append(line)
        far = disp.dropna(subset=["survey_profile_distance"]).sort_values("survey_profile_distance", ascending=False)
        if len(far):
            lines.append(
                "survey vs consumer photos, most different attribute profiles: "
                + ", ".join(f"{r.brand} ({r.survey_profile_distance:.2f})" for r in far.head(top).itertuples())
                + "; largest mean rank gap within category: "
                + ", ".join(
                    f"{r.brand} ({r.survey_rank_gap:.2f})"
                    for r in far.sort_values("survey_rank_gap", ascending=False).head(top).itertuples()
                )
            )
        vec = disp.dropna(subset=["vector_distance"]).sort_values("vector_distance", ascending=False)
        if len(vec):
            lines.append(
                "image vectors, consumer vs owned most different: "
                + ", ".join(f"{r.brand} (cosine distance {r.vector_distance:.3f})" for r in vec.head(top).itertuples())
            )
    return lines


def compare_study(
    attribute_shares: pd.DataFrame,
    *,
    survey: pd.DataFrame | None = None,
    brand_categories: dict[str, str] | None = None,
    attributes: list[str] | None = None,
    images: pd.DataFrame | None = None,
    embeddings=None,
    value: str = "yes_rate",
    vectors: str = "cluster",
) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """Run the compare stage: survey join, agreement, brand maps, displacement.

    Parameters
    ----------
    attribute_shares : the ``attribute_shares`` table from the attributes stage.
    survey : output of :func:`read_survey`, or ``None`` when the study has none.
    brand_categories : brand -> category of the study (defaults to the brands
        of ``attribute_shares``); survey brands outside it are reported.
    attributes : the study's attribute names (defaults to those of
        ``attribute_shares``); survey attributes outside it are reported.
    images, embeddings : the images table and the ``Embeddings``, for the
        image-vector map (left out when either is ``None``).
    value : photo metric column of ``attribute_shares`` (``yes_rate``).
    vectors : which image vectors build the vector map (``cluster``).

    Returns
    -------
    (tables, notes): tables ``survey``, ``agreement``, ``brand_map``,
    ``brand_map_loadings``, ``brand_vector_map``, ``brand_displacement``; notes
    are one-line texts for the run summary (survey problems first, then the
    summary lines of :func:`summarise`).
    """
    brand_rows = attribute_shares[attribute_shares["level"] == "brand"]
    if brand_categories is None:
        brand_categories = brand_rows.drop_duplicates("brand").set_index("brand")["category"].to_dict()
    else:
        # brands with images keep the category the attributes stage recorded
        brand_categories = {**brand_categories, **brand_rows.drop_duplicates("brand").set_index("brand")["category"].to_dict()}
    if attributes is None:
        attributes = sorted(set(brand_rows["attribute"]))
    notes: list[str] = []
    if survey is not None:
        survey_table, survey_notes = join_survey(survey, brand_categories, attributes)
        notes += survey_notes
        used = int((survey_table["status"] == "used").sum())
        notes.insert(0, f"survey: {used} of {len(survey_table)} rows used")
    else:
        survey_table = pd.DataFrame(
            columns=["row", "brand", "category", "survey_category", "attribute", "score", "sample_size",
                     "known_brand", "known_attribute", "status", "note"]
        )
        notes.append("survey: none in the study; agreement covers consumer vs owned photos only")

    metrics = brand_metrics(attribute_shares, survey_table if survey is not None else None, value=value)
    if "consumer_from" in metrics:
        used = int((metrics[["consumer_from", "owned_from"]] == "share").to_numpy().sum())
        total = int(metrics[["consumer_from", "owned_from"]].isin(["share", "yes_rate"]).to_numpy().sum())
        notes.append(f"photo metric: corrected share for {used} of {total} brand x source x attribute values, "
                     "the model's yes-rate for the rest" if used else "photo metric: the model's yes-rate "
                     "(no random hand labels, so no corrected shares)")
    agreement = agreement_table(metrics)
    brands_per_category = metrics.groupby("category")["brand"].nunique()
    too_few = sorted(brands_per_category[brands_per_category < MIN_BRANDS].index)
    if too_few:
        notes.append(f"agreement: too few brands for statistics in {', '.join(too_few)} (counts only)")
    brand_map, loadings, map_notes = brand_maps(metrics)
    notes += map_notes
    vector_map, distances = None, None
    if images is not None and embeddings is not None and len(embeddings.image_ids):
        vector_map, info = brand_vector_map(images, embeddings, vectors=vectors)
        distances = info["distances"]
    displacement = brand_displacement(brand_map, vector_map, distances, metrics)
    tables = {
        "survey": survey_table,
        "agreement": agreement,
        "brand_map": brand_map,
        "brand_map_loadings": loadings,
        "brand_vector_map": vector_map if vector_map is not None else pd.DataFrame(
            columns=["brand", "category", "source", "n_images", "x", "y", "nearest_brand", "nearest_distance", "vectors"]
        ),
        "brand_displacement": displacement,
    }
    return tables, notes + summarise(tables)

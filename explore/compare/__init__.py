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

One file per concern: ``survey`` (survey input, metrics side by side),
``agreement`` (rank agreement between metrics), ``maps`` (brand maps,
alignment, displacement, their uncertainty) and ``summary`` (run notes and
the stage entry :func:`compare_study`).
"""

from explore.compare.agreement import (
    AGREEMENT_COLUMNS,
    AGREEMENT_FDR,
    ALL_CATEGORIES,
    EXACT_MAX_BRANDS,
    MIN_BRANDS,
    MIN_TEST_BRANDS,
    exact_permutation_pvalues,
    family_name,
    fisher_z_interval,
    agreement_table,
    pair_agreement,
    pair_counts,
)
from explore.compare.maps import (
    MAP_SOURCES,
    brand_displacement,
    brand_maps,
    brand_vector_map,
    classical_mds,
    pca,
    procrustes,
    profile_distances,
    profile_matrix,
    rank_gaps,
    standardise,
)
from explore.compare.summary import attribute_agreement, compare_study, format_p, summarise
from explore.compare.uncertainty import (
    BOOTSTRAP_COLUMNS,
    MAP_REPLICATES,
    MOVES_MOST_SHARE,
    PROTEST_EXACT_MAX,
    map_bootstrap,
    protest,
    resampling_units,
)
from explore.compare.survey import (
    METRICS,
    SURVEY_OPTIONAL,
    SURVEY_REQUIRED,
    SurveyError,
    brand_metrics,
    join_survey,
    read_survey,
)

__all__ = [
    "format_p", "BOOTSTRAP_COLUMNS", "MAP_REPLICATES", "MOVES_MOST_SHARE", "PROTEST_EXACT_MAX",
    "map_bootstrap", "protest", "resampling_units",
    "AGREEMENT_COLUMNS", "AGREEMENT_FDR", "EXACT_MAX_BRANDS", "MIN_TEST_BRANDS",
    "exact_permutation_pvalues", "family_name", "fisher_z_interval",
    "ALL_CATEGORIES",
    "MAP_SOURCES",
    "METRICS",
    "MIN_BRANDS",
    "SURVEY_OPTIONAL",
    "SURVEY_REQUIRED",
    "SurveyError",
    "agreement_table",
    "attribute_agreement",
    "brand_displacement",
    "brand_maps",
    "brand_metrics",
    "brand_vector_map",
    "classical_mds",
    "compare_study",
    "join_survey",
    "pair_agreement",
    "pair_counts",
    "pca",
    "procrustes",
    "profile_distances",
    "profile_matrix",
    "rank_gaps",
    "read_survey",
    "standardise",
    "summarise",
]

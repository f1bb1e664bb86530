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

One file per concern:

- ``fit``: clustering parameters, UMAP and HDBSCAN (:func:`find_contexts`),
  the stability refit (:func:`context_stability`); its docstring says why
  UMAP stays seeded and how large sets are fitted on a sample;
- ``naming``: the vocabulary, distinctiveness, names (:func:`name_contexts`)
  and exemplars; how sure a name is, and the analyst's edits, are in
  ``explore.context_names``;
- ``tables``: Fisher and poster permutation tests, Benjamini-Hochberg, the
  brand x context table and its findings;
- ``notes``: the run notes (:func:`describe`);
- ``stage``: the stage entry :func:`run_contexts` and :func:`settings_record`;
- ``common``: what they share (the unassigned context, names, checks).

Everything here works on arrays and DataFrames; ``umap`` and ``hdbscan`` are
imported inside the functions that use them. The names below are the
package's public interface.
"""

# ContextSettings and _normalise are re-exported for the tests and benchmarks that use them.
from explore.contexts.common import UNASSIGNED, UNASSIGNED_ID, _normalise  # noqa: F401
from explore.contexts.fit import (
    STABILITY_COLUMNS,
    STABILITY_MAX_IMAGES,
    ContextFit,
    cluster_points,
    context_stability,
    exact_neighbours,
    find_contexts,
    place_by_neighbours,
    reduce_with_umap,
    relabel_by_size,
    resolve_parameters,
    sample_rows,
)
from explore.contexts.naming import (
    DEFAULT_VOCABULARY,
    distinctiveness,
    exemplars,
    load_vocabulary,
    name_contexts,
    standardised_similarities,
)
from explore.contexts.notes import STABILITY_ADVICE_ARI, UNASSIGNED_ADVICE_SHARE, describe
from explore.contexts.stage import run_contexts, settings_record
from explore.contexts.tables import (
    FISHER_TEST,
    POSTER_PERMUTATIONS,
    SOURCES,
    benjamini_hochberg,
    brand_context_table,
    cluster_permutation_pvalues,
    fisher_pvalues,
    poster_test_name,
    poster_units,
    signature_contexts,
    source_context_gaps,
    unexpected_contexts,
)
from explore.study import ContextSettings  # noqa: F401

__all__ = [
    "UNASSIGNED", "UNASSIGNED_ID", "STABILITY_COLUMNS", "STABILITY_MAX_IMAGES", "ContextFit", "cluster_points",
    "context_stability", "exact_neighbours", "find_contexts", "place_by_neighbours", "reduce_with_umap",
    "relabel_by_size", "resolve_parameters", "sample_rows", "DEFAULT_VOCABULARY", "distinctiveness", "exemplars",
    "load_vocabulary", "name_contexts", "standardised_similarities", "STABILITY_ADVICE_ARI",
    "UNASSIGNED_ADVICE_SHARE", "describe", "run_contexts", "settings_record", "FISHER_TEST",
    "POSTER_PERMUTATIONS", "SOURCES", "benjamini_hochberg", "brand_context_table", "cluster_permutation_pvalues",
    "fisher_pvalues", "poster_test_name", "poster_units", "signature_contexts", "source_context_gaps",
    "unexpected_contexts",
]

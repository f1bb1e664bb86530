"""Attributes: prompt pairs -> per-image probabilities -> brand yes-rates with intervals.

One file per concern:

- ``prompts``: attribute definitions, prompts, ensembled text vectors;
- ``scoring``: per-image probabilities (zero-shot prompt pairs or a saved probe);
- ``intervals``: Wilson, Newcombe and bootstrap intervals;
- ``clustering``: poster-aware (design-effect) intervals and gap tests;
- ``testing``: Benjamini-Hochberg over the gap family, minimum detectable gaps;
- ``context_adjust``: gaps adjusted for context (Mantel-Haenszel, Kitagawa),
  called by ``explore.run`` after the contexts stage;
- ``shares``: brand and category yes-rates, consumer-vs-owned gaps, the stage entry
  :func:`attribute_tables`;
- ``labels``: reading hand labels and their sample design;
- ``correction``: corrected shares from random labels (stratified PPI++);
- ``check``: checking scores against hand labels (AUC, thresholds, probe).

Everything here is a pure function over numpy arrays and pandas DataFrames;
reading and writing files is left to ``explore.run`` and ``explore.cli``. The
names below are the package's public interface.
"""

from explore.attributes.check import (
    MIN_LABELS_PER_CLASS,
    PROBE_MIN_LABELS_PER_CLASS,
    AttributeCheck,
    accuracy_at,
    auc_interval,
    check_attribute,
    checks_table,
    fit_probe,
    harrell_c,
    reliability_table,
    roc_auc,
    roc_points,
    saved_record,
    youden_threshold,
)
from explore.attributes.intervals import (
    Z95,
    bootstrap_mean_interval,
    bootstrap_sums,
    newcombe_interval,
    wilson_interval,
)
from explore.attributes.correction import corrected_gaps, corrected_shares
from explore.attributes.labels import (
    DESIGN_COLUMNS,
    LABEL_COLUMNS,
    describe_sample,
    parse_labels_text,
    prevalence_labels,
    read_labels,
)
from explore.attributes.prompts import (
    AttributeVectors,
    add_attributes,
    attribute_vectors,
    build_prompts,
    ensemble,
    parse_attribute_spec,
    prompts_digest,
)
from explore.attributes.scoring import (
    attribute_bias,
    neutral_vector,
    pair_probabilities,
    platt_common_slope,
    probe_probabilities,
    resolve_threshold,
    score_attributes,
    usable_check,
)
from explore.attributes.clustering import ClusterSummary, cluster_summary, clustering_note, yes_rate_interval
from explore.attributes.context_adjust import adjust_gaps_for_context, kitagawa, mantel_haenszel
from explore.attributes.shares import GAP_FDR, SOURCES, attribute_gaps, attribute_shares, attribute_tables, describe_gaps
from explore.attributes.testing import benjamini_hochberg, minimum_detectable_gap, power_warning

__all__ = [
    "MIN_LABELS_PER_CLASS", "PROBE_MIN_LABELS_PER_CLASS", "AttributeCheck", "accuracy_at",
    "auc_interval", "check_attribute", "checks_table", "fit_probe", "harrell_c", "reliability_table", "roc_auc",
    "roc_points", "saved_record", "youden_threshold", "Z95", "bootstrap_mean_interval",
    "bootstrap_sums", "newcombe_interval", "wilson_interval", "LABEL_COLUMNS", "read_labels",
    "DESIGN_COLUMNS", "describe_sample", "parse_labels_text", "prevalence_labels", "corrected_shares",
    "corrected_gaps",
    "AttributeVectors", "add_attributes", "attribute_vectors", "build_prompts", "ensemble",
    "parse_attribute_spec", "prompts_digest", "attribute_bias", "neutral_vector",
    "pair_probabilities", "platt_common_slope", "probe_probabilities", "resolve_threshold",
    "score_attributes", "usable_check", "SOURCES", "attribute_gaps", "attribute_shares",
    "attribute_tables", "ClusterSummary", "cluster_summary", "clustering_note", "yes_rate_interval",
    "adjust_gaps_for_context", "kitagawa", "mantel_haenszel", "GAP_FDR", "describe_gaps",
    "benjamini_hochberg", "minimum_detectable_gap", "power_warning",
]

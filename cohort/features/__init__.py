"""Episode features: insulin-infusion closure, standards of care, covariates, recurrence, audit.

The builders are pure polars functions over plain input frames (:class:`FeatureInputs`), so they
are tested on hand-built timelines; :func:`load_feature_inputs` pulls those frames from an
extract's DuckDB session. Every output column is defined once, next to its builder, and rendered
by :func:`data_dictionary` / :func:`data_dictionary_markdown`.
"""

from __future__ import annotations

from cohort.features._build import FeatureTables, build_features, run_features, write_features
from cohort.features._dictionary import data_dictionary, data_dictionary_markdown
from cohort.features._inputs import FeatureInputs
from cohort.features._loader import load_feature_inputs
from cohort.features._options import FeatureOptions, options_from_pairs

__all__ = [
    "FeatureInputs",
    "FeatureOptions",
    "FeatureTables",
    "build_features",
    "data_dictionary",
    "data_dictionary_markdown",
    "load_feature_inputs",
    "options_from_pairs",
    "run_features",
    "write_features",
]


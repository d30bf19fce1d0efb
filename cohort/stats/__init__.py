"""Statistics for DKA cohorts: survival, competing risks, recurrence, prediction and rates.

Every function takes a polars (or pandas) DataFrame with explicit column-name arguments whose
defaults are the features contract's names, and returns tidy polars DataFrames (``term`` or
``group``, ``estimate``, ``lower``, ``upper``, ``p``, ``n``, ``events``, ...). Input that cannot
support the model asked for (too few events, a constant covariate, perfect separation) raises
:class:`cohort.InputError` with the table, column and count at fault.
"""

from __future__ import annotations

from cohort.stats._competing import (
    aalen_johansen_arrays,
    cause_specific_cox,
    cumulative_incidence,
)
from cohort.stats._cox import cox_model, schoenfeld_ph_test
from cohort.stats._prediction import PredictionResult, delong_auc, recurrence_prediction
from cohort.stats._rates import (
    age_standardised_rates,
    fay_feuer_interval,
    incidence_rates,
    parse_age_band,
    poisson_exact_interval,
    rate_regression,
)
from cohort.stats._recurrence import (
    FirstRecurrenceResult,
    andersen_gill,
    first_recurrence_table,
    gap_time_model,
    recurrence_logistic,
    time_to_first_recurrence,
)
from cohort.stats._standard_populations import STANDARD_POPULATIONS, standard_population
from cohort.stats._survival import (
    KaplanMeierResult,
    kaplan_meier,
    logrank_test,
    resolution_time_table,
)

__all__ = [
    # time to resolution
    "KaplanMeierResult",
    "kaplan_meier",
    "logrank_test",
    "resolution_time_table",
    "cumulative_incidence",
    "aalen_johansen_arrays",
    "cause_specific_cox",
    "cox_model",
    "schoenfeld_ph_test",
    # recurrence
    "FirstRecurrenceResult",
    "first_recurrence_table",
    "time_to_first_recurrence",
    "andersen_gill",
    "gap_time_model",
    "recurrence_logistic",
    "PredictionResult",
    "recurrence_prediction",
    "delong_auc",
    # rates
    "incidence_rates",
    "age_standardised_rates",
    "rate_regression",
    "poisson_exact_interval",
    "fay_feuer_interval",
    "parse_age_band",
    "standard_population",
    "STANDARD_POPULATIONS",
]

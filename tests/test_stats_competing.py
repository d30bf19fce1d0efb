"""Aalen-Johansen cumulative incidence and cause-specific Cox models (cohort.stats._competing)."""

from __future__ import annotations

import warnings

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from lifelines import AalenJohansenFitter, KaplanMeierFitter

from cohort import InputError
from cohort.stats import (
    aalen_johansen_arrays,
    cause_specific_cox,
    cox_model,
    cumulative_incidence,
    kaplan_meier,
)


def test_aalen_johansen_small_example_by_hand():
    """Five subjects: cause A at 1, B at 2, censored at 3, A at 4, A at 5.

    t=1: n=5, one A: F_A = 1 x 1/5 = 0.2, S = 4/5.
    t=2: n=4, one B: F_B = 0.8 x 1/4 = 0.2, S = 0.6.
    t=4: n=2 (3 was censored), one A: F_A = 0.2 + 0.6 x 1/2 = 0.5, S = 0.3.
    t=5: n=1, one A: F_A = 0.5 + 0.3 x 1 = 0.8, S = 0. F_A + F_B + S = 1 at the end.
    """
    d = pl.DataFrame({"t": [1.0, 2, 3, 4, 5], "why": ["A", "B", "censored", "A", "A"]})
    cif = cumulative_incidence(d, duration_col="t", event_col="why", censor_value="censored")
    a = dict(cif.filter(cause="A").select("time", "estimate").iter_rows())
    b = dict(cif.filter(cause="B").select("time", "estimate").iter_rows())
    assert a == pytest.approx({0.0: 0.0, 1.0: 0.2, 2.0: 0.2, 4.0: 0.5, 5.0: 0.8})
    assert b == pytest.approx({0.0: 0.0, 1.0: 0.0, 2.0: 0.2, 4.0: 0.2, 5.0: 0.2})
    assert cif.filter(cause="A", time=4.0)["at_risk"][0] == 2


def test_aalen_johansen_tied_causes_by_hand():
    """Six subjects with a tie of two causes at t=2.

    t=1: n=6, one A: F_A = 1/6, S = 5/6.
    t=2: n=5, one A and one B: F_A += (5/6)(1/5) -> 1/3; F_B = (5/6)(1/5) = 1/6;
         S = (5/6)(3/5) = 1/2.
    t=3 censored; t=4: n=2, one B: F_B += (1/2)(1/2) -> 5/12; S = 1/4. t=6 censored.
    End: 1/3 + 5/12 + 1/4 = 1.
    """
    t = np.array([1.0, 2, 2, 3, 4, 6])
    why = np.array(["A", "A", "B", "c", "B", "c"], dtype=object)
    a = aalen_johansen_arrays(t, why, "A", censor_value="c")
    b = aalen_johansen_arrays(t, why, "B", censor_value="c")
    assert a["estimate"][-1] == pytest.approx(1 / 3)
    assert b["estimate"][-1] == pytest.approx(5 / 12)
    assert a["survival"][-1] == pytest.approx(1 / 4)
    assert a["estimate"][-1] + b["estimate"][-1] + a["survival"][-1] == pytest.approx(1.0)


def test_no_competing_event_equals_one_minus_kaplan_meier():
    rng = np.random.default_rng(5)
    t = np.round(rng.exponential(20, 400), 0)  # rounded: many ties
    event = rng.random(400) < 0.7
    d = pl.DataFrame({"t": t, "why": np.where(event, "resolved", "data_end"),
                      "e": event.astype(int)})
    cif = cumulative_incidence(d, duration_col="t", event_col="why")
    km = kaplan_meier(d, duration_col="t", event_col="e").curve
    joined = cif.join(km.select("time", pl.col("estimate").alias("km")), on="time", how="inner")
    assert joined.height == cif.height
    np.testing.assert_allclose(joined["estimate"], 1 - joined["km"], atol=1e-12)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.tuples(st.floats(0.1, 100), st.sampled_from(["a", "b", "c"])),
                min_size=5, max_size=40, unique_by=lambda x: round(x[0], 6)))
def test_estimate_and_variance_equal_lifelines_on_untied_data(rows):
    """Reference library: lifelines' AalenJohansenFitter (same Collett formulas; it only
    jitters tied times, so compare on data without ties)."""
    t = np.array([round(r[0], 6) for r in rows])
    why = np.array([r[1] for r in rows], dtype=object)
    if not (why == "a").any():
        return
    ours = aalen_johansen_arrays(t, why, "a", censor_value="c")
    ajf = AalenJohansenFitter(calculate_variance=True)
    code = np.select([why == "a", why == "b"], [1, 2], 0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ajf.fit(t, code, event_of_interest=1)
    ref = ajf.cumulative_density_.iloc[:, 0]
    ref_var = ajf.variance_
    for time, est, var in zip(ours["time"], ours["estimate"], ours["variance"], strict=True):
        assert ref.loc[time] == pytest.approx(est, abs=1e-12)
        ref_v = float(np.asarray(ref_var.loc[time]).ravel()[0])
        if np.isfinite(ref_v):
            assert ref_v == pytest.approx(var, rel=1e-8, abs=1e-12)


def test_interval_contains_estimate_and_stays_in_unit_interval():
    rng = np.random.default_rng(2)
    d = pl.DataFrame({"hours_to_event": rng.exponential(10, 300),
                      "event_type": rng.choice(["resolved", "died", "discharged_unresolved",
                                         "data_end"], 300, p=[0.6, 0.1, 0.1, 0.2])})
    cif = cumulative_incidence(d)  # default column names of the resolution table
    assert set(cif["cause"]) == {"died", "discharged_unresolved", "resolved"}
    tol = 1e-12
    assert ((cif["lower"] <= cif["estimate"] + tol) & (cif["estimate"] <= cif["upper"] + tol)).all()
    assert cif["lower"].min() >= 0 and cif["upper"].max() <= 1
    last = cif.group_by("cause").agg(pl.col("estimate").last()).sort("cause")["estimate"].sum()
    kmf = KaplanMeierFitter().fit(d["hours_to_event"].to_numpy(),
                                  (d["event_type"] != "data_end").to_numpy())
    # Sum of cause-specific incidences = 1 - overall event-free survival.
    assert last == pytest.approx(1 - float(kmf.survival_function_.iloc[-1, 0]), abs=1e-12)


def test_groups_are_estimated_separately():
    d = pl.DataFrame({"t": [1.0, 2, 3, 1, 2, 3], "why": ["r", "r", "c", "r", "d", "d"],
                      "site": ["x", "x", "x", "y", "y", "y"]})
    cif = cumulative_incidence(d, duration_col="t", event_col="why", censor_value="c",
                               group_cols="site")
    assert cif.filter(site="x", cause="r")["estimate"].max() == pytest.approx(2 / 3)
    assert cif.filter(site="y", cause="r")["estimate"].max() == pytest.approx(1 / 3)


def test_cause_specific_cox_equals_cox_with_other_causes_censored():
    rng = np.random.default_rng(9)
    n = 400
    x = rng.integers(0, 2, n)
    t = rng.exponential(10 / np.exp(0.5 * x))
    why = rng.choice(["resolved", "died", "data_end"], n, p=[0.7, 0.15, 0.15])
    d = pl.DataFrame({"t": t, "x": x, "why": why})
    cs = cause_specific_cox(d, covariates=["x"], duration_col="t", event_col="why",
                            cluster_col=None)
    direct = cox_model(d.with_columns(e=(pl.col("why") == "resolved").cast(pl.Int8)),
                       covariates=["x"], duration_col="t", event_col="e", cluster_col=None)
    assert cs.filter(cause="resolved")["coef"][0] == pytest.approx(direct["coef"][0], rel=1e-9)
    assert set(cs["cause"]) == {"resolved", "died"}


def test_all_censored_is_a_clear_error():
    d = pl.DataFrame({"t": [1.0, 2.0], "why": ["data_end", "data_end"]})
    with pytest.raises(InputError, match="no event"):
        cumulative_incidence(d, duration_col="t", event_col="why")

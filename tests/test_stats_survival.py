"""Kaplan-Meier, medians, numbers at risk and log-rank tests (cohort.stats._survival)."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from lifelines.datasets import load_leukemia

from cohort import InputError
from cohort.stats import kaplan_meier, logrank_test, resolution_time_table

DATA = Path(__file__).parent / "data" / "stats"


@pytest.fixture(scope="module")
def remission() -> pl.DataFrame:
    return pl.read_csv(DATA / "gehan_6mp_remission.csv")


def test_remission_data_matches_the_copy_lifelines_ships(remission):
    """Our typed Gehan (1965) table equals lifelines' Kleinbaum-Klein copy (Rx 0 = 6-MP)."""
    shipped = pl.from_pandas(load_leukemia()).select(
        pl.when(pl.col("Rx") == 0).then(pl.lit("6-MP")).otherwise(pl.lit("placebo")).alias("group"),
        pl.col("t").alias("weeks"),
        pl.col("status").alias("relapsed"),
    )
    key = ["group", "weeks", "relapsed"]
    assert remission.sort(key).equals(shipped.sort(key))
    assert remission.height == 42


# Kleinbaum DG, Klein M. Survival Analysis: A Self-Learning Text, 3rd ed. 2012, chapter 2, the
# Kaplan-Meier tables for the remission data: S(t) printed at each failure time [from memory;
# each value is the product limit, e.g. 6-MP at t = 7: (18/21) x (16/17) = 0.8067].
KLEINBAUM_6MP = {6: 0.8571, 7: 0.8067, 10: 0.7529, 13: 0.6902, 16: 0.6275, 22: 0.5378, 23: 0.4482}
KLEINBAUM_PLACEBO = {1: 0.90, 2: 0.81, 3: 0.76, 4: 0.67, 5: 0.57, 8: 0.38, 11: 0.29, 12: 0.19,
                     15: 0.14, 17: 0.10, 22: 0.05, 23: 0.00}


def test_kaplan_meier_on_gehan_remission_data_matches_kleinbaum_klein(remission):
    km = kaplan_meier(remission, duration_col="weeks", event_col="relapsed", group_cols="group")
    curve = km.curve.filter(pl.col("events") > 0)
    got_6mp = dict(curve.filter(group="6-MP").select("time", "estimate").iter_rows())
    got_placebo = dict(curve.filter(group="placebo").select("time", "estimate").iter_rows())
    assert set(got_6mp) == set(KLEINBAUM_6MP)
    for t, s in KLEINBAUM_6MP.items():
        assert got_6mp[t] == pytest.approx(s, abs=5e-4)  # printed to four decimals
    assert set(got_placebo) == set(KLEINBAUM_PLACEBO)
    for t, s in KLEINBAUM_PLACEBO.items():
        assert got_placebo[t] == pytest.approx(s, abs=5e-3)  # printed to two decimals
    # Three decimals, as the brief asks, for the 6-MP arm where four are printed.
    assert round(got_6mp[23], 3) == 0.448


def test_kaplan_meier_medians_and_logrank_on_remission_data(remission):
    """Kleinbaum and Klein ch. 2: medians 23 (6-MP) and 8 weeks (placebo); log-rank chi-square
    16.79 on 1 df [from memory]."""
    km = kaplan_meier(remission, duration_col="weeks", event_col="relapsed", group_cols="group")
    medians = dict(km.medians.select("group", "estimate").iter_rows())
    assert medians == {"6-MP": 23.0, "placebo": 8.0}
    assert km.medians.filter(group="6-MP")["events"][0] == 9
    test = logrank_test(remission, group_col="group", duration_col="weeks", event_col="relapsed")
    assert test["statistic"][0] == pytest.approx(16.79, abs=0.005)
    assert test["df"][0] == 1
    assert test["p"][0] < 0.001


def test_numbers_at_risk_follow_by_hand(remission):
    # 6-MP arm at 10 weeks: times >= 10 are 10, 10+, 11+, 13, 16, 17+, 19+, 20+, 22, 23, 25+,
    # 32+, 32+, 34+, 35+ = 15 at risk; before 10: 4 relapses (6, 6, 6, 7), 2 censored (6+, 9+).
    km = kaplan_meier(remission, duration_col="weeks", event_col="relapsed", group_cols="group",
                      at_risk_times=[0, 10])
    row = km.at_risk.filter(group="6-MP", time=10.0).row(0, named=True)
    assert (row["at_risk"], row["events_so_far"], row["censored_so_far"]) == (15, 4, 2)
    assert km.at_risk.filter(group="6-MP", time=0.0)["at_risk"][0] == 21


def test_confidence_band_is_exponential_greenwood():
    """Exponential Greenwood (log(-log)) band by hand: 4 subjects, events at 1, 3, 4, censored 2.

    S(1) = 3/4; Greenwood sum = 1/(4*3); se of log(-log S) = sqrt(1/12) / |log(3/4)|.
    """
    d = pl.DataFrame({"t": [1.0, 2, 3, 4], "e": [1, 0, 1, 1]})
    km = kaplan_meier(d, duration_col="t", event_col="e")
    row = km.curve.filter(time=1.0).row(0, named=True)
    s = 0.75
    se = np.sqrt(1 / 12) / abs(np.log(s))
    z = 1.959963984540054
    lower = s ** np.exp(z * se)
    upper = s ** np.exp(-z * se)
    assert row["lower"] == pytest.approx(lower, rel=1e-9)
    assert row["upper"] == pytest.approx(upper, rel=1e-9)


def test_kaplan_meier_ignores_row_order(remission):
    shuffled = remission.sample(fraction=1.0, shuffle=True, seed=11)
    a = kaplan_meier(remission, duration_col="weeks", event_col="relapsed", group_cols="group")
    b = kaplan_meier(shuffled, duration_col="weeks", event_col="relapsed", group_cols="group")
    assert a.curve.equals(b.curve)
    assert a.medians.equals(b.medians)


def test_text_event_column_with_event_value_and_null_rows_counted():
    d = pl.DataFrame({"t": [1.0, 2, 3, 4, None], "why": ["resolved", "died", "resolved",
                                                        "data_end", "resolved"]})
    km = kaplan_meier(d, duration_col="t", event_col="why", event_value="resolved")
    assert km.medians["events"][0] == 2
    assert km.medians["n"][0] == 4
    assert km.medians["left_out"][0] == "left out: 1 row(s) null in `t`"


def test_median_not_reached_is_null_with_a_note():
    d = pl.DataFrame({"t": [1.0, 2, 3, 4], "e": [1, 0, 0, 0]})
    med = kaplan_meier(d, duration_col="t", event_col="e").medians.row(0, named=True)
    assert med["estimate"] is None
    assert "not reached" in med["note"]


def test_resolution_time_table_by_hand():
    t0 = dt.datetime(2031, 3, 1, 8, 0)
    eps = pl.DataFrame(
        {
            "onset_datetime": [t0] * 4,
            "end_datetime": [t0 + dt.timedelta(hours=h) for h in (40, 30, 10, 72)],
            "hours_to_resolution": [14.5, None, None, None],
            "end_reason": ["resolved", "died", "discharged_unresolved", "data_end"],
        }
    )
    out = resolution_time_table(eps)
    assert out["hours_to_event"].to_list() == [14.5, 30.0, 10.0, 72.0]
    assert out["is_resolved"].to_list() == [True, False, False, False]
    assert out["event_type"].to_list() == eps["end_reason"].to_list()


def test_resolution_time_table_rejects_unknown_end_reason():
    eps = pl.DataFrame({"onset_datetime": [dt.datetime(2031, 1, 1)],
                        "end_datetime": [dt.datetime(2031, 1, 2)],
                        "hours_to_resolution": [None], "end_reason": ["transferred"]},
                       schema_overrides={"hours_to_resolution": pl.Float64})
    with pytest.raises(InputError, match="end_reason"):
        resolution_time_table(eps)


def test_bad_input_messages():
    d = pl.DataFrame({"t": [1.0, -2.0], "e": [1, 1], "g": ["a", "b"]})
    with pytest.raises(InputError, match="negative time in `t`"):
        kaplan_meier(d, duration_col="t", event_col="e")
    with pytest.raises(InputError, match="no column"):
        kaplan_meier(d, duration_col="hours", event_col="e")
    with pytest.raises(InputError, match="0/1"):
        kaplan_meier(d.with_columns(e=pl.lit(2)), duration_col="t", event_col="e")
    with pytest.raises(InputError, match="two or more levels"):
        logrank_test(d.with_columns(g=pl.lit("a"), t=pl.lit(1.0)), group_col="g",
                     duration_col="t", event_col="e")

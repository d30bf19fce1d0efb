"""Recurrence flags, time at risk and counting-process rows: polars against a plain-Python reference.

The reference below restates the rule in DESIGN.md ("recurs_within_30d, 90d, 365d: null when
follow-up ends, by death or end of observation, before the window does") and issue 4 (recurrence
within a definition; time at risk from an episode's end) loop by loop, with no polars; hypothesis
draws small random cohorts (several persons, two definitions, deaths, several observation
periods) and both must agree on every episode (scikit-learn / polars habit: a small independent
reference, see /work/shared/STYLE.md).
"""

from __future__ import annotations

import datetime as dt
from fractions import Fraction

import polars as pl
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from cohort.features._recurrence import counting_process, recurrence_features

BASE = dt.datetime(2020, 1, 1)
WINDOWS = (30, 90, 365)


@st.composite
def cohorts(draw):
    persons = draw(st.integers(min_value=1, max_value=4))
    episodes, periods, deaths = [], [], []
    for person in range(1, persons + 1):
        # observation: one or two periods
        start = draw(st.integers(min_value=0, max_value=100))
        length = draw(st.integers(min_value=30, max_value=1500))
        periods.append((person, start, start + length))
        if draw(st.booleans()):
            gap = draw(st.integers(min_value=1, max_value=200))
            periods.append((person, start + length + gap, start + length + gap + draw(st.integers(0, 800))))
        for definition in ("a", "b"):
            # times are exact fractions of a day on a whole-hour grid: a float sum such as
            # 64.583 + 135 + 11/24 = 199.99999999999997 would put an onset at midnight for the
            # product (datetimes hold microseconds) and on the day before for the reference
            clock = Fraction(start + draw(st.integers(min_value=0, max_value=60)))
            for number in range(draw(st.integers(min_value=0, max_value=4))):
                onset = clock
                end = onset + Fraction(draw(st.integers(min_value=1, max_value=96)), 24)
                episodes.append((definition, f"{definition}:{person}:{number}", person, onset, end))
                clock = end + draw(st.integers(min_value=1, max_value=500)) + Fraction(draw(st.integers(0, 23)), 24)
        if draw(st.booleans()):
            last_end = max((row[4] for row in episodes if row[2] == person), default=Fraction(start))
            day = int(last_end) + draw(st.integers(min_value=0, max_value=400))
            with_time = draw(st.booleans())
            deaths.append((person, day, with_time))
    return episodes, periods, deaths


def as_time(days: Fraction | float) -> dt.datetime:
    return BASE + dt.timedelta(days=float(days))


def reference(episodes, periods, deaths):
    """Plain-Python restatement of the recurrence rules; returns {episode_id: values}.

    Exact arithmetic on the drawn fractions of a day: every value is a Fraction (or None)."""
    out = {}
    for definition, eid, person, onset, end in episodes:
        later = sorted(row[3] for row in episodes if row[0] == definition and row[2] == person and row[3] > onset)
        nxt = later[0] if later else None
        onset_day = int(onset)  # the calendar day (BASE is midnight)
        holding = [p for p in periods if p[0] == person and p[1] <= onset_day <= p[2]]
        own = [p for p in periods if p[0] == person]
        obs_end = max(p[2] for p in holding) if holding else (max(p[2] for p in own) if own else None)
        ends = []
        if obs_end is not None:
            ends.append(Fraction(obs_end + 1))  # end date included: follow-up to midnight after it
        for dperson, day, with_time in deaths:
            if dperson == person:
                ends.append(day + Fraction(1, 2) if with_time else Fraction(day + 1))
        follow_end = min(ends) if ends else None
        follow = None if follow_end is None else max(follow_end - end, Fraction(0))
        to_next = None if nxt is None else nxt - end
        at_risk = to_next if nxt is not None else follow
        flags = {}
        for window in WINDOWS:
            if to_next is not None:
                flags[window] = to_next <= window
            elif follow is not None and follow >= window:
                flags[window] = False
            else:
                flags[window] = None
        out[eid] = (to_next, follow, at_risk, flags)
    return out


def frames(episodes, periods, deaths):
    ep = pl.DataFrame(
        {
            "definition": [row[0] for row in episodes],
            "episode_id": [row[1] for row in episodes],
            "person_id": [row[2] for row in episodes],
            "onset_datetime": [as_time(row[3]) for row in episodes],
            "end_datetime": [as_time(row[4]) for row in episodes],
        },
        schema={"definition": pl.String, "episode_id": pl.String, "person_id": pl.Int64,
                "onset_datetime": pl.Datetime("us"), "end_datetime": pl.Datetime("us")},
    )
    op = pl.DataFrame(
        {
            "person_id": [p[0] for p in periods],
            "observation_period_start_date": [as_time(p[1]).date() for p in periods],
            "observation_period_end_date": [as_time(p[2]).date() for p in periods],
        },
        schema={"person_id": pl.Int64, "observation_period_start_date": pl.Date,
                "observation_period_end_date": pl.Date},
    )
    de = pl.DataFrame(
        {
            "person_id": [x[0] for x in deaths],
            "death_date": [as_time(x[1]).date() for x in deaths],
            "death_datetime": [as_time(x[1] + 0.5) if x[2] else None for x in deaths],
        },
        schema={"person_id": pl.Int64, "death_date": pl.Date, "death_datetime": pl.Datetime("us")},
    )
    return ep, op, de


@settings(max_examples=150, deadline=None)
@given(cohorts())
# found by hypothesis on 2026-12-04 when the times were floats: the second onset summed to
# 199.99999999999997 days, midnight of day 200 for the product, day 199 for the reference
@example(([("a", "a:1:0", 1, Fraction(61), Fraction(61) + Fraction(85, 24)),
           ("a", "a:1:1", 1, Fraction(200), Fraction(200) + Fraction(1, 24))],
          [(1, 19, 199), (1, 200, 200)], []))
def test_recurrence_matches_reference(cohort):
    episodes, periods, deaths = cohort
    ep, op, de = frames(episodes, periods, deaths)
    got = recurrence_features(ep, de, op)
    want = reference(episodes, periods, deaths)
    assert got.height == len(episodes)
    for record in got.iter_rows(named=True):
        to_next, follow, at_risk, flags = want[record["episode_id"]]
        for name, value in (("days_to_next_episode", to_next), ("days_of_follow_up", follow),
                            ("days_at_risk", at_risk)):
            if value is None:
                assert record[name] is None, (name, record)
            else:
                assert record[name] == pytest.approx(float(value), abs=1e-6), (name, record)
        for window in WINDOWS:
            assert record[f"recurs_within_{window}d"] == flags[window], (window, record)


@settings(max_examples=60, deadline=None)
@given(cohorts())
def test_counting_process_intervals_match_reference(cohort):
    episodes, periods, deaths = cohort
    ep, op, de = frames(episodes, periods, deaths)
    recurrence = recurrence_features(ep, de, op)
    features = ep.join(recurrence, on=["definition", "episode_id"]).with_columns(
        *[pl.lit(None).alias(name) for name in ("age_at_onset", "sex", "diabetes_type", "hba1c_mmol_mol",
                                                 "is_sglt2i_at_onset", "care_site_id", "severity")]
    )
    rows = counting_process(features)
    want = reference(episodes, periods, deaths)
    # one row per episode with positive time at risk; gap time = time at risk; events = episodes
    # with a later one of the same definition
    expected_ids = {eid for eid, values in want.items() if values[2] is not None and values[2] > 0}
    assert set(rows["episode_id"].to_list()) == expected_ids
    for record in rows.iter_rows(named=True):
        to_next, _follow, at_risk, _flags = want[record["episode_id"]]
        assert record["gap_stop_days"] == pytest.approx(float(at_risk), abs=1e-6)
        assert record["stop_days"] - record["start_days"] == pytest.approx(float(at_risk), abs=1e-6)
        assert record["event"] == (1 if to_next is not None else 0)
        first_end = min(row[4] for row in episodes if row[0] == record["definition"] and row[2] == record["person_id"])
        this_end = next(row[4] for row in episodes if row[1] == record["episode_id"])
        assert record["start_days"] == pytest.approx(float(this_end - first_end), abs=1e-6)

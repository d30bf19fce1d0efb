"""labs_in_windows (as-of join with an exact fallback for overlapping windows) against the plain
definition: every (window, result) pair with start <= time <= end, from a join on person and a
range filter written in plain Python. Hypothesis draws windows that overlap, nest and touch, in
two definitions (STYLE.md habit 9: a fast path checked against a small reference).
"""

from __future__ import annotations

import datetime as dt

import polars as pl
from hypothesis import given, settings
from hypothesis import strategies as st

from cohort.features._windows import labs_in_windows

BASE = dt.datetime(2024, 1, 1)


def hours(value: int) -> dt.datetime:
    return BASE + dt.timedelta(hours=value)


@st.composite
def cases(draw):
    windows = []
    for index in range(draw(st.integers(0, 8))):
        start = draw(st.integers(0, 60))
        windows.append((draw(st.sampled_from(["a", "b"])), f"e{index}", draw(st.integers(1, 3)),
                        start, start + draw(st.integers(0, 20))))
    labs = [(draw(st.integers(1, 3)), draw(st.integers(0, 85)), draw(st.sampled_from(["glucose", "bhb"])),
             float(draw(st.integers(1, 30)))) for _ in range(draw(st.integers(0, 30)))]
    return windows, labs


@settings(max_examples=200, deadline=None)
@given(cases())
def test_labs_in_windows_equals_plain_join(case):
    windows, labs = case
    frame = pl.DataFrame(
        {"definition": [w[0] for w in windows], "episode_id": [w[1] for w in windows],
         "person_id": [w[2] for w in windows], "window_start": [hours(w[3]) for w in windows],
         "window_end": [hours(w[4]) for w in windows]},
        schema={"definition": pl.String, "episode_id": pl.String, "person_id": pl.Int64,
                "window_start": pl.Datetime("us"), "window_end": pl.Datetime("us")},
    )
    lab_frame = pl.DataFrame(
        {"person_id": [x[0] for x in labs], "event_datetime": [hours(x[1]) for x in labs],
         "analyte": [x[2] for x in labs], "value": [x[3] for x in labs]},
        schema={"person_id": pl.Int64, "event_datetime": pl.Datetime("us"), "analyte": pl.String,
                "value": pl.Float64},
    )
    placed = labs_in_windows(frame, lab_frame, ["glucose"])
    # within each window the rows come in (event_datetime, value) order
    for _, part in placed.group_by(["definition", "episode_id"], maintain_order=True):
        pairs = part.select("event_datetime", "value").rows()
        assert pairs == sorted(pairs)
    got = sorted(placed.select("definition", "episode_id", "event_datetime", "value").rows())
    want = sorted(
        (w[0], w[1], hours(x[1]), x[3])
        for w in windows for x in labs
        if x[0] == w[2] and x[2] == "glucose" and w[3] <= x[1] <= w[4]
    )
    assert got == want

"""The at-risk time rebuilt from the truth tables is the generator's own, window for window.

The planted-effects tests (``tests/test_stats_planted_effects.py``) fit the Andersen-Gill model
to at-risk time that ``_truth_counting_process`` rebuilds from ``truth/persons.parquet`` and
``truth/episodes.parquet``. The reference here is the generator itself: ``make_episodes``
(``synthetic/_people.py``) keeps the windows it drew each waiting time in (``at_risk``), and
every one of them, and nothing else, must come back from the truth tables with the same
start, stop, event and prior-episode count.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

import synthetic
import synthetic._chunk as chunk_module
from synthetic._people import MIN_D
from tests.test_stats_planted_effects import _truth_counting_process

PERSONS = 6_000  # about 600 true DKA episodes
CHUNK = 2_500  # three chunks, so person ids are offset as in a large extract


def _generated_windows(monkeypatch: pytest.MonkeyPatch, out: Path) -> pl.DataFrame:
    """Generate an extract and collect the generator's at-risk windows (days since 2019-01-01)."""
    seen: list[pl.DataFrame] = []
    offset = [0]
    original = chunk_module.make_episodes

    def recording(rng: np.random.Generator, pe: dict) -> dict:
        ep = original(rng, pe)
        if ep:
            w = ep["at_risk"]
            seen.append(pl.DataFrame({
                "person_id": offset[0] + 1 + w["person"].astype(np.int64),
                "k": w["prior"].astype(np.int64), "start": w["start"] / MIN_D,
                "stop": w["stop"] / MIN_D, "event": w["event"].astype(np.int32),
            }))
        offset[0] += pe["group"].size
        return ep

    monkeypatch.setattr(chunk_module, "make_episodes", recording)
    synthetic.generate_extract(persons=PERSONS, seed=3, out=out, chunk_persons=CHUNK, progress=False)
    assert offset[0] == PERSONS
    return pl.concat(seen)


def test_truth_counting_process_is_the_generators_at_risk_time(monkeypatch, tmp_path) -> None:
    out = tmp_path / "synth"
    generated = _generated_windows(monkeypatch, out).filter(pl.col("stop") > pl.col("start"))
    epoch = pl.date(2019, 1, 1)
    origin = (pl.col("observation_start_date") - epoch).dt.total_days()
    rebuilt = _truth_counting_process(out).select(
        "person_id", "k", start=origin + pl.col("start_days"), stop=origin + pl.col("stop_days"),
        event=pl.col("event").cast(pl.Int32))
    joined = generated.join(rebuilt, on=["person_id", "k"], how="full", suffix="_truth")
    assert joined.filter(pl.col("person_id").is_null() | pl.col("person_id_truth").is_null()).height == 0
    assert joined.height == generated.height == rebuilt.height
    assert generated["event"].sum() > 400  # the extract has episodes to compare
    assert (joined["event"] == joined["event_truth"]).all()
    assert (joined["k"].max() or 0) >= 3  # recurrences past the cap are in the comparison
    tolerance = 1e-3 / 1440  # a thousandth of a minute, in days
    assert float((joined["start"] - joined["start_truth"]).abs().max()) < tolerance
    assert float((joined["stop"] - joined["stop_truth"]).abs().max()) < tolerance

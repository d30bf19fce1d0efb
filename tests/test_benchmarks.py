"""The benchmarks' own pieces: the pandas peer finds the product's episodes; the exponent fit.

The peer is a speed comparison only if it does the same job: on a small synthetic extract it must
find the same consensus-2024 episodes (onset and resolution to the second). Reference for the
logic: Umpierrez et al., Diabetes Care 2024 (the criteria, as CLINICAL.md lists them).
"""

from __future__ import annotations

import sys
from pathlib import Path

import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))


def test_pandas_peer_finds_the_same_episodes(tmp_path: Path) -> None:
    from bench_pandas_peer import agreement, pandas_episodes

    from cohort.episodes import find_episodes
    from synthetic import generate_extract

    summary = generate_extract(persons=2_000, seed=11, out=tmp_path / "s", progress=False)
    product = find_episodes(summary.extract_dir, ["consensus-2024"]).episodes.to_pandas()
    peer = pandas_episodes(summary.extract_dir)
    result = agreement(product, peer, tolerance=pd.Timedelta(minutes=1))
    assert result["product"] > 50
    assert result["product_found"] == 1.0 and result["peer_found"] == 1.0
    assert result["same_onset"] == 1.0 and result["same_resolution"] == 1.0


def test_exponent_fit_recovers_a_power_law() -> None:
    from _measure import fit_power

    # seconds = 2 * rows ** 1.0 exactly: the least-squares fit on log-log returns k = 1, a = 2
    k, a = fit_power([1_000, 10_000, 100_000], [2_000.0, 20_000.0, 200_000.0])
    assert k == pytest.approx(1.0) and a == pytest.approx(2.0)

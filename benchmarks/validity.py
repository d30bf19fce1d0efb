"""Validity of the lab-based definitions (and the code-based finder) against the synthetic truth.

For each definition: sensitivity and positive predictive value of episode detection, and the
median absolute error of onset and resolution times, against ``OUT/truth/episodes.parquet``
written by ``synthetic.generate_extract`` beside the extract.

Matching rule (stated, fixed): a found episode and a true DKA episode match when they belong to
the same person and their onsets differ by at most ``--tolerance-hours`` (default 6 h, the
diagnosis look-back: a finder cannot place an onset before the results that show it).
Sensitivity = true DKA episodes matched / true DKA episodes in the definition's population (age
at onset by the truth's ``age_years``); PPV = found episodes matched to any true DKA episode /
found episodes. The code-based finder's episodes (one per coded visit) are scored the same way
with onset = visit start; it has no resolution time. The found episodes that match none are then
named by the true stay holding their onset (a mimic's kind, ``dka`` when too far from a true
onset, or ``none``): :func:`unmatched_kinds`.

Usage::

    python benchmarks/validity.py --persons 5000 --seed 20261201
    python benchmarks/validity.py --root DIR        # DIR/extract and DIR/truth already written

The test ``tests/test_episodes_validity.py`` holds documented floors on a 5,000-person extract.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from collections.abc import Mapping, Sequence
from pathlib import Path

import polars as pl

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from cohort.definitions import load_definition  # noqa: E402
from cohort.episodes import CODE_FINDER, find_episodes  # noqa: E402

DEFINITIONS = ("consensus-2024", "ada-2009", "jbds-2023", "ispad-2022")
TOLERANCE_HOURS = 6.0


def _hours(expr: pl.Expr) -> pl.Expr:
    return expr.dt.total_seconds() / 3600.0


def _best_matches(found: pl.DataFrame, dka: pl.DataFrame, tolerance_hours: float) -> pl.DataFrame:
    """Each found episode's closest true DKA episode of the same person within the tolerance
    (episode_id, truth_id, onset_error, resolution_error in hours); unmatched ones are absent.
    A finder without resolution times (the code finder) gets null resolution errors."""
    if "resolution_datetime" not in found.columns:
        found = found.with_columns(pl.lit(None, dtype=pl.Datetime("us")).alias("resolution_datetime"))
    pairs = (
        found.select("episode_id", "person_id", "onset_datetime", "resolution_datetime")
        .join(dka.select("truth_id", "person_id", "onset_datetime", "resolution_datetime"),
              on="person_id", suffix="_true")
        .with_columns(
            _hours(pl.col("onset_datetime") - pl.col("onset_datetime_true")).alias("onset_error"),
            _hours(pl.col("resolution_datetime") - pl.col("resolution_datetime_true")).alias("resolution_error"),
        )
        .filter(pl.col("onset_error").abs() <= tolerance_hours)
    )
    # one true episode per found one: the closest onset
    return pairs.sort(pl.col("onset_error").abs(), "truth_id").unique("episode_id", keep="first")


def unmatched_kinds(found: pl.DataFrame, truth: pl.DataFrame, *,
                    tolerance_hours: float = TOLERANCE_HOURS) -> pl.DataFrame:
    """What the found episodes that match no true DKA episode (the PPV's misses) were.

    Each is given the kind of the true episode (any kind: a mimic such as
    ``alcoholic_ketoacidosis``, or ``dka`` when the onset lies in a true DKA stay but further than
    the tolerance from its onset) whose stay, arrival to discharge, holds the found onset; the
    earliest such stay when there are several; ``none`` when no true stay holds it.

    Parameters
    ----------
    found
        Episodes (person_id, episode_id, onset_datetime, and resolution_datetime if known).
    truth
        The truth's episodes (truth_id, person_id, kind, onset_datetime, resolution_datetime,
        arrival_datetime, discharge_datetime).
    tolerance_hours
        Largest onset difference of a match, as in :func:`score`.

    Returns
    -------
    polars.DataFrame
        kind, episodes: one row per kind, most first; the counts sum to the found episodes that
        :func:`score` leaves unmatched (``found - matched_found``).

    Examples
    --------
    >>> import datetime as dt
    >>> t = dt.datetime(2024, 1, 1)
    >>> truth = pl.DataFrame({"truth_id": [1], "person_id": [7], "kind": ["lactic_acidosis"],
    ...     "onset_datetime": [t], "resolution_datetime": [None], "arrival_datetime": [t],
    ...     "discharge_datetime": [t + dt.timedelta(days=2)]},
    ...     schema_overrides={"resolution_datetime": pl.Datetime("us")})
    >>> found = pl.DataFrame({"episode_id": ["a"], "person_id": [7],
    ...     "onset_datetime": [t + dt.timedelta(hours=3)]})
    >>> unmatched_kinds(found, truth).rows()
    [('lactic_acidosis', 1)]
    """
    dka = truth.filter(pl.col("kind") == "dka")
    matched = _best_matches(found, dka, tolerance_hours).get_column("episode_id")
    misses = found.filter(~pl.col("episode_id").is_in(matched.implode())).select(
        "episode_id", "person_id", "onset_datetime")
    stays = truth.select("person_id", "kind", "arrival_datetime", "discharge_datetime")
    held = (
        misses.join(stays, on="person_id", how="inner")
        .filter((pl.col("arrival_datetime") <= pl.col("onset_datetime"))
                & (pl.col("onset_datetime") <= pl.col("discharge_datetime")))
        .sort("arrival_datetime")
        .unique("episode_id", keep="first")
        .select("episode_id", "kind")
    )
    kinds = misses.join(held, on="episode_id", how="left").with_columns(pl.col("kind").fill_null("none"))
    return (kinds.group_by("kind").agg(pl.len().cast(pl.Int64).alias("episodes"))
            .sort(["episodes", "kind"], descending=[True, False]))


def score(found: pl.DataFrame, truth: pl.DataFrame, *, min_age: float | None, max_age: float | None,
          tolerance_hours: float = TOLERANCE_HOURS) -> dict[str, float | int | None]:
    """Score one finder's episodes against the true DKA episodes.

    Parameters
    ----------
    found
        Episodes (person_id, episode_id, onset_datetime, resolution_datetime).
    truth
        The truth's episodes (person_id, truth_id, kind, onset_datetime, resolution_datetime,
        age_years).
    min_age, max_age
        The definition's population (``min <= age < max``), for the sensitivity's denominator.
    tolerance_hours
        Largest onset difference of a match.

    Returns
    -------
    dict
        found, true, matched_found, matched_true, sensitivity, ppv, onset_mae_hours,
        resolution_mae_hours (medians of absolute differences over matched pairs).
    """
    dka = truth.filter(pl.col("kind") == "dka")
    eligible = dka
    if min_age is not None:
        eligible = eligible.filter(pl.col("age_years") >= min_age)
    if max_age is not None:
        eligible = eligible.filter(pl.col("age_years") < max_age)
    best = _best_matches(found, dka, tolerance_hours)
    matched_true = best.filter(pl.col("truth_id").is_in(eligible.get_column("truth_id").implode()))
    true_n = eligible.height
    found_n = found.height
    onset_mae = best.get_column("onset_error").abs().median() if best.height else None
    resolution = best.get_column("resolution_error").drop_nulls().abs()
    return {
        "found": found_n,
        "true": true_n,
        "matched_found": best.height,
        "matched_true": matched_true.get_column("truth_id").n_unique(),
        "sensitivity": matched_true.get_column("truth_id").n_unique() / true_n if true_n else None,
        "ppv": best.height / found_n if found_n else None,
        "onset_mae_hours": float(onset_mae) if onset_mae is not None else None,
        "resolution_mae_hours": float(resolution.median()) if resolution.len() else None,
    }


def validity_table(root: Path, definitions: Sequence[str] = DEFINITIONS, *,
                   tolerance_hours: float = TOLERANCE_HOURS,
                   threads: int | None = None) -> tuple[pl.DataFrame, float]:
    """Find episodes in ``root/extract`` and score them against ``root/truth``.

    Returns the table (one row per definition and the code finder) and the seconds taken by
    :func:`cohort.episodes.find_episodes`; :func:`validity_tables` also returns what the
    unmatched episodes were.
    """
    table, _, seconds = validity_tables(root, definitions, tolerance_hours=tolerance_hours, threads=threads)
    return table, seconds


def validity_tables(root: Path, definitions: Sequence[str] = DEFINITIONS, *,
                    tolerance_hours: float = TOLERANCE_HOURS,
                    threads: int | None = None) -> tuple[pl.DataFrame, pl.DataFrame, float]:
    """:func:`validity_table` and, per finder, :func:`unmatched_kinds` (definition, kind, episodes)."""
    truth = pl.read_parquet(Path(root) / "truth" / "episodes.parquet")
    started = time.perf_counter()
    result = find_episodes(Path(root) / "extract", list(definitions), threads=threads)
    seconds = time.perf_counter() - started
    rows = []
    for name in definitions:
        population = load_definition(name).population
        found = result.episodes.filter(pl.col("definition") == name)
        rows.append({"definition": name, **score(found, truth, min_age=population.min_age_years,
                                                 max_age=population.max_age_years,
                                                 tolerance_hours=tolerance_hours)})
    rows.append({"definition": CODE_FINDER, **score(result.code_episodes, truth, min_age=None, max_age=None,
                                                    tolerance_hours=tolerance_hours)})
    finders = [(name, result.episodes.filter(pl.col("definition") == name)) for name in definitions]
    finders.append((CODE_FINDER, result.code_episodes))
    unmatched = pl.concat(
        [unmatched_kinds(found, truth, tolerance_hours=tolerance_hours)
         .select(pl.lit(name).alias("definition"), "kind", "episodes") for name, found in finders],
        how="vertical")
    return pl.DataFrame(rows), unmatched, seconds


def _print_unmatched(unmatched: pl.DataFrame) -> None:
    print("\nfound episodes matching no true DKA episode, by the true stay holding their onset "
          "(none: no true stay)")
    for name in unmatched.get_column("definition").unique(maintain_order=True):
        rows = unmatched.filter(pl.col("definition") == name)
        text = ", ".join(f"{kind} {episodes}" for kind, episodes in rows.select("kind", "episodes").iter_rows())
        print(f"{name:<16}{text or '-'}")


def _print(table: pl.DataFrame, seconds: float, tolerance: float, where: Mapping[str, object]) -> None:
    print(f"validity against truth ({where}); onset match tolerance {tolerance:g} h; "
          f"find_episodes {seconds:.1f} s")
    header = f"{'definition':<16}{'found':>7}{'true':>7}{'sens':>8}{'ppv':>8}{'onset MAE h':>13}{'resol. MAE h':>14}"
    print(header)
    for row in table.iter_rows(named=True):
        def show(value, digits=3):
            return "-" if value is None else f"{value:.{digits}f}"
        print(f"{row['definition']:<16}{row['found']:>7}{row['true']:>7}{show(row['sensitivity']):>8}"
              f"{show(row['ppv']):>8}{show(row['onset_mae_hours'], 2):>13}{show(row['resolution_mae_hours'], 2):>14}")


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--root", type=Path, help="folder holding extract/ and truth/ (else one is generated)")
    parser.add_argument("--persons", type=int, default=5000)
    parser.add_argument("--seed", type=int, default=20261201)
    parser.add_argument("--tolerance-hours", type=float, default=TOLERANCE_HOURS)
    parser.add_argument("--threads", type=int, default=None)
    args = parser.parse_args(argv)
    if args.root is None:
        from synthetic import generate_extract

        root = Path(tempfile.mkdtemp(prefix="dka-validity-"))
        generate_extract(persons=args.persons, seed=args.seed, out=root, progress=False)
        where = {"persons": args.persons, "seed": args.seed}
    else:
        root = args.root
        where = {"root": str(root)}
    table, unmatched, seconds = validity_tables(root, tolerance_hours=args.tolerance_hours, threads=args.threads)
    _print(table, seconds, args.tolerance_hours, where)
    _print_unmatched(unmatched)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

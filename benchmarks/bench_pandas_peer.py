"""A peer for speed: the consensus-2024 episode logic as an analyst would write it in plain pandas.

Not a second product (it lives in benchmarks/ only, and nothing in cohort/ uses it): the same
steps the recipes take, written the vectorised pandas way, with no loop over rows:

1. read the measurement columns it needs (``pandas.read_parquet`` with a filter on the lab
   concepts, the way an analyst narrows a big file), keep the DKA analytes of the code lists
   (``cohort/codelists/labs.csv`` resolved through the extract's ``concept`` table);
2. convert to canonical units with ``units.csv`` (multiply, add; unknown units dropped, values
   outside the plausible range dropped), urine ketones to the ordinal 0..4 of
   ``ketone_ordinals.csv`` (the coded answer, else the text answer, else a whole number);
3. one time point per person and result time; per analyte the latest value within the look-back
   by ``pandas.merge_asof(..., by="person_id", direction="backward", tolerance=6 h)`` (the
   diagnosis look-back; a value also counts for resolution when it is at most 4 h old);
4. known diabetes from the first diabetes condition record (conditions.csv, exact and prefix
   codes, on condition_concept_id or condition_source_concept_id);
5. the consensus-2024 diagnosis (Umpierrez GE et al. Diabetes Care 2024;47(8):1257-1275; read as
   in cohort/definitions/consensus-2024.yaml): glucose >= 11.1 mmol/L or known diabetes; BHB >=
   3.0 mmol/L or urine ketones >= 2+; pH < 7.3 or bicarbonate < 18 mmol/L;
6. episodes person by person in vectorised steps, one step per episode number (as the product
   does; the number of steps is the largest number of episodes of one person): onset = the first
   qualifying time point after the previous episode's end plus the 72 h gap; resolution = the
   first later time point, no later than the censoring time, at which BHB < 0.6 and (pH >= 7.3
   or bicarbonate >= 18), every value measured after the onset; censoring at the end of the
   hospital stay holding the onset (an emergency visit extended by the admissions that start
   inside it), else at the person's last lab time point, capped by the observation period's end
   and by death;
7. adults only (age at onset >= 18 in completed years).

Simplifications against the product, stated so the agreement figures can be read: no
quarantine of rows before birth, after death or outside observation, no duplicate removal (they
change no minimum or maximum), no derived anion gap (consensus-2024 does not use it), and the hospital visit holding an
onset is the latest-starting one (the product prefers ERIP, then IP, ER, ICU).

The script times the peer and the product (``cohort.episodes.find_episodes`` for consensus-2024),
each in its own child process; the peer runs under an address-space cap (``RLIMIT_AS``, default
8 GiB) so that where it runs out of memory it fails alone. With ``--check`` it also prints how
closely the peer's episodes agree with the product's on the first extract.

Usage::

    .venv/bin/python benchmarks/bench_pandas_peer.py --extract /tmp/e2/s10k/extract --check
    .venv/bin/python benchmarks/bench_pandas_peer.py --extract A/extract --extract B/extract \
        [--cap-gib 8] [--threads 2] [--memory-limit 3GB] [--json]
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
if str(HERE) not in sys.path:
    sys.path.insert(0, str(HERE))

from _measure import Measured, child_code, episodes_run, load_line, parquet_rows, run_python  # noqa: E402

CODELISTS = ROOT / "cohort" / "codelists"

#: consensus-2024 numbers (cohort/definitions/consensus-2024.yaml; Umpierrez 2024, Table 1 and text)
DIAGNOSIS_LOOKBACK = pd.Timedelta(hours=6)
RESOLUTION_LOOKBACK = pd.Timedelta(hours=4)
EPISODE_GAP = pd.Timedelta(hours=72)
MIN_AGE_YEARS = 18
PH_SPECIMENS = ("arterial", "venous", "capillary", "unspecified")
BICARBONATE_SPECIMENS = ("serum", "blood", "arterial", "venous", "total_co2")
#: analytes the criteria read, and how several results at one time point are combined
CARRIED = {"glucose": "max", "ph": "min", "bicarbonate": "min", "bhb": "max", "urine_ketones": "max"}
HOSPITAL_VISITS = ("IP", "ER", "ERIP", "ICU")


def _table(extract: Path, name: str, columns: Sequence[str], filters=None) -> pd.DataFrame:
    path = extract / f"{name}.parquet"
    if not path.exists():
        path = extract / name
    return pd.read_parquet(path, columns=list(columns), filters=filters)


def _concepts(extract: Path) -> pd.DataFrame:
    return _table(extract, "concept", ["concept_id", "vocabulary_id", "concept_code"])


def lab_values(extract: Path) -> pd.DataFrame:
    """Usable lab results in canonical units: person_id, event_datetime, visit_occurrence_id, analyte, value.

    Every analyte of labs.csv is kept (each result time is a time point, as in the product);
    pH and bicarbonate only from the accepted specimens.
    """
    concept = _concepts(extract)
    labs = pd.read_csv(CODELISTS / "labs.csv", dtype=str)
    lab_concepts = labs.merge(concept, on=["vocabulary_id", "concept_code"])[["concept_id", "analyte", "specimen"]]
    units = pd.read_csv(CODELISTS / "units.csv", dtype={"concept_code": str}, keep_default_na=False)
    ucum = units[units["vocabulary_id"] != "none"].merge(concept, on=["vocabulary_id", "concept_code"])
    ucum = ucum.rename(columns={"concept_id": "unit_key"})
    none = units[units["vocabulary_id"] == "none"].assign(unit_key=-1)
    rules = pd.concat([ucum, none])[["analyte", "unit_key", "multiply", "add", "low", "high"]]
    rules = rules.astype({"unit_key": "int64", "multiply": float, "add": float, "low": float, "high": float})
    answers = pd.read_csv(CODELISTS / "ketone_ordinals.csv", dtype=str)
    ordinals = answers.dropna(subset=["vocabulary_id"]).merge(concept, on=["vocabulary_id", "concept_code"])
    ordinals = ordinals[["concept_id", "ordinal"]].rename(
        columns={"concept_id": "value_as_concept_id", "ordinal": "ketone_ordinal"})
    ordinals["ketone_ordinal"] = ordinals["ketone_ordinal"].astype(float)
    texts = answers.assign(text_key=answers["text"].str.lower().str.replace(" ", ""),
                           ordinal=answers["ordinal"].astype(float)).groupby("text_key")["ordinal"].min()

    ids = [int(value) for value in lab_concepts["concept_id"]]
    measurement = _table(
        extract, "measurement",
        ["person_id", "measurement_concept_id", "measurement_datetime", "value_as_number",
         "value_as_concept_id", "value_source_value", "unit_concept_id", "visit_occurrence_id"],
        filters=[("measurement_concept_id", "in", ids)],
    )
    measurement = measurement[measurement["measurement_datetime"].notna()]
    events = measurement.merge(lab_concepts, left_on="measurement_concept_id", right_on="concept_id")
    events = events[(events["analyte"] != "ph") | events["specimen"].isin(PH_SPECIMENS)]
    events = events[(events["analyte"] != "bicarbonate") | events["specimen"].isin(BICARBONATE_SPECIMENS)]
    unit = events["unit_concept_id"].fillna(0).astype("int64")
    events["unit_key"] = unit.where(unit != 0, -1)
    events = events.merge(rules, on=["analyte", "unit_key"])
    events = events.merge(ordinals, on="value_as_concept_id", how="left")
    number = events["value_as_number"]
    whole = number.where((number == np.round(number)) & (events["unit_key"] == -1))
    value = number * events["multiply"] + events["add"]
    text = events["value_source_value"].str.lower().str.replace(" ", "").map(texts)
    ketone = events["ketone_ordinal"].fillna(text).fillna(whole)
    events["value"] = value.where(events["analyte"] != "urine_ketones", ketone)
    events = events[events["value"].between(events["low"], events["high"])]
    return events.rename(columns={"measurement_datetime": "event_datetime"})[
        ["person_id", "event_datetime", "visit_occurrence_id", "analyte", "value"]]


def first_diabetes(extract: Path) -> pd.DataFrame:
    """person_id, first_diabetes_datetime from condition records of the diabetes and DKA code lists."""
    concept = _concepts(extract)
    codes = pd.read_csv(CODELISTS / "conditions.csv", dtype=str)
    exact = codes[codes["match"] == "exact"].merge(concept, on=["vocabulary_id", "concept_code"])["concept_id"]
    prefixes = codes[codes["match"] == "prefix"]
    prefixed = [concept.loc[(concept["vocabulary_id"] == row.vocabulary_id)
                            & concept["concept_code"].str.startswith(row.concept_code), "concept_id"]
                for row in prefixes.itertuples()]  # a loop over the few code-list lines, not over rows
    ids = pd.concat([exact, *prefixed]).unique()
    conditions = _table(extract, "condition_occurrence",
                        ["person_id", "condition_concept_id", "condition_source_concept_id",
                         "condition_start_date", "condition_start_datetime"])
    hit = conditions["condition_concept_id"].isin(ids) | conditions["condition_source_concept_id"].isin(ids)
    conditions = conditions[hit]
    when = conditions["condition_start_datetime"].fillna(pd.to_datetime(conditions["condition_start_date"]))
    frame = pd.DataFrame({"person_id": conditions["person_id"], "first_diabetes_datetime": when}).dropna()
    return frame.groupby("person_id", as_index=False)["first_diabetes_datetime"].min()


def lab_state(events: pd.DataFrame, diabetes: pd.DataFrame) -> pd.DataFrame:
    """One row per person and lab time point with the carried values of the criteria's analytes."""
    points = (events.groupby(["person_id", "event_datetime"], as_index=False)["visit_occurrence_id"].max()
              .rename(columns={"event_datetime": "state_datetime"}))
    points = points.sort_values("state_datetime", kind="stable")
    for analyte, how in CARRIED.items():
        values = (events[events["analyte"] == analyte].groupby(["person_id", "event_datetime"], as_index=False)
                  ["value"].agg(how))
        values = values.rename(columns={"value": analyte})
        values[f"{analyte}_datetime"] = values["event_datetime"]
        values = values.sort_values("event_datetime", kind="stable")
        points = pd.merge_asof(points, values, left_on="state_datetime", right_on="event_datetime",
                               by="person_id", direction="backward", tolerance=DIAGNOSIS_LOOKBACK)
        points = points.drop(columns="event_datetime")
    points = points.merge(diabetes, on="person_id", how="left")
    points["known_diabetes"] = points["first_diabetes_datetime"].le(points["state_datetime"])
    return points.sort_values(["person_id", "state_datetime"], kind="stable").reset_index(drop=True)


def _stays(extract: Path, persons: pd.Index) -> pd.DataFrame:
    concept = _concepts(extract)
    visits = _table(extract, "visit_occurrence",
                    ["visit_occurrence_id", "person_id", "visit_concept_id", "visit_start_date",
                     "visit_start_datetime", "visit_end_date", "visit_end_datetime"])
    visits = visits[visits["person_id"].isin(persons)]
    kinds = concept[(concept["vocabulary_id"] == "Visit") & concept["concept_code"].isin(HOSPITAL_VISITS)]
    visits = visits.assign(
        hospital=visits["visit_concept_id"].isin(kinds["concept_id"]),
        start=visits["visit_start_datetime"].fillna(pd.to_datetime(visits["visit_start_date"])),
        end=visits["visit_end_datetime"].fillna(
            pd.to_datetime(visits["visit_end_date"]) + pd.Timedelta(days=1) - pd.Timedelta(microseconds=1)),
    )
    return visits[["visit_occurrence_id", "person_id", "hospital", "start", "end"]]


def _censoring(onsets: pd.DataFrame, stays: pd.DataFrame, last_point: pd.Series,
               limits: pd.DataFrame) -> pd.Series:
    """Censoring time of each onset (index aligned with ``onsets``)."""
    frame = onsets[["person_id", "onset_datetime", "visit_occurrence_id"]].reset_index()
    hospital = stays[stays["hospital"]].sort_values("start", kind="stable")
    linked = pd.merge_asof(frame.sort_values("onset_datetime", kind="stable"),
                           hospital[["person_id", "visit_occurrence_id", "start", "end"]]
                           .rename(columns={"visit_occurrence_id": "stay_id"}),
                           left_on="onset_datetime", right_on="start", by="person_id", direction="backward")
    holds = linked["end"].isna() | (linked["end"] >= linked["onset_datetime"])
    linked.loc[~holds & linked["stay_id"].notna(), ["stay_id", "start", "end"]] = [np.nan, pd.NaT, pd.NaT]
    own = stays[["visit_occurrence_id", "start", "end"]].rename(
        columns={"visit_occurrence_id": "lab_visit", "start": "lab_start", "end": "lab_end"})
    linked = linked.merge(own, left_on="visit_occurrence_id", right_on="lab_visit", how="left")
    use_lab = linked["stay_id"].isna() & (linked["lab_start"] <= linked["onset_datetime"]) & (
        linked["lab_end"] >= linked["onset_datetime"])
    linked["start"] = linked["start"].where(~use_lab, linked["lab_start"])
    linked["end"] = linked["end"].where(~use_lab, linked["lab_end"])
    # an emergency visit followed by the admission it led to: the stay ends at the latest end of
    # the hospital visits that start inside it
    inside = linked[linked["end"].notna()][["index", "person_id", "start", "end"]].merge(
        hospital[["person_id", "start", "end"]], on="person_id", suffixes=("", "_other"))
    inside = inside[(inside["start_other"] >= inside["start"]) & (inside["start_other"] <= inside["end"])]
    extended = inside.groupby("index")["end_other"].max()
    linked = linked.set_index("index")
    discharge = pd.concat([linked["end"], extended.reindex(linked.index)], axis=1).max(axis=1)
    no_stay = linked["end"].isna()
    censor = discharge.where(~no_stay, linked["person_id"].map(last_point))
    limits = limits.reindex(linked["person_id"].to_numpy())
    censor = pd.concat([censor.reset_index(drop=True), pd.Series(limits["data_end"].to_numpy()),
                        pd.Series(limits["death_end"].to_numpy())], axis=1).min(axis=1)
    censor.index = linked.index
    return censor.reindex(onsets.index)


def _person_limits(extract: Path, persons: pd.Index) -> pd.DataFrame:
    periods = _table(extract, "observation_period", ["person_id", "observation_period_end_date"])
    periods = periods[periods["person_id"].isin(persons)]
    data_end = (pd.to_datetime(periods["observation_period_end_date"]) + pd.Timedelta(days=1)
                - pd.Timedelta(microseconds=1)).groupby(periods["person_id"]).max()
    death = _table(extract, "death", ["person_id", "death_date", "death_datetime"])
    death = death[death["person_id"].isin(persons)]
    death_end = death["death_datetime"].fillna(
        pd.to_datetime(death["death_date"]) + pd.Timedelta(days=1) - pd.Timedelta(microseconds=1))
    death_end = death_end.groupby(death["person_id"]).min()
    return pd.DataFrame({"data_end": data_end, "death_end": death_end})


def _age_years(extract: Path, episodes: pd.DataFrame) -> pd.Series:
    person = _table(extract, "person", ["person_id", "year_of_birth", "month_of_birth", "day_of_birth",
                                        "birth_datetime"])
    person = person.drop_duplicates("person_id").set_index("person_id")
    person = person.reindex(episodes["person_id"].to_numpy())
    born = pd.to_datetime(dict(year=person["year_of_birth"], month=person["month_of_birth"].fillna(7),
                               day=person["day_of_birth"].fillna(15)), errors="coerce")
    born = person["birth_datetime"].fillna(born)
    onset = pd.DatetimeIndex(episodes["onset_datetime"].to_numpy())
    born = pd.DatetimeIndex(born.to_numpy())
    before_birthday = (onset.month < born.month) | ((onset.month == born.month) & (onset.day < born.day))
    return pd.Series(onset.year - born.year - before_birthday.astype(int), index=episodes.index)


def pandas_episodes(extract: Path) -> pd.DataFrame:
    """The consensus-2024 episodes of an extract, the pandas way (see the module docstring).

    Parameters
    ----------
    extract
        A Parquet CDM extract folder (as ``dka-cohort synth`` writes it).

    Returns
    -------
    pandas.DataFrame
        person_id, onset_datetime, resolution_datetime (NaT when unresolved), end_datetime,
        episode_number, age_years; adults only.
    """
    extract = Path(extract)
    events = lab_values(extract)
    state = lab_state(events, first_diabetes(extract))
    del events
    after = {analyte: state[f"{analyte}_datetime"] >= state["state_datetime"] - RESOLUTION_LOOKBACK
             for analyte in ("ph", "bicarbonate", "bhb")}
    qualifies = (
        (state["glucose"].ge(11.1) | state["known_diabetes"])
        & (state["bhb"].ge(3.0) | state["urine_ketones"].ge(2))
        & (state["ph"].lt(7.3) | state["bicarbonate"].lt(18.0))
    )
    candidates = state.loc[qualifies, ["person_id", "state_datetime", "visit_occurrence_id"]]
    candidates = candidates.rename(columns={"state_datetime": "onset_datetime"})
    persons = pd.Index(candidates["person_id"].unique())
    last_point = state.groupby("person_id")["state_datetime"].max()
    followed = state["person_id"].isin(persons)
    resolving = state.loc[followed & state["bhb"].lt(0.6) & after["bhb"]
                          & ((state["ph"].ge(7.3) & after["ph"]) | (state["bicarbonate"].ge(18.0) & after["bicarbonate"])),
                          ["person_id", "state_datetime", "bhb_datetime", "ph", "ph_datetime", "bicarbonate",
                           "bicarbonate_datetime"]]
    del state
    stays = _stays(extract, persons)
    limits = _person_limits(extract, persons)

    found = []
    remaining = candidates
    number = 0
    while not remaining.empty:
        number += 1
        onsets = remaining.groupby("person_id", sort=False).head(1).copy()
        onsets["censor_datetime"] = _censoring(onsets, stays, last_point, limits)
        pairs = onsets[["person_id", "onset_datetime", "censor_datetime"]].merge(resolving, on="person_id")
        after_onset = (
            (pairs["state_datetime"] > pairs["onset_datetime"])
            & (pairs["state_datetime"] <= pairs["censor_datetime"])
            & (pairs["bhb_datetime"] > pairs["onset_datetime"])
            & (((pairs["ph"] >= 7.3) & (pairs["ph_datetime"] > pairs["onset_datetime"]))
               | ((pairs["bicarbonate"] >= 18.0) & (pairs["bicarbonate_datetime"] > pairs["onset_datetime"])))
        )
        resolution = pairs[after_onset].groupby("person_id")["state_datetime"].min()
        onsets["resolution_datetime"] = onsets["person_id"].map(resolution)
        onsets["end_datetime"] = onsets["resolution_datetime"].fillna(onsets["censor_datetime"])
        onsets["episode_number"] = number
        found.append(onsets)
        cutoff = onsets.set_index("person_id")["end_datetime"] + EPISODE_GAP
        remaining = remaining[remaining["onset_datetime"] > remaining["person_id"].map(cutoff).fillna(pd.Timestamp.max)]
        remaining = remaining[remaining["person_id"].isin(cutoff.index)]
    if not found:
        return pd.DataFrame(columns=["person_id", "onset_datetime", "resolution_datetime", "end_datetime",
                                     "episode_number", "age_years"])
    episodes = pd.concat(found, ignore_index=True)
    episodes["age_years"] = _age_years(extract, episodes)
    episodes = episodes[episodes["age_years"] >= MIN_AGE_YEARS]
    return episodes[["person_id", "onset_datetime", "resolution_datetime", "end_datetime", "episode_number",
                     "age_years"]].sort_values(["person_id", "onset_datetime"]).reset_index(drop=True)


def agreement(product: pd.DataFrame, peer: pd.DataFrame, *, tolerance: pd.Timedelta) -> dict[str, float | int]:
    """How closely the peer's episodes match the product's: same person, onsets within ``tolerance``.

    Returns counts (product, peer, matched) and shares: of the product's episodes found by the
    peer, of the peer's episodes found by the product, and among matched pairs the share with the
    same onset to the second and the same resolution (both unresolved, or within ``tolerance``).
    """
    left = product[["person_id", "onset_datetime", "resolution_datetime"]].reset_index(drop=True)
    left["left_id"] = left.index
    right = peer[["person_id", "onset_datetime", "resolution_datetime"]].reset_index(drop=True)
    right["right_id"] = right.index
    pairs = left.merge(right, on="person_id", suffixes=("", "_peer"))
    pairs["gap"] = (pairs["onset_datetime"] - pairs["onset_datetime_peer"]).abs()
    pairs = pairs[pairs["gap"] <= tolerance].sort_values("gap", kind="stable")
    pairs = pairs.drop_duplicates("left_id").drop_duplicates("right_id")
    resolution_gap = (pairs["resolution_datetime"] - pairs["resolution_datetime_peer"]).abs()
    same_resolution = (pairs["resolution_datetime"].isna() & pairs["resolution_datetime_peer"].isna()) | (
        resolution_gap <= tolerance)
    matched = len(pairs)
    return {
        "product": len(left), "peer": len(right), "matched": matched,
        "product_found": matched / len(left) if len(left) else float("nan"),
        "peer_found": matched / len(right) if len(right) else float("nan"),
        "same_onset": float((pairs["gap"] <= pd.Timedelta(seconds=1)).mean()) if matched else float("nan"),
        "same_resolution": float(same_resolution.mean()) if matched else float("nan"),
    }


_PEER = """
import time
from pathlib import Path
import bench_pandas_peer as peer
started = time.perf_counter()
episodes = peer.pandas_episodes(Path({extract!r}))
seconds = time.perf_counter() - started
if {save!r}:
    episodes.to_parquet({save!r})
report(seconds=seconds, episodes=len(episodes))
"""

def measure(extract: Path, *, cap_gib: float, threads: int, memory_limit: str | None,
            save_dir: Path | None = None, timeout_seconds: float | None = None,
            product: Measured | None = None, spill: Path | None = None) -> dict[str, object]:
    """Time the peer (under the cap) and the product on one extract, each in its own child.

    ``product`` reuses a run of the product already made (then nothing is saved for it).
    """
    extract = Path(extract).resolve()
    peer_file = str(save_dir / "peer.parquet") if save_dir else None
    product_file = str(save_dir / "product.parquet") if save_dir and product is None else None
    peer = run_python(child_code("import sys; sys.path.insert(0, %r)" % str(HERE),
                                 _PEER.format(extract=str(extract), save=peer_file)),
                      label="pandas peer", address_space_bytes=int(cap_gib * 2**30),
                      timeout_seconds=timeout_seconds)
    if product is None:
        product = episodes_run(extract, ["consensus-2024"], threads=threads, memory_limit=memory_limit,
                               spill=spill, save=Path(product_file) if product_file else None,
                               label="product", timeout_seconds=timeout_seconds)
    return {"extract": str(extract), "rows": parquet_rows(extract / "measurement.parquet"),
            "peer": peer, "product": product, "peer_file": peer_file, "product_file": product_file}


def check(row: dict[str, object], tolerance_minutes: float) -> dict[str, float | int] | None:
    """Agreement of one measured extract (both sides saved and ran), printed; None when not checkable."""
    if not (row["peer"].ok and row["product"].ok and row["peer_file"] and row["product_file"]):
        return None
    checked = agreement(pd.read_parquet(row["product_file"]), pd.read_parquet(row["peer_file"]),
                        tolerance=pd.Timedelta(minutes=tolerance_minutes))
    print(f"agreement at {row['rows']:,} rows (same person, onset within {tolerance_minutes:g} min): "
          f"product {checked['product']:,} episodes, peer {checked['peer']:,}, matched {checked['matched']:,}; "
          f"{checked['product_found']:.1%} of the product's found by the peer, "
          f"{checked['peer_found']:.1%} of the peer's found by the product; among matched, same onset to "
          f"the second {checked['same_onset']:.1%}, same resolution {checked['same_resolution']:.1%}")
    return checked


def _fmt(done, digits: int = 1) -> tuple[str, str]:
    if not done.ok:
        return "failed", f"{done.peak_rss_gib:.2f}"
    return f"{done.seconds:.{digits}f}", f"{done.peak_rss_gib:.2f}"


def print_table(rows: Sequence[dict[str, object]], cap_gib: float) -> None:
    """The side-by-side table: per extract, product and peer time and peak RSS, and the ratio."""
    print(f"pandas peer (consensus-2024) vs product; peer capped at {cap_gib:g} GiB address space; {load_line()}")
    print(f"{'measurement rows':>17} {'product s':>10} {'GiB':>6} {'episodes':>9}  {'pandas s':>9} {'GiB':>6} "
          f"{'episodes':>9}  {'product/pandas':>14}")
    for row in rows:
        product, peer = row["product"], row["peer"]
        p_s, p_g = _fmt(product)
        q_s, q_g = _fmt(peer)
        ratio = f"{product.seconds / peer.seconds:.2f}" if product.ok and peer.ok else "-"
        print(f"{row['rows']:>17,} {p_s:>10} {p_g:>6} {product.result.get('episodes', '-'):>9}  {q_s:>9} {q_g:>6} "
              f"{peer.result.get('episodes', '-'):>9}  {ratio:>14}")
        for done in (product, peer):
            if not done.ok:
                print(f"    {done.label} failed: {done.error}")


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--extract", type=Path, action="append", required=True,
                        help="an extract folder (repeat for several sizes, smallest first)")
    parser.add_argument("--cap-gib", type=float, default=8.0, help="address-space cap of the peer (default 8)")
    parser.add_argument("--threads", type=int, default=2, help="DuckDB threads of the product")
    parser.add_argument("--memory-limit", default="3GB", help="DuckDB memory limit of the product")
    parser.add_argument("--check", action="store_true", help="compare the peer's episodes with the product's")
    parser.add_argument("--tolerance-minutes", type=float, default=1.0, help="onset match tolerance (default 1)")
    parser.add_argument("--timeout", type=float, default=1800.0, help="seconds before a child is stopped")
    parser.add_argument("--json", type=Path, help="also write the figures to this JSON file")
    args = parser.parse_args(argv)
    import tempfile

    rows = []
    checks = []
    with tempfile.TemporaryDirectory(prefix="bench-peer-") as scratch:
        for position, extract in enumerate(args.extract):
            save = None
            if args.check:
                save = Path(scratch) / str(position)
                save.mkdir()
            rows.append(measure(extract, cap_gib=args.cap_gib, threads=args.threads, memory_limit=args.memory_limit,
                                save_dir=save, timeout_seconds=args.timeout))
            print(f"  measured {extract}", flush=True)
        print_table(rows, args.cap_gib)
        if args.check:
            checks = [check(row, args.tolerance_minutes) for row in rows]
    if args.json:
        out = [{"extract": row["extract"], "rows": row["rows"],
                **{f"{side}_{key}": getattr(row[side], key) for side in ("peer", "product")
                   for key in ("ok", "seconds", "peak_rss_gib", "error")},
                "peer_episodes": row["peer"].result.get("episodes"),
                "product_episodes": row["product"].result.get("episodes")} for row in rows]
        args.json.write_text(json.dumps({"rows": out, "agreement": checks}, indent=1, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

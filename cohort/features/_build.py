"""``build_features`` and ``write_features``: the public entry points of the feature stage."""

from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import polars as pl

from cohort._errors import InputError
from cohort.features._audit import AUDIT_COLUMNS, audit_summary
from cohort.features._columns import conform
from cohort.features._dictionary import data_dictionary
from cohort.features._episode import episode_features
from cohort.features._infusions import UNLINKED_COLUMNS
from cohort.features._inputs import FeatureInputs, check_episodes
from cohort.features._options import FeatureOptions
from cohort.features._person_time import PERSON_TIME_COLUMNS, person_time
from cohort.features._recurrence import COUNTING_COLUMNS, PERSON_COLUMNS, counting_process, person_summary

__all__ = ["FeatureTables", "build_features", "run_features", "write_features"]


@dataclass(frozen=True)
class FeatureTables:
    """The tables of the feature stage (polars DataFrames); columns in :func:`data_dictionary`."""

    episode_features: pl.DataFrame
    person_summary: pl.DataFrame
    person_time: pl.DataFrame
    counting_process: pl.DataFrame
    unlinked_infusions: pl.DataFrame
    audit_summary: pl.DataFrame
    data_dictionary: pl.DataFrame


def build_features(
    episodes: pl.DataFrame,
    inputs: FeatureInputs,
    *,
    options: FeatureOptions | None = None,
) -> FeatureTables:
    """Build every feature table from episodes and the input frames.

    Parameters
    ----------
    episodes
        Episodes as in episodes.parquet (DESIGN.md contract; several definitions allowed).
    inputs
        The input frames (:class:`FeatureInputs`), from :func:`load_feature_inputs` or by hand.
    options
        Timing choices and thresholds; :class:`FeatureOptions` defaults when None.

    Returns
    -------
    FeatureTables

    Examples
    --------
    >>> import datetime as dt, polars as pl
    >>> episodes = pl.DataFrame({"episode_id": ["jbds-2023:1:20240301090000"], "person_id": [1],
    ...     "definition": ["jbds-2023"], "onset_datetime": [dt.datetime(2024, 3, 1, 9)],
    ...     "resolution_datetime": [dt.datetime(2024, 3, 1, 21)],
    ...     "end_datetime": [dt.datetime(2024, 3, 1, 21)], "end_reason": ["resolved"]})
    >>> tables = build_features(episodes, FeatureInputs())
    >>> tables.episode_features.select("hours_to_resolution", "has_infusion").row(0)
    (12.0, False)
    """
    if options is None:
        options = FeatureOptions()
    if not isinstance(options, FeatureOptions):
        msg = f"options must be a FeatureOptions, got {type(options).__name__}"
        raise InputError(msg)
    if not isinstance(inputs, FeatureInputs):
        msg = f"inputs must be a FeatureInputs (see load_feature_inputs), got {type(inputs).__name__}"
        raise InputError(msg)
    checked = check_episodes(episodes)
    features, unlinked = episode_features(checked, inputs, options)
    persons = person_summary(
        checked, inputs.persons, inputs.observation_periods, inputs.deaths, inputs.diabetes_records, options
    )
    return FeatureTables(
        episode_features=features,
        person_summary=conform(persons, PERSON_COLUMNS, table="person_summary"),
        person_time=conform(
            person_time(checked, inputs.persons, inputs.observation_periods, inputs.diabetes_records, options),
            PERSON_TIME_COLUMNS,
            table="person_time",
        ),
        counting_process=conform(counting_process(features), COUNTING_COLUMNS, table="counting_process"),
        unlinked_infusions=conform(unlinked, UNLINKED_COLUMNS, table="unlinked_infusions"),
        audit_summary=conform(audit_summary(features), AUDIT_COLUMNS, table="audit_summary"),
        data_dictionary=data_dictionary(),
    )


#: file written for each table
OUTPUT_FILES = {
    "episode_features": "episode_features.parquet",
    "person_summary": "person_summary.parquet",
    "person_time": "person_time.parquet",
    "counting_process": "counting_process.parquet",
    "unlinked_infusions": "unlinked_infusions.parquet",
    "audit_summary": "audit_summary.csv",
    "data_dictionary": "data_dictionary.csv",
}


def write_features(tables: FeatureTables, out: Path | str) -> dict[str, Path]:
    """Write the feature tables under ``out``.

    Files: episode_features.parquet, person_summary.parquet, person_time.parquet,
    counting_process.parquet,
    unlinked_infusions.parquet, audit_summary.csv, data_dictionary.csv. Each file is written to
    a temporary name in ``out`` and renamed into place, so a reader never sees half a file.

    Returns
    -------
    dict
        Table name -> path written.

    Examples
    --------
    >>> import datetime as dt, tempfile, polars as pl
    >>> episodes = pl.DataFrame({"episode_id": ["e1"], "person_id": [1], "definition": ["jbds-2023"],
    ...     "onset_datetime": [dt.datetime(2024, 3, 1, 9)], "end_datetime": [dt.datetime(2024, 3, 1, 21)]})
    >>> written = write_features(build_features(episodes, FeatureInputs()), tempfile.mkdtemp())
    >>> sorted(written)[:3]
    ['audit_summary', 'counting_process', 'data_dictionary']
    """
    folder = Path(out)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        msg = f"cannot create the features folder {folder}: {error.strerror}; give a writable --out"
        raise InputError(msg) from None
    written: dict[str, Path] = {}
    for name, file_name in OUTPUT_FILES.items():
        frame: pl.DataFrame = getattr(tables, name)
        target = folder / file_name
        handle, temporary = tempfile.mkstemp(prefix=f".{file_name}.", dir=folder)
        os.close(handle)
        try:
            if file_name.endswith(".parquet"):
                frame.write_parquet(temporary)
            else:
                frame.write_csv(temporary, datetime_format="%Y-%m-%d %H:%M:%S")
            os.replace(temporary, target)
        finally:
            if os.path.exists(temporary):
                os.unlink(temporary)
        written[name] = target
    return written


def run_features(
    episodes: Path | str | pl.DataFrame,
    source: object,
    out: Path | str | None = None,
    *,
    options: FeatureOptions | None = None,
    threads: int | None = None,
    memory_limit: str | None = None,
) -> FeatureTables:
    """Episodes folder + extract -> feature tables (and files): what ``dka-cohort features`` does.

    Parameters
    ----------
    episodes
        A folder holding episodes.parquet (as ``dka-cohort episodes`` writes it), the file itself,
        or an episodes DataFrame.
    source
        The extract: a path for :func:`cohort.source.open_extract`, or an open ``Extract`` (then
        it is left open, and lab events already prepared in its session are reused).
    out
        Folder to write the tables to (:func:`write_features`) with ``features_manifest.json``
        (options, row counts, times, source digest); nothing is written when None.
    options
        Feature options; defaults when None.
    threads, memory_limit
        DuckDB settings when ``source`` is a path.

    Returns
    -------
    FeatureTables

    Examples
    --------
    >>> tables = run_features("demo-output/episodes", "demo-output/extract",
    ...                       "demo-output/features")  # doctest: +SKIP
    >>> tables.episode_features.height  # doctest: +SKIP
    1203
    """
    import datetime as dt
    import json
    from dataclasses import asdict

    from cohort.features._loader import load_feature_inputs
    from cohort.source import Extract, open_extract

    started = dt.datetime.now()
    if isinstance(episodes, pl.DataFrame):
        frame, episodes_path = episodes, None
    else:
        episodes_path = Path(episodes)
        if episodes_path.is_dir():
            episodes_path = episodes_path / "episodes.parquet"
        if not episodes_path.is_file():
            msg = (
                f"no episodes file at {episodes_path}; give the folder `dka-cohort episodes --out` "
                "wrote (it holds episodes.parquet)"
            )
            raise InputError(msg)
        frame = pl.read_parquet(episodes_path)
    options = options or FeatureOptions()
    if isinstance(source, Extract):
        inputs = load_feature_inputs(source, frame, options=options)
        digest = None
    else:
        with open_extract(source, threads=threads, memory_limit=memory_limit) as extract:
            inputs = load_feature_inputs(extract, frame, options=options)
            digest = extract.fingerprint().get("digest")
    tables = build_features(frame, inputs, options=options)
    if out is not None:
        written = write_features(tables, out)
        from importlib.metadata import PackageNotFoundError, version

        try:
            package_version = version("dka-cohort")
        except PackageNotFoundError:  # a bare source tree has no installed metadata
            package_version = "0.0.0"
        manifest = {
            "stage": "features",
            "package_version": package_version,
            "polars_version": pl.__version__,
            "episodes": str(episodes_path) if episodes_path else None,
            "source_digest": digest,
            "options": asdict(options),
            "rows": {name: getattr(tables, name).height for name in OUTPUT_FILES},
            "files": {name: path.name for name, path in written.items()},
            "started": started.isoformat(timespec="seconds"),
            "finished": dt.datetime.now().isoformat(timespec="seconds"),
        }
        (Path(out) / "features_manifest.json").write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
    return tables

"""``build_features`` and ``write_features``: the public entry points of the feature stage."""

from __future__ import annotations

import datetime as dt
import json
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


#: Files that mark a complete features folder (an earlier run's folder is replaced whole).
_FEATURE_MARKERS = ("features_manifest.json", "episode_features.parquet")


def _write_tables(tables: FeatureTables, folder: Path) -> dict[str, Path]:
    """Write every feature table into ``folder`` (a staging folder) and return name -> path."""
    written: dict[str, Path] = {}
    for name, file_name in OUTPUT_FILES.items():
        frame: pl.DataFrame = getattr(tables, name)
        target = folder / file_name
        if file_name.endswith(".parquet"):
            frame.write_parquet(target)
        else:
            frame.write_csv(target, datetime_format="%Y-%m-%d %H:%M:%S")
        written[name] = target
    return written


def write_features(tables: FeatureTables, out: Path | str) -> dict[str, Path]:
    """Write the feature tables under ``out``.

    Files: episode_features.parquet, person_summary.parquet, person_time.parquet,
    counting_process.parquet,
    unlinked_infusions.parquet, audit_summary.csv, data_dictionary.csv. They are written into a
    staging folder beside ``out`` under the lock ``<out>.lock`` and moved into place together
    when all are complete (:func:`cohort._outputs.output_folder`), so a reader never sees half a
    folder. ``out`` must be new, empty, or an earlier features folder (replaced whole).

    Returns
    -------
    dict
        Table name -> path written.

    Examples
    --------
    >>> import datetime as dt, tempfile, pathlib, polars as pl
    >>> episodes = pl.DataFrame({"episode_id": ["e1"], "person_id": [1], "definition": ["jbds-2023"],
    ...     "onset_datetime": [dt.datetime(2024, 3, 1, 9)], "end_datetime": [dt.datetime(2024, 3, 1, 21)]})
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "features"
    >>> written = write_features(build_features(episodes, FeatureInputs()), out)
    >>> sorted(written)[:3]
    ['audit_summary', 'counting_process', 'data_dictionary']
    """
    from cohort._outputs import output_folder

    folder = Path(out)
    with output_folder(folder, command="features", markers=_FEATURE_MARKERS) as staging:
        written = _write_tables(tables, staging)
    return {name: folder / path.name for name, path in written.items()}


def _episodes_as_of(episodes_path: Path | None) -> dt.date | None:
    """The as-of date the episodes run used (its manifest's ``parameters.as_of``), if recorded."""
    if episodes_path is None:
        return None
    manifest = episodes_path.parent / "manifest.json"
    try:
        recorded = json.loads(manifest.read_text(encoding="utf-8")).get("parameters", {}).get("as_of")
        return dt.date.fromisoformat(recorded) if recorded else None
    except (OSError, ValueError, AttributeError):
        return None  # an episodes file without (a readable) manifest: lab events as of today


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
        Folder to write the tables to with ``features_manifest.json`` (options, row counts,
        times, the source fingerprint, the content hash of the episodes read and of every table
        written); written whole or not at all, under a lock (:func:`write_features`). Nothing is
        written when None.
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
    import json
    from dataclasses import asdict

    from cohort._manifest import package_versions, table_hash, table_hashes, utc_now
    from cohort._outputs import check_output_folder, output_folder
    from cohort.features._loader import load_feature_inputs
    from cohort.source import Extract, open_extract

    started = utc_now()
    if out is not None:
        check_output_folder(out, markers=_FEATURE_MARKERS)  # before any heavy work
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
    as_of = _episodes_as_of(episodes_path)
    options = options or FeatureOptions()
    if isinstance(source, Extract):
        inputs = load_feature_inputs(source, frame, options=options, as_of=as_of)
        fingerprint = source.fingerprint() if out is not None else None
    else:
        with open_extract(source, threads=threads, memory_limit=memory_limit) as extract:
            inputs = load_feature_inputs(extract, frame, options=options, as_of=as_of)
            fingerprint = extract.fingerprint() if out is not None else None
    tables = build_features(frame, inputs, options=options)
    if out is not None:
        with output_folder(Path(out), command="features", markers=_FEATURE_MARKERS) as staging:
            written = _write_tables(tables, staging)
            manifest = {
                "stage": "features",
                "command": "features",
                "package_version": package_versions().get("dka-cohort") or "0.0.0",
                "polars_version": pl.__version__,
                "packages": package_versions(),
                "episodes": str(episodes_path.resolve()) if episodes_path else None,
                "episodes_table": table_hash(frame),
                "source": fingerprint,
                "source_digest": (fingerprint or {}).get("digest"),
                "options": asdict(options),
                "parameters": {"threads": threads, "memory_limit": memory_limit},
                "rows": {name: getattr(tables, name).height for name in OUTPUT_FILES},
                "files": {name: path.name for name, path in written.items()},
                "tables": table_hashes(staging),
                "started": started,
                "finished": utc_now(),
            }
            text = json.dumps(manifest, indent=2, sort_keys=True, default=str) + "\n"
            (staging / "features_manifest.json").write_text(text, encoding="utf-8")
    return tables

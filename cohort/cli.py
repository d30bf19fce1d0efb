"""The ``dka-cohort`` command.

Each subcommand is a thin wrapper over a public Python function; errors the toolkit raises on
purpose (:class:`cohort.CohortError`) become one line on standard error and exit code 2, as do
bad arguments. Nothing here does analysis itself.
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path

from cohort import __version__
from cohort._errors import CohortError, InputError

PROG = "dka-cohort"


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line, with a pointer to ``--help``."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: error: {message} (see `{self.prog} --help`)\n")
        raise SystemExit(2)


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        msg = f"must be a whole number greater than 0, got {text!r}"
        raise argparse.ArgumentTypeError(msg) from None
    if value <= 0:
        msg = f"must be a whole number greater than 0, got {value}"
        raise argparse.ArgumentTypeError(msg)
    return value


def _non_negative_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        msg = f"must be a whole number of 0 or more, got {text!r}"
        raise argparse.ArgumentTypeError(msg) from None
    if value < 0:
        msg = f"must be a whole number of 0 or more, got {value}"
        raise argparse.ArgumentTypeError(msg)
    return value


# ---------------------------------------------------------------------------------------------
# subcommands


def _synth(args: argparse.Namespace, **extra: object):  # noqa: ANN202 - returns SynthSummary
    """Run the generator, turning its argument errors into the toolkit's one-line errors."""
    from synthetic import SynthError, generate_extract

    try:
        return generate_extract(
            persons=args.persons,
            seed=args.seed,
            out=Path(args.out),
            force=args.force,
            progress=not args.quiet,
            **extra,
        )
    except SynthError as exc:
        raise InputError(str(exc)) from exc


def _cmd_synth(args: argparse.Namespace) -> int:
    started = time.perf_counter()
    summary = _synth(args, chunk_persons=args.chunk_persons)
    seconds = time.perf_counter() - started
    print(f"extract written to {summary.extract_dir}")
    print(f"ground truth written to {summary.truth_dir}")
    print(f"{summary.persons:,} persons, {summary.measurement_rows:,} measurement rows in {seconds:.1f} s")
    return 0


def _overrides(pairs: Sequence[str]) -> dict[str, object]:
    from cohort.definitions import parse_override

    return dict(parse_override(pair) for pair in pairs)


def _cmd_episodes(args: argparse.Namespace) -> int:
    from cohort.episodes import find_episodes

    if args.engine != "duckdb":  # the recipes run inside PostgreSQL or Spark; same output folder
        from cohort.engines import episodes_command

        return episodes_command(args)
    if not args.source:
        msg = "--source is required with --engine duckdb (a Parquet folder, a CSV folder or a DuckDB file)"
        raise InputError(msg)
    result = find_episodes(
        Path(args.source),
        args.definition or ["consensus-2024"],
        out=Path(args.out),
        overrides=_overrides(args.set),
        codelists=Path(args.codelists) if args.codelists else None,
        threads=args.threads,
        memory_limit=args.memory_limit,
        progress=not args.quiet,
    )
    counts = result.episodes.group_by("definition").len().sort("definition")
    for definition, episodes in counts.iter_rows():
        print(f"{definition}: {episodes:,} episodes")
    print(f"episodes written to {Path(args.out).resolve()}")
    return 0


def _cmd_features(args: argparse.Namespace) -> int:
    from cohort.features import options_from_pairs, run_features

    tables = run_features(
        Path(args.episodes),
        Path(args.source),
        Path(args.out),
        options=options_from_pairs(args.set),
        threads=args.threads,
        memory_limit=args.memory_limit,
    )
    print(f"{tables.episode_features.height:,} episode rows with features written to {Path(args.out).resolve()}")
    return 0


def _cmd_analyse(args: argparse.Namespace) -> int:
    from cohort.analyse import is_note, run_analyses

    summary = run_analyses(Path(args.features), Path(args.out), definition=args.definition)
    print(f"{len(summary.written)} result tables for {summary.definition} written to {summary.out.resolve()}")
    for name, reason in summary.skipped.items():
        print(f"  {'note' if is_note(name) else 'not run'}: {name}: {reason}")
    return 0


def _cmd_report(args: argparse.Namespace) -> int:
    from cohort.report import write_report

    summary = write_report(Path(args.results), Path(args.out), threshold=args.threshold)
    print(f"report written to {summary.out_file.resolve()}")
    print(f"tables behind it (after disclosure control) in {summary.tables_dir.resolve()}")
    for part, reason in summary.skipped:
        print(f"  not shown: {part}: {reason}")
    return 0


def _cmd_check_disclosure(args: argparse.Namespace) -> int:
    from cohort.report import check_disclosure

    path = Path(args.path)
    if not path.exists():
        msg = f"no file or folder at {path}; give a report, a CSV file or a folder of them"
        raise InputError(msg)
    violations = check_disclosure(path, threshold=args.threshold)
    for violation in violations:
        print(violation)
    if violations:
        sys.stderr.write(f"{PROG}: {len(violations)} cell(s) break the disclosure rule (threshold {args.threshold})\n")
        return 1
    print(f"no cell breaks the disclosure rule (threshold {args.threshold}) in {path}")
    return 0


def _cmd_verify(args: argparse.Namespace) -> int:
    from cohort.verify import verify_results

    report = verify_results(
        Path(args.results),
        Path(args.source),
        threads=args.threads,
        memory_limit=args.memory_limit,
        keep=Path(args.keep) if args.keep else None,
    )
    print("\n".join(report.lines()))
    return report.exit_code


def _cmd_sql(args: argparse.Namespace) -> int:
    from cohort.definitions import load_definition
    from cohort.engines import sql_command

    definition = load_definition(args.definition, overrides=_overrides(args.set))
    sys.stdout.write(sql_command(args.dialect, definition, Path(args.out) if args.out else None).rstrip("\n") + "\n")
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from cohort._outputs import output_folder
    from cohort.analyse import run_analyses
    from cohort.definitions import list_definitions
    from cohort.episodes import find_episodes
    from cohort.features import run_features
    from cohort.report import write_report
    from cohort.source import open_extract

    out = Path(args.out).expanduser().absolute()
    started = time.perf_counter()

    def lap(label: str) -> None:
        if not args.quiet:
            print(f"[{time.perf_counter() - started:6.1f} s] {label}")

    # the whole demo folder is staged beside OUT under OUT.lock and moved into place when the
    # report is written; an earlier demo folder (it holds report.html) is replaced only then
    with output_folder(out, command="demo", markers=("report.html",)) as staging:
        summary = _synth(argparse.Namespace(**{**vars(args), "out": str(staging), "force": True}))
        lap(f"synthetic extract: {summary.persons:,} persons, {summary.measurement_rows:,} measurement rows")
        with open_extract(summary.extract_dir) as extract:  # one session: lab events are prepared once
            result = find_episodes(extract, list_definitions(), out=staging / "episodes", progress=False)
            counts = result.episodes.group_by("definition").len().sort("definition")
            lap("episodes: " + ", ".join(f"{name} {count:,}" for name, count in counts.iter_rows()))
            tables = run_features(result.episodes, extract, staging / "features")
            lap(f"features: {tables.episode_features.height:,} episode rows")
        analysed = run_analyses(staging / "features", staging / "stats", definition=args.definition)
        lap(f"statistics ({analysed.definition}): {len(analysed.written)} tables, {len(analysed.skipped)} not run")
        write_report(staging, staging / "report.html")
        lap("report written")
    print(f"demo extract:  {out / summary.extract_dir.name}")
    print(f"ground truth:  {out / summary.truth_dir.name}")
    print(f"results:       {out}/episodes, features, stats")
    print(f"report:        {out / 'report.html'}")
    print(f"demo finished in {time.perf_counter() - started:.1f} s")
    return 0


# ---------------------------------------------------------------------------------------------
# parser


def _add_synth_options(parser: argparse.ArgumentParser, *, default_persons: int) -> None:
    parser.add_argument(
        "--persons",
        type=_positive_int,
        default=default_persons,
        help=f"number of persons to generate (default {default_persons:,})",
    )
    parser.add_argument("--seed", type=_non_negative_int, default=20261201, help="random seed (default 20261201)")
    parser.add_argument("--force", action="store_true", help="replace the output folder if it is not empty")
    parser.add_argument("--quiet", action="store_true", help="do not show progress")


def _add_engine_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--threads", type=_positive_int, help="DuckDB worker threads (default: one per core)")
    parser.add_argument("--memory-limit", help="DuckDB memory limit, e.g. 4GB (default: DuckDB's)")


def build_parser() -> argparse.ArgumentParser:
    """Build the argument parser of the ``dka-cohort`` command."""
    parser = _Parser(
        prog=PROG,
        description=(
            "Find diabetic ketoacidosis episodes in OMOP CDM extracts from lab results and measure "
            "what happens to them. For research, audit and teaching; not for decisions about an "
            "individual patient."
        ),
    )
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    synth = sub.add_parser(
        "synth",
        help="write a synthetic OMOP CDM extract with known ground truth",
        description=(
            "Write a synthetic OMOP CDM v5.4 extract of the fictional Harrowmere Valley Health "
            "network under OUT/extract and its ground truth under OUT/truth."
        ),
    )
    _add_synth_options(synth, default_persons=5_000)
    synth.add_argument("--out", required=True, help="output folder (extract/ and truth/ go inside)")
    synth.add_argument(
        "--chunk-persons",
        type=_positive_int,
        default=50_000,
        help="persons generated per chunk; bounds peak memory (default 50,000)",
    )
    synth.set_defaults(func=_cmd_synth)

    episodes = sub.add_parser(
        "episodes",
        help="find DKA episodes in an extract by one or more guideline definitions",
        description=(
            "Find DKA episodes from lab results by published guideline definitions and write "
            "episodes.parquet, attrition.csv, quarantine.parquet, data_quality.csv, "
            "agreement.csv and manifest.json under OUT."
        ),
    )
    episodes.add_argument(
        "--source",
        help=("the extract: a Parquet folder, a CSV folder or a DuckDB file (with --engine spark, a Parquet "
              "folder Spark can read; not used with --engine postgres)"),
    )
    episodes.add_argument(
        "--definition",
        action="append",
        metavar="NAME",
        help=(
            "a bundled definition (ada-2009, consensus-2024, jbds-2023, ispad-2022) or a definition "
            "file; repeat for several (default consensus-2024)"
        ),
    )
    episodes.add_argument("--out", required=True, help="output folder (new, empty, or an earlier run's)")
    episodes.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="override a definition value for every definition, e.g. timing.episode_gap_hours=48; repeatable",
    )
    episodes.add_argument("--codelists", help="a folder of code-list CSVs replacing the bundled ones")
    _add_engine_options(episodes)
    from cohort.engines._episodes import add_engine_arguments  # --engine, --dsn, --schema, --spark-master

    add_engine_arguments(episodes)
    episodes.add_argument("--quiet", action="store_true", help="do not show progress")
    episodes.set_defaults(func=_cmd_episodes)

    features = sub.add_parser(
        "features",
        help="derive episode features (timings, infusion closure, standards, recurrence)",
        description=(
            "Derive the analysis tables from an episodes folder and its extract: episode_features, "
            "person_summary, person_time, counting_process, unlinked_infusions, audit_summary and "
            "data_dictionary, under OUT."
        ),
    )
    features.add_argument("--episodes", required=True, help="the folder `dka-cohort episodes` wrote")
    features.add_argument("--source", required=True, help="the extract the episodes came from")
    features.add_argument("--out", required=True, help="output folder")
    features.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="a feature option, e.g. hypoglycaemia_mmol_l=4.0; repeatable",
    )
    _add_engine_options(features)
    features.set_defaults(func=_cmd_features)

    analyse = sub.add_parser(
        "analyse",
        help="estimate time to resolution, recurrence and rates from feature tables",
        description=(
            "Kaplan-Meier, competing risks, Cox models with proportional-hazards checks, recurrent-"
            "event and logistic models, a recurrence prediction model and incidence rates, for one "
            "definition; CSV tables under OUT."
        ),
    )
    analyse.add_argument("--features", required=True, help="the folder `dka-cohort features` wrote")
    analyse.add_argument("--definition", default="consensus-2024", help="which definition's episodes (default consensus-2024)")
    analyse.add_argument("--out", required=True, help="output folder for the result tables")
    analyse.set_defaults(func=_cmd_analyse)

    report = sub.add_parser(
        "report",
        help="write the self-contained HTML report, with disclosure control",
        description=(
            "Write one self-contained HTML file (works offline) from a results folder holding "
            "episodes/, features/ and stats/, plus the disclosure-controlled CSV tables behind it."
        ),
    )
    report.add_argument("--results", required=True, help="results folder (episodes/, features/, stats/)")
    report.add_argument("--out", required=True, help="the HTML file to write")
    report.add_argument("--threshold", type=_positive_int, default=10, help="smallest count shown (default 10)")
    report.set_defaults(func=_cmd_report)

    check = sub.add_parser(
        "check-disclosure",
        help="scan outputs for cells that break the disclosure rule",
        description="Scan a report, a CSV file or a folder of them; exit 1 if any cell breaks the rule.",
    )
    check.add_argument("path", metavar="FILE_OR_DIR", help="what to scan")
    check.add_argument("--threshold", type=_positive_int, default=10, help="smallest count allowed (default 10)")
    check.set_defaults(func=_cmd_check_disclosure)

    verify = sub.add_parser(
        "verify",
        help="rerun a results folder from its manifest and report any table that differs",
        description=(
            "Rerun the episodes, features and statistics recorded in RESULTS_DIR's manifests on the "
            "extract given, then compare every table by content hash: same, different (with the first "
            "differing row) or missing. Exit 0 when identical, 1 when anything differs, 2 on error."
        ),
    )
    verify.add_argument("results", metavar="RESULTS_DIR", help="a stage folder (episodes/, features/, stats/) or the folder holding them")
    verify.add_argument("--source", required=True, help="the extract the results were made from")
    verify.add_argument("--keep", help="keep the rerun in this new or empty folder (default: a temporary folder, removed)")
    _add_engine_options(verify)
    verify.set_defaults(func=_cmd_verify)

    sql = sub.add_parser(
        "sql",
        help="print the recipes rendered for another SQL engine",
        description=(
            "Render every recipe with one definition's values for a SQL engine, through sqlglot; a "
            "construct the engine cannot run is refused with the recipe named, never passed on."
        ),
    )
    sql.add_argument(
        "--dialect",
        required=True,
        choices=["duckdb", "postgres", "spark", "bigquery", "snowflake", "tsql"],
        help="the target engine",
    )
    sql.add_argument("--definition", default="consensus-2024", help="definition whose values fill the recipes")
    sql.add_argument("--set", action="append", default=[], metavar="KEY=VALUE", help="override a definition value; repeatable")
    sql.add_argument("--out", help="write one .sql file per recipe into this folder instead of printing")
    sql.set_defaults(func=_cmd_sql)

    demo = sub.add_parser(
        "demo",
        help="run the whole pipeline on a small synthetic extract",
        description=(
            "Generate a small synthetic extract, find episodes by every bundled definition, derive "
            "features, run the statistics and write the report, all under OUT."
        ),
    )
    _add_synth_options(demo, default_persons=5_000)
    demo.add_argument("--out", default="demo-output", help="output folder (default demo-output)")
    demo.add_argument(
        "--definition", default="consensus-2024", help="definition analysed by the statistics stage (default consensus-2024)"
    )
    demo.set_defaults(func=_cmd_demo)
    return parser


def _note(message: Warning | str, category: type[Warning], filename: str, lineno: int,
          file: object = None, line: str | None = None) -> None:
    if category.__module__.startswith("cohort"):
        sys.stderr.write(f"{PROG}: note: {message}\n")
    else:
        sys.stderr.write(warnings.formatwarning(message, category, filename, lineno, line))


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``dka-cohort`` command; return its exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    func: Callable[[argparse.Namespace], int] = args.func
    try:
        with warnings.catch_warnings():
            # our own warnings (an empty table, a stale lock taken over) are one-line notes
            warnings.showwarning = _note
            return func(args)
    except CohortError as exc:
        sys.stderr.write(f"{PROG}: error: {exc}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write(f"{PROG}: interrupted\n")
        return 130
    except Exception as exc:  # noqa: BLE001 - only the engine's own errors are turned into one line
        if not type(exc).__module__.lstrip("_").startswith("duckdb"):
            raise
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        sys.stderr.write(
            f"{PROG}: error: the DuckDB engine stopped while working ({type(exc).__name__}: {first}). "
            "If it names a file, that file may be damaged (re-export it); if it names memory or disk, "
            "raise --memory-limit or free space in the temporary folder; no result was written.\n")
        return 2


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())


__all__ = ["build_parser", "main", "InputError"]

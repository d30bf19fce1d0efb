"""The ``dka-cohort`` command.

Each subcommand is a thin wrapper over a public Python function; errors the toolkit raises on
purpose (:class:`cohort.CohortError`) become one line on standard error and exit code 2, as do
bad arguments. Nothing here does analysis itself.
"""

from __future__ import annotations

import argparse
import sys
import time
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


def _cmd_demo(args: argparse.Namespace) -> int:
    out = Path(args.out)
    started = time.perf_counter()
    summary = _synth(args)
    print(f"demo extract: {summary.extract_dir}")
    print(f"ground truth: {summary.truth_dir}")
    print(f"demo finished in {time.perf_counter() - started:.1f} s; output under {out.resolve()}")
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
    episodes.add_argument("--source", required=True, help="the extract: a Parquet folder, a CSV folder or a DuckDB file")
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
    episodes.add_argument("--threads", type=_positive_int, help="DuckDB worker threads (default: one per core)")
    episodes.add_argument("--memory-limit", help="DuckDB memory limit, e.g. 4GB (default: DuckDB's)")
    episodes.add_argument("--quiet", action="store_true", help="do not show progress")
    episodes.set_defaults(func=_cmd_episodes)

    demo = sub.add_parser(
        "demo",
        help="run the whole pipeline on a small synthetic extract",
        description="Generate a small synthetic extract and run every stage of the pipeline on it.",
    )
    _add_synth_options(demo, default_persons=5_000)
    demo.add_argument("--out", default="demo-output", help="output folder (default demo-output)")
    demo.set_defaults(func=_cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``dka-cohort`` command; return its exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    func: Callable[[argparse.Namespace], int] = args.func
    try:
        return func(args)
    except CohortError as exc:
        sys.stderr.write(f"{PROG}: error: {exc}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write(f"{PROG}: interrupted\n")
        return 130


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())


__all__ = ["build_parser", "main", "InputError"]

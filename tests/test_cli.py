"""The `dka-cohort` command: help on every subcommand, version, one-line errors (issue 2)."""

from __future__ import annotations

import subprocess
import sys

import pytest

from cohort import __version__
from cohort.cli import build_parser, main


def _subcommands() -> list[str]:
    parser = build_parser()
    for action in parser._actions:  # argparse keeps subparsers here
        if action.__class__.__name__ == "_SubParsersAction":
            return sorted(action.choices)
    raise AssertionError("dka-cohort has no subcommands")


def test_version_is_printed(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["--version"])
    assert exit_info.value.code == 0
    assert capsys.readouterr().out.strip() == f"dka-cohort {__version__}"


@pytest.mark.parametrize("command", _subcommands())
def test_every_subcommand_has_help(command: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main([command, "--help"])
    assert exit_info.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith(f"usage: dka-cohort {command}")
    assert "--" in out  # lists its options


@pytest.mark.parametrize(
    ("argv", "fragment"),
    [
        (["synth", "--persons", "0", "--out", "x"], "--persons: must be a whole number greater than 0, got 0"),
        (["synth", "--persons", "many", "--out", "x"], "--persons: must be a whole number greater than 0, got 'many'"),
        (["synth", "--persons", "10"], "the following arguments are required: --out"),
        (["no-such-command"], "invalid choice: 'no-such-command'"),
        ([], "the following arguments are required: COMMAND"),
    ],
)
def test_bad_arguments_give_one_line_and_exit_2(
    argv: list[str], fragment: str, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(argv)
    assert exit_info.value.code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1, err
    assert fragment in err
    assert "Traceback" not in err


def test_module_entry_point_runs_as_a_process() -> None:
    done = subprocess.run(
        [sys.executable, "-m", "cohort.cli", "synth", "--persons", "-3", "--out", "x"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert done.returncode == 2
    assert done.stderr.startswith("dka-cohort synth: error:")
    assert "Traceback" not in done.stderr


def test_an_engine_error_during_heavy_work_is_one_line(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], tmp_path
) -> None:
    # a Parquet file with a valid footer but damaged pages fails only when DuckDB reads the pages
    import duckdb

    import cohort.episodes

    def damaged(*args: object, **kwargs: object) -> None:
        raise duckdb.IOException("Could not read page 3 of file 'measurement.parquet'\nmore detail")

    monkeypatch.setattr(cohort.episodes, "find_episodes", damaged)
    code = main(["episodes", "--source", str(tmp_path), "--definition", "consensus-2024", "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1, err
    assert "measurement.parquet" in err and "IOException" in err
    assert "Traceback" not in err


def test_other_errors_are_not_hidden(monkeypatch: pytest.MonkeyPatch) -> None:
    import cohort.episodes

    def broken(*args: object, **kwargs: object) -> None:
        raise ZeroDivisionError("a bug, not bad input")

    monkeypatch.setattr(cohort.episodes, "find_episodes", broken)
    with pytest.raises(ZeroDivisionError):
        main(["episodes", "--source", "x", "--definition", "consensus-2024", "--out", "o"])


def test_episodes_engine_postgres_without_dsn_is_one_line(capsys: pytest.CaptureFixture[str], tmp_path) -> None:
    code = main(["episodes", "--engine", "postgres", "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "--dsn" in err, err
    assert not (tmp_path / "o").exists()

"""Loading, validating and overriding definition files (cohort.definitions).

The checks here are about the file format and its messages (DESIGN.md "Definitions", STYLE.md
habit 5); the clinical numbers are checked in test_definitions_content.py.
"""

from __future__ import annotations

import doctest
import json
from pathlib import Path

import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

import cohort._compile
import cohort.definitions
from cohort._errors import DefinitionError
from cohort.definitions import (
    Definition,
    Timing,
    list_definitions,
    load_definition,
    parse_definition,
    parse_override,
)

BUNDLED = ["ada-2009", "consensus-2024", "ispad-2022", "jbds-2023"]


def _minimal() -> dict:
    """A small valid definition in the YAML shape (numbers are arbitrary test input)."""
    return {
        "name": "my-study",
        "title": "A user's own definition",
        "citation": {"authors": "Doe J", "title": "A local protocol", "publisher": "Harrowmere Valley Health", "year": 2025},
        "diagnosis": {"all_of": [{"analyte": "bhb", "op": ">=", "value": 3.0}, {"analyte": "ph", "op": "<", "value": 7.3}]},
        "resolution": {"when": {"analyte": "bhb", "op": "<", "value": 0.6}},
    }


def _write(tmp_path: Path, data: object, name: str = "mine.yaml") -> Path:
    path = tmp_path / name
    path.write_text(yaml.safe_dump(data, sort_keys=False) if not isinstance(data, str) else data, encoding="utf-8")
    return path


def _message(excinfo: pytest.ExceptionInfo) -> str:
    return str(excinfo.value)


# --------------------------------------------------------------------------- bundled files
def test_list_definitions() -> None:
    assert list_definitions() == BUNDLED


@pytest.mark.parametrize("name", BUNDLED)
def test_bundled_files_load_and_round_trip(name: str) -> None:
    definition = load_definition(name)
    assert isinstance(definition, Definition)
    assert definition.origin == name
    again = parse_definition(definition.to_dict())
    assert again == definition
    assert again.sha256() == definition.sha256()
    json.dumps(definition.to_dict(), allow_nan=False)  # plain JSON data


def test_hashes_differ_between_definitions_and_are_stable() -> None:
    hashes = {name: load_definition(name).sha256() for name in BUNDLED}
    assert len(set(hashes.values())) == len(BUNDLED)
    assert all(len(value) == 64 and int(value, 16) >= 0 for value in hashes.values())
    assert hashes == {name: load_definition(name).sha256() for name in BUNDLED}


def test_hash_ignores_layout_key_order_comments_and_number_spelling(tmp_path: Path) -> None:
    data = _minimal()
    first = _write(tmp_path, data, "a.yaml")
    text = (
        "# a comment\n"
        "resolution: {when: {value: 0.60, op: '<', analyte: bhb}}\n"
        "diagnosis:\n  all_of:\n    - {value: 3, op: '>=', analyte: bhb}\n    - {analyte: ph, op: '<', value: 7.30}\n"
        "citation: {year: 2025, publisher: Harrowmere Valley Health, title: A local protocol, authors: Doe J}\n"
        "title: A user's own definition\nname: my-study\n"
    )
    second = _write(tmp_path, text, "b.yaml")
    assert load_definition(first).sha256() == load_definition(second).sha256()
    assert load_definition(str(first)) == load_definition(second)


def test_unknown_bundled_name_lists_the_bundled_ones_with_a_did_you_mean() -> None:
    with pytest.raises(DefinitionError) as caught:
        load_definition("consensus-2042")
    message = _message(caught)
    assert "no bundled definition named 'consensus-2042'" in message
    assert "did you mean `consensus-2024`?" in message
    for name in BUNDLED:
        assert name in message
    with pytest.raises(DefinitionError, match="Bundled definitions are: ada-2009"):
        load_definition("who-2030")


def test_missing_file_is_named(tmp_path: Path) -> None:
    with pytest.raises(DefinitionError, match=r"not found"):
        load_definition(tmp_path / "nope.yaml")


# --------------------------------------------------------------------------- YAML errors
def test_yaml_syntax_error_gives_file_and_line(tmp_path: Path) -> None:
    path = _write(tmp_path, "name: my-study\ntitle: x\ndiagnosis: {all_of: [\n  - broken\n", "bad.yaml")
    with pytest.raises(DefinitionError) as caught:
        load_definition(path)
    message = _message(caught)
    assert f"{path}:" in message
    line = int(message.split(f"{path}:")[1].split(":")[0])
    assert 3 <= line <= 5


def test_yaml_key_written_twice_is_refused_with_its_line(tmp_path: Path) -> None:
    text = yaml.safe_dump(_minimal(), sort_keys=False) + "title: a second title\n"
    path = _write(tmp_path, text, "twice.yaml")
    with pytest.raises(DefinitionError) as caught:
        load_definition(path)
    message = _message(caught)
    assert "found the key 'title' twice" in message
    assert f"{path}:{len(text.splitlines())}:" in message


def test_file_that_is_not_a_mapping(tmp_path: Path) -> None:
    with pytest.raises(DefinitionError, match="must hold a mapping"):
        load_definition(_write(tmp_path, "- a\n- b\n", "list.yaml"))


# --------------------------------------------------------------------------- validation messages
@pytest.mark.parametrize(
    ("change", "message"),
    [
        (lambda d: d["resolution"].update(when={"all_of": [{"analyte": "bhb", "op": "<", "value": "low"}]}),
         "definition `my-study`: `resolution.when.all_of[0].value` must be a number, got 'low'"),
        (lambda d: d["diagnosis"]["all_of"].append({"analyte": "ketones", "op": ">=", "value": 3}),
         "`diagnosis.all_of[2].analyte` must be an analyte from the closed list, got 'ketones'; did you mean `bhb`?"),
        (lambda d: d.update(severty=None), "`severty` is not a known field; did you mean `severity`?"),
        (lambda d: d.update(timing={"episode_gap_hour": 48}),
         "`timing.episode_gap_hour` is not a known field; did you mean `episode_gap_hours`?"),
        (lambda d: d.update(timing={"episode_gap_hours": True}), "`timing.episode_gap_hours` must be a number in (0, 2160], got True"),
        (lambda d: d.update(timing={"ph_specimens": "venous"}), "`timing.ph_specimens` must be a list drawn from arterial"),
        (lambda d: d.update(timing={"ph_specimens": []}), "`timing.ph_specimens` must name at least one of"),
        (lambda d: d.update(timing={"ph_specimens": ["venous", "venous"]}), "names a specimen twice"),
        (lambda d: d.update(timing={"bicarbonate_specimens": ["serum", "totalco2"]}),
         "`timing.bicarbonate_specimens` may hold only serum, blood, arterial, venous, total_co2, got 'totalco2'; did you mean `total_co2`?"),
        (lambda d: d.update(population={"min_age_years": 18, "max_age_years": 18}),
         "`population.max_age_years` must be greater than `min_age_years` (18), got 18"),
        (lambda d: d.update(population={"min_age_years": -1}), "`population.min_age_years` must be a number in [0, 130], got -1"),
        (lambda d: d.update(name="My Study; drop table person"), "`name` must be 1-64 characters of lower-case letters"),
        (lambda d: d.pop("diagnosis"), "`diagnosis` is required"),
        (lambda d: d["citation"].pop("publisher"), "`citation.journal` needs a `journal` (articles) or a `publisher`"),
        (lambda d: d.update(severity={"reading": "r", "grades": [{"grade": "mild", "when": {"analyte": "ph", "op": "<", "value": 7.3}},
                                                                  {"grade": "severe", "when": {"analyte": "ph", "op": "<", "value": 7.0}}]}),
         "`severity.grades` must list the grades worst first (severe, mild), got mild, severe"),
        (lambda d: d.update(severity={"reading": "r", "grades": [{"grade": "critical", "when": {"flag": "known_diabetes"}}]}),
         "`severity.grades[0].grade` must be one of severe, moderate, mild, got 'critical'"),
        (lambda d: d.update(severity={"grades": [{"grade": "severe", "when": {"flag": "known_diabetes"}}]}), "`severity.reading` is required"),
    ],
)
def test_invalid_content_names_the_field_the_value_and_what_is_allowed(change, message: str) -> None:
    data = _minimal()
    change(data)
    with pytest.raises(DefinitionError) as caught:
        parse_definition(data)
    assert message in _message(caught)


def test_every_error_is_reported_at_once() -> None:
    data = _minimal()
    data["diagnosis"]["all_of"][0]["value"] = "high"
    data["resolution"]["when"]["op"] = "=="
    with pytest.raises(DefinitionError) as caught:
        parse_definition(data)
    assert len(caught.value.messages) == 2
    assert "`diagnosis.all_of[0].value`" in caught.value.messages[0]
    assert "`resolution.when.op`" in caught.value.messages[1]


@pytest.mark.parametrize(
    "text",
    [
        "{analyte: 'glucose; drop table person', op: '<', value: 1}",
        "{analyte: glucose, op: '< 1; drop table person; --', value: 1}",
        "{analyte: glucose, op: '<', value: '1 or 1=1'}",
        "{analyte: \"glu'cose\", op: '<', value: 1}",
        "{analyte: glucose /* x */, op: '<', value: 1}",
        "{analyte: glucose, op: '<', value: .nan}",
        "{analyte: glucose, op: '<', value: .inf}",
        "{analyte: glucose, op: '<', value: yes}",
        "{sql: 'select 1'}",
    ],
)
def test_injection_attempts_in_a_users_file_are_refused(tmp_path: Path, text: str) -> None:
    body = yaml.safe_dump(_minimal(), sort_keys=False).replace(
        "resolution:\n  when:\n    analyte: bhb\n    op: <\n    value: 0.6\n", f"resolution:\n  when: {text}\n"
    )
    assert text in body
    with pytest.raises(DefinitionError) as caught:
        load_definition(_write(tmp_path, body))
    assert "`resolution.when" in _message(caught)


# --------------------------------------------------------------------------- overrides
def test_valid_overrides_change_the_values_and_the_hash() -> None:
    base = load_definition("consensus-2024")
    changed = load_definition(
        "consensus-2024", overrides={"timing.episode_gap_hours": 48, "timing.ph_specimens": ["venous"]}
    )
    assert changed.timing.episode_gap_hours == 48.0
    assert changed.timing.ph_specimens == ("venous",)
    assert changed.sha256() != base.sha256()
    assert changed.overrides == {"timing.episode_gap_hours": 48, "timing.ph_specimens": ["venous"]}
    assert base.overrides == {}
    # an override to the value already there leaves the content, and so the hash, alone
    same = load_definition("consensus-2024", overrides={"timing.episode_gap_hours": 72.0})
    assert same.sha256() == base.sha256()


def test_overrides_reach_criteria_by_path() -> None:
    changed = load_definition("jbds-2023", overrides={"resolution.when.all_of[1].value": 7.32})
    assert changed.resolution.when.all_of[1].value == 7.32
    assert changed.sha256() != load_definition("jbds-2023").sha256()


def test_override_on_a_file_without_a_timing_section(tmp_path: Path) -> None:
    path = _write(tmp_path, _minimal())
    definition = load_definition(path, overrides={"timing.diagnosis_lookback_hours": 12})
    assert definition.timing.diagnosis_lookback_hours == 12.0
    assert definition.timing.resolution_lookback_hours == Timing().resolution_lookback_hours


@pytest.mark.parametrize(
    ("overrides", "message"),
    [
        ({"timing.episode_gap_hours": -1}, "`timing.episode_gap_hours` must be a number in (0, 2160], got -1 (set by override"),
        ({"timing.episode_gap_hours": 0}, "must be a number in (0, 2160], got 0"),
        ({"timing.diagnosis_lookback_hours": 100}, "`timing.diagnosis_lookback_hours` must be a number in (0, 72], got 100"),
        ({"timing.resolution_lookback_hours": "4h"}, "`timing.resolution_lookback_hours` must be a number in (0, 48], got '4h'"),
        ({"timing.anion_gap_pairing_minutes": 241}, "`timing.anion_gap_pairing_minutes` must be a number in [0, 240], got 241"),
        ({"timing.rebound_hours": 96}, "`timing.rebound_hours` must not exceed `episode_gap_hours` (72), got 96"),
        ({"timing.ph_specimens": ["venus"]}, "got 'venus'; did you mean `venous`?"),
        ({"timing.episode_gap_hour": 48}, "`timing.episode_gap_hour` is not a known field; did you mean `episode_gap_hours`?"),
        ({"timming.episode_gap_hours": 48}, "`timming` is not a known field; did you mean `timing`?"),
        ({"diagnosis.all_of[7].value": 1}, "`diagnosis.all_of[7]` is not an item of a list"),
        ({"timing..x": 1}, "each part must be a field name"),
    ],
)
def test_invalid_overrides_name_the_field_and_the_allowed_range(overrides: dict, message: str) -> None:
    with pytest.raises(DefinitionError) as caught:
        load_definition("consensus-2024", overrides=overrides)
    assert message in _message(caught)


def test_timing_ranges_and_reasons_are_documented() -> None:
    reasons = Timing.reasons()
    assert set(reasons) == set(Timing.model_fields)
    assert all(len(reason) > 40 for reason in reasons.values())
    assert Timing.ranges()["episode_gap_hours"] == "(0, 2160]"


def test_parse_override_reads_command_line_values() -> None:
    assert parse_override("timing.episode_gap_hours=48") == ("timing.episode_gap_hours", 48)
    assert parse_override(" timing.ph_specimens = [venous] ") == ("timing.ph_specimens", ["venous"])
    assert parse_override("timing.rebound_hours=12.5") == ("timing.rebound_hours", 12.5)
    with pytest.raises(DefinitionError, match="KEY=VALUE"):
        parse_override("timing.episode_gap_hours")
    key, value = parse_override("timing.episode_gap_hours=48; drop table person")
    with pytest.raises(DefinitionError, match="must be a number"):
        load_definition("ada-2009", overrides={key: value})


@settings(max_examples=60, deadline=None)
@given(hours=st.floats(min_value=0.5, max_value=2160, allow_nan=False))
def test_any_gap_in_range_is_accepted_and_changes_the_hash(hours: float) -> None:
    base = load_definition("ada-2009")
    changed = load_definition("ada-2009", overrides={"timing.episode_gap_hours": hours, "timing.rebound_hours": 0.5})
    assert changed.timing.episode_gap_hours == hours
    assert changed.sha256() != base.sha256()


@settings(max_examples=60, deadline=None)
@given(hours=st.one_of(st.floats(max_value=0, allow_nan=False), st.floats(min_value=2160.0001, allow_nan=False), st.just(float("nan"))))
def test_any_gap_out_of_range_is_refused_with_the_range(hours: float) -> None:
    with pytest.raises(DefinitionError) as caught:
        load_definition("ada-2009", overrides={"timing.episode_gap_hours": hours})
    assert "`timing.episode_gap_hours` must be a number in (0, 2160]" in _message(caught)


# --------------------------------------------------------------------------- docstring examples
@pytest.mark.parametrize("module", [cohort._compile, cohort.definitions])
def test_docstring_examples_run(module: object) -> None:
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0
    assert result.failed == 0

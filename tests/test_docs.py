"""Documentation that is generated from code stays in step with it (issue 4: data dictionary)."""

from __future__ import annotations

from pathlib import Path

from cohort.features import data_dictionary, data_dictionary_markdown

ROOT = Path(__file__).resolve().parents[1]


def test_data_dictionary_page_matches_the_code() -> None:
    page = (ROOT / "docs" / "data_dictionary.md").read_text(encoding="utf-8")
    assert data_dictionary_markdown().strip() in page


def test_every_episode_feature_contract_column_is_defined() -> None:
    # the features contract of DESIGN.md names these columns at least
    contract = {
        "episode_id", "person_id", "definition", "arrival_datetime", "insulin_start_datetime",
        "insulin_end_datetime", "hours_arrival_to_insulin", "hours_to_resolution", "hours_on_infusion",
        "is_premature_closure", "hours_basal_before_closure", "has_hypoglycaemia", "has_hypokalaemia",
        "days_to_next_episode", "recurs_within_30d", "recurs_within_90d", "recurs_within_365d",
    }
    dictionary = data_dictionary()
    defined = set(dictionary.filter(dictionary["table"] == "episode_features")["column"].to_list())
    assert contract <= defined, sorted(contract - defined)
    assert dictionary["definition"].str.len_chars().min() > 10

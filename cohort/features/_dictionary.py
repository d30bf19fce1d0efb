"""The data dictionary of every feature table, rendered from the builders' column specifications."""

from __future__ import annotations

import polars as pl

from cohort.features._audit import AUDIT_COLUMNS
from cohort.features._columns import Column, type_name
from cohort.features._episode import EPISODE_COLUMNS
from cohort.features._infusions import UNLINKED_COLUMNS
from cohort.features._person_time import PERSON_TIME_COLUMNS
from cohort.features._recurrence import COUNTING_COLUMNS, PERSON_COLUMNS

__all__ = ["TABLE_COLUMNS", "TABLE_PURPOSES", "data_dictionary", "data_dictionary_markdown"]

#: table name -> its columns, in output order
TABLE_COLUMNS: dict[str, tuple[Column, ...]] = {
    "episode_features": EPISODE_COLUMNS,
    "person_summary": PERSON_COLUMNS,
    "person_time": PERSON_TIME_COLUMNS,
    "counting_process": COUNTING_COLUMNS,
    "unlinked_infusions": UNLINKED_COLUMNS,
    "audit_summary": AUDIT_COLUMNS,
}

TABLE_PURPOSES: dict[str, str] = {
    "episode_features": "one row per episode and definition",
    "person_summary": "one row per person of the extract and definition",
    "person_time": "one row per definition, calendar year, age in years, sex and diabetes type (for incidence rates)",
    "counting_process": "one row per interval at risk of recurrence (total time and gap time)",
    "unlinked_infusions": "one row per definition and intravenous insulin infusion linked to no episode",
    "audit_summary": "one row per definition, hospital, month (or all) and measure",
}


def data_dictionary() -> pl.DataFrame:
    """Every output column of the feature tables with its type, unit and definition.

    Returns
    -------
    polars.DataFrame
        Columns table, column, type, unit, definition; one row per output column.

    Examples
    --------
    >>> dictionary = data_dictionary()
    >>> dictionary.filter(pl.col("column") == "hours_on_infusion").select("table", "unit").row(0)
    ('episode_features', 'hours')
    """
    rows = [
        {
            "table": table,
            "column": column.name,
            "type": type_name(column.dtype),
            "unit": column.unit,
            "definition": column.definition,
        }
        for table, columns in TABLE_COLUMNS.items()
        for column in columns
    ]
    return pl.DataFrame(rows, schema={name: pl.String() for name in ("table", "column", "type", "unit", "definition")})


def data_dictionary_markdown(table: str | None = None) -> str:
    """The data dictionary as markdown tables (one per feature table), for the README or docs.

    Parameters
    ----------
    table
        Only this table (e.g. ``"episode_features"``); all tables when None.

    Examples
    --------
    >>> print(data_dictionary_markdown("unlinked_infusions").splitlines()[0])
    ### unlinked_infusions
    """
    if table is not None and table not in TABLE_COLUMNS:
        from cohort._errors import InputError

        msg = f"no feature table named {table!r}; tables are {', '.join(TABLE_COLUMNS)}"
        raise InputError(msg)
    parts = []
    for name, columns in TABLE_COLUMNS.items():
        if table is not None and name != table:
            continue
        lines = [
            f"### {name}",
            "",
            f"{TABLE_PURPOSES[name].capitalize()}.",
            "",
            "| column | type | unit | definition |",
            "|---|---|---|---|",
        ]
        for column in columns:
            definition = column.definition.replace("|", "\\|")
            lines.append(f"| `{column.name}` | {type_name(column.dtype)} | {column.unit} | {definition} |")
        parts.append("\n".join(lines))
    return "\n\n".join(parts) + "\n"

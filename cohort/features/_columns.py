"""Column specifications: the one source of every output column's name, type, unit and meaning.

Each builder module declares the columns it produces as a tuple of :class:`Column`; the builders
select and cast their output through :func:`conform`, and :mod:`cohort.features._dictionary`
renders the same tuples into ``data_dictionary.csv`` and a markdown table. A column cannot appear
in an output without a line in the dictionary.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import polars as pl

from cohort._errors import SchemaError

__all__ = ["Column", "conform", "type_name"]

DATETIME = pl.Datetime("us")

_TYPE_NAMES: dict[type[pl.DataType], str] = {
    pl.Int64: "int64",
    pl.Int32: "int32",
    pl.Float64: "float64",
    pl.String: "string",
    pl.Boolean: "boolean",
    pl.Datetime: "datetime",
    pl.Date: "date",
}


@dataclass(frozen=True)
class Column:
    """One output column.

    Parameters
    ----------
    name
        Column name (unit and type in the name, as the style guide asks).
    dtype
        Polars data type of the column.
    unit
        Unit of the values (``""`` where none applies).
    definition
        One-line definition, written for the data dictionary.
    """

    name: str
    dtype: pl.DataType
    unit: str
    definition: str


def type_name(dtype: pl.DataType) -> str:
    """Return the dictionary's name for a polars data type (``int64``, ``datetime``, ...).

    Examples
    --------
    >>> type_name(pl.Datetime("us")), type_name(pl.Boolean())
    ('datetime', 'boolean')
    """
    for cls, name in _TYPE_NAMES.items():
        if isinstance(dtype, cls) or dtype == cls:
            return name
    return str(dtype)


def conform(frame: pl.DataFrame, columns: Sequence[Column], *, table: str) -> pl.DataFrame:
    """Select ``columns`` from ``frame`` in dictionary order, cast to the dictionary's types.

    Raises
    ------
    SchemaError
        When the builder did not produce a column the dictionary lists (a programming error,
        reported with the table's name so it is found at once).
    """
    missing = [column.name for column in columns if column.name not in frame.columns]
    if missing:
        msg = (
            f"feature table `{table}`: the builder did not produce column(s) "
            f"{', '.join(missing)} listed in the data dictionary"
        )
        raise SchemaError(msg)
    return frame.select(
        [pl.col(column.name).cast(column.dtype, strict=False) for column in columns]
    )

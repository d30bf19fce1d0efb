"""Bundled standard populations for direct age standardisation (sources in data/README.md)."""

from __future__ import annotations

from importlib import resources

import polars as pl

from cohort._errors import InputError

__all__ = ["STANDARD_POPULATIONS", "standard_population"]

#: Names of the bundled standards and their sources (full citations in data/README.md).
STANDARD_POPULATIONS: dict[str, str] = {
    "esp2013": "European Standard Population 2013 (Eurostat 2013, KS-RA-13-028)",
    "who2000": "WHO World Standard Population 2000-2025 (Ahmad et al. 2001, GPE paper 31)",
}


def standard_population(name: str = "esp2013") -> pl.DataFrame:
    """Return a bundled standard population with weights scaled to sum to 1.

    Parameters
    ----------
    name
        ``esp2013`` (European Standard Population 2013) or ``who2000`` (WHO World Standard
        Population 2000-2025).

    Returns
    -------
    polars.DataFrame
        ``age_band``, ``age_lower``, ``age_upper`` (exclusive; null for the open last band),
        ``population`` (as published, per 100,000) and ``weight`` (sums to 1).

    Examples
    --------
    >>> esp = standard_population("esp2013")
    >>> esp.height, esp["population"].sum()
    (19, 100000)
    """
    if name not in STANDARD_POPULATIONS:
        raise InputError(
            f"unknown standard population {name!r}; choose one of "
            f"{sorted(STANDARD_POPULATIONS)} or pass your own table."
        )
    text = resources.files("cohort.stats").joinpath("data/standard_populations.csv")
    with resources.as_file(text) as path:
        table = pl.read_csv(path, schema_overrides={"age_upper": pl.Int64})
    out = table.filter(pl.col("standard") == name).select(
        "age_band",
        "age_lower",
        "age_upper",
        pl.col("weight").alias("population"),
    )
    return out.with_columns((pl.col("population") / pl.col("population").sum()).alias("weight"))

"""Code lists: load, validate and register them in the DuckDB session.

The bundled code lists (``cohort/codelists/*.csv``) or a user's folder holding the same seven
files are read with polars (every cell as text), checked line by line, and registered as
temporary tables ``dka_codelist_<name>`` through Arrow, never by pasting text into SQL:

================  ========================  =================================================
file              table                     columns (plus ``line``, the CSV line number)
================  ========================  =================================================
labs.csv          dka_codelist_lab          vocabulary_id, concept_code, analyte, specimen,
                                            description, source
units.csv         dka_codelist_unit         analyte, vocabulary_id, concept_code, multiply,
                                            add, low, high, source
ketone_ordinals   dka_codelist_ketone       vocabulary_id, concept_code, text, ordinal, source
conditions.csv    dka_codelist_condition    vocabulary_id, concept_code, match, concept_group,
                                            description, source
drugs.csv         dka_codelist_drug         vocabulary_id, concept_code, drug_class,
                                            description, source
routes.csv        dka_codelist_route        vocabulary_id, concept_code, route, description,
                                            source
visits.csv        dka_codelist_visit        vocabulary_id, concept_code, visit_kind,
                                            description, source
================  ========================  =================================================

Names (analyte, specimen, unit rule, condition group, drug class, route, visit kind) come from
closed lists; an unknown name is refused with the file, line and the allowed names. The concept
recipes ``sql/10`` .. ``sql/16`` then resolve the codes through the extract's ``concept`` table.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from pathlib import Path

import duckdb
import polars as pl

from cohort._compile import ANALYTES
from cohort._errors import InputError
from cohort._paths import codelists_dir

__all__ = [
    "CODELIST_FILES",
    "SPECIMENS",
    "CONDITION_GROUPS",
    "DRUG_CLASSES",
    "ROUTES",
    "VISIT_KINDS",
    "CodeLists",
    "read_codelists",
    "register_codelists",
]

#: Specimens each analyte may carry (DEVELOPERS.md "Analytes").
SPECIMENS: dict[str, tuple[str, ...]] = {
    "glucose": ("plasma", "blood", "capillary"),
    "ph": ("arterial", "venous", "capillary", "unspecified"),
    "bicarbonate": ("serum", "blood", "arterial", "venous", "total_co2"),
    "bhb": ("serum", "blood_strip"),
    "urine_ketones": ("urine",),
    "sodium": ("serum", "blood"),
    "chloride": ("serum", "blood"),
    "potassium": ("serum", "blood"),
    "anion_gap": ("serum", "blood"),
    "anion_gap_with_k": ("serum", "blood"),
    "hba1c": ("blood",),
    "creatinine": ("serum", "blood"),
}
CONDITION_GROUPS: tuple[str, ...] = ("dka", "diabetes_type1", "diabetes_type2", "diabetes_other")
DRUG_CLASSES: tuple[str, ...] = ("insulin_regular", "insulin_basal", "sglt2_inhibitor")
ROUTES: tuple[str, ...] = ("intravenous", "subcutaneous")
VISIT_KINDS: tuple[str, ...] = ("inpatient", "emergency", "emergency_inpatient", "outpatient", "icu")
_MATCHES: tuple[str, ...] = ("exact", "prefix")
_ORDINAL_RANGE = (0, 4)

#: code list name -> (file name, columns in order, numeric columns).
CODELIST_FILES: dict[str, tuple[str, tuple[str, ...]]] = {
    "lab": ("labs.csv", ("vocabulary_id", "concept_code", "analyte", "specimen", "description",
                         "source")),
    "unit": ("units.csv", ("analyte", "vocabulary_id", "concept_code", "multiply", "add", "low",
                           "high", "source")),
    "ketone": ("ketone_ordinals.csv", ("vocabulary_id", "concept_code", "text", "ordinal",
                                       "source")),
    "condition": ("conditions.csv", ("vocabulary_id", "concept_code", "match", "concept_group",
                                     "description", "source")),
    "drug": ("drugs.csv", ("vocabulary_id", "concept_code", "drug_class", "description",
                           "source")),
    "route": ("routes.csv", ("vocabulary_id", "concept_code", "route", "description", "source")),
    "visit": ("visits.csv", ("vocabulary_id", "concept_code", "visit_kind", "description",
                             "source")),
}
_FLOAT_COLUMNS = {"multiply", "add", "low", "high"}
_INT_COLUMNS = {"ordinal"}


@dataclass(frozen=True)
class CodeLists:
    """The validated code lists, one polars DataFrame per list (see the module table).

    ``folder`` is where they were read from.
    """

    folder: Path
    frames: dict[str, pl.DataFrame]

    def __getitem__(self, name: str) -> pl.DataFrame:
        return self.frames[name]


def _hint(word: str, allowed: tuple[str, ...]) -> str:
    close = difflib.get_close_matches(word, allowed, n=1, cutoff=0.6)
    return f"; did you mean `{close[0]}`?" if close else ""


def _refuse(file: Path, line: int, column: str, value: str, allowed: tuple[str, ...]) -> InputError:
    msg = (f"code list {file} line {line}: `{column}` must be one of {', '.join(allowed)}; got "
           f"{value!r}{_hint(value, allowed)}")
    return InputError(msg)


def _number(file: Path, line: int, column: str, text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        msg = f"code list {file} line {line}: `{column}` must be a finite number; got {text!r}"
        raise InputError(msg)
    return value


def _read_one(folder: Path, name: str) -> pl.DataFrame:
    file_name, wanted = CODELIST_FILES[name]
    file = folder / file_name
    try:
        frame = pl.read_csv(file, infer_schema=False)
    except FileNotFoundError as error:
        msg = f"code list folder {folder} has no {file_name}; it needs all of: " + ", ".join(
            spec[0] for spec in CODELIST_FILES.values())
        raise InputError(msg) from error
    except pl.exceptions.PolarsError as error:
        msg = f"code list {file} could not be read as CSV with a header line: {error}"
        raise InputError(msg) from error
    missing = [column for column in wanted if column not in frame.columns]
    if missing:
        msg = (f"code list {file}: missing column(s) {', '.join(missing)}; the header must be "
               f"{','.join(wanted)}")
        raise InputError(msg)
    rows = frame.select(wanted).with_columns(pl.all().cast(pl.String).fill_null("").str.strip_chars())
    records = rows.to_dicts()
    out: dict[str, list[object]] = {column: [] for column in ("line", *wanted)}
    seen: dict[tuple[str, ...], int] = {}
    for index, record in enumerate(records):
        line = index + 2  # line 1 is the header
        _validate(file, line, name, record)
        key = _key(name, record)
        if key in seen:
            msg = (f"code list {file} line {line}: {', '.join(k for k in key if k)} is listed "
                   f"already on line {seen[key]}; keep one line per code")
            raise InputError(msg)
        seen[key] = line
        out["line"].append(line)
        for column in wanted:
            value: object = record[column]
            if column in _FLOAT_COLUMNS:
                value = _number(file, line, column, str(value))
            elif column in _INT_COLUMNS:
                value = int(_number(file, line, column, str(value)))
            elif value == "":
                value = None
            out[column].append(value)
    if name == "ketone":
        _check_ketone_texts(file, out)
    schema: dict[str, pl.DataType] = {"line": pl.Int32()}
    for column in wanted:
        schema[column] = (pl.Float64() if column in _FLOAT_COLUMNS else
                          pl.Int32() if column in _INT_COLUMNS else pl.String())
    return pl.DataFrame(out, schema=schema)


def _check_ketone_texts(file: Path, out: dict[str, list[object]]) -> None:
    """Refuse one answer text (case- and space-insensitive) given two different ordinals."""
    first: dict[str, tuple[int, object]] = {}
    for line, text, ordinal in zip(out["line"], out["text"], out["ordinal"], strict=True):
        key = str(text).lower().replace(" ", "")
        if key in first and first[key][1] != ordinal:
            msg = (f"code list {file} line {line}: answer text {text!r} has ordinal {ordinal}, "
                   f"but line {first[key][0]} gives it {first[key][1]}; one text, one ordinal")
            raise InputError(msg)
        first.setdefault(key, (int(line), ordinal))  # type: ignore[arg-type]


def _key(name: str, record: dict[str, str]) -> tuple[str, ...]:
    if name == "unit":
        return (record["analyte"], record["vocabulary_id"], record["concept_code"])
    if name == "ketone":
        if record["concept_code"]:
            return (record["vocabulary_id"], record["concept_code"])
        return ("text", record["text"].lower().replace(" ", ""))
    if name in ("condition", "drug"):
        group = record.get("concept_group") or record.get("drug_class") or ""
        return (record["vocabulary_id"], record["concept_code"], group)
    return (record["vocabulary_id"], record["concept_code"])


def _validate(file: Path, line: int, name: str, record: dict[str, str]) -> None:
    def need(column: str) -> str:
        value = record[column]
        if not value:
            msg = f"code list {file} line {line}: `{column}` is empty; every line needs one"
            raise InputError(msg)
        return value

    if name == "lab":
        need("vocabulary_id")
        need("concept_code")
        analyte = need("analyte")
        if analyte not in ANALYTES:
            raise _refuse(file, line, "analyte", analyte, ANALYTES)
        specimen = need("specimen")
        if specimen not in SPECIMENS[analyte]:
            raise _refuse(file, line, f"specimen (for {analyte})", specimen, SPECIMENS[analyte])
    elif name == "unit":
        analyte = need("analyte")
        if analyte not in ANALYTES:
            raise _refuse(file, line, "analyte", analyte, ANALYTES)
        vocabulary = need("vocabulary_id")
        if vocabulary not in ("UCUM", "none"):
            raise _refuse(file, line, "vocabulary_id", vocabulary, ("UCUM", "none"))
        if vocabulary == "none" and record["concept_code"]:
            msg = (f"code list {file} line {line}: a `none` line (a result recorded with no unit) "
                   f"takes an empty concept_code; got {record['concept_code']!r}")
            raise InputError(msg)
        if vocabulary == "UCUM":
            need("concept_code")
        numbers = {column: _number(file, line, column, need(column))
                   for column in ("multiply", "add", "low", "high")}
        if numbers["multiply"] == 0:
            msg = f"code list {file} line {line}: `multiply` must not be 0"
            raise InputError(msg)
        if numbers["low"] >= numbers["high"]:
            msg = (f"code list {file} line {line}: `low` must be below `high`; got "
                   f"{numbers['low']} and {numbers['high']}")
            raise InputError(msg)
        need("source")
    elif name == "ketone":
        if bool(record["vocabulary_id"]) != bool(record["concept_code"]):
            msg = (f"code list {file} line {line}: give both vocabulary_id and concept_code, or "
                   "neither (a text-only answer)")
            raise InputError(msg)
        need("text")
        ordinal = _number(file, line, "ordinal", need("ordinal"))
        low, high = _ORDINAL_RANGE
        if ordinal != int(ordinal) or not low <= ordinal <= high:
            msg = (f"code list {file} line {line}: `ordinal` must be a whole number {low}..{high}; "
                   f"got {record['ordinal']!r}")
            raise InputError(msg)
    elif name == "condition":
        need("vocabulary_id")
        need("concept_code")
        match = need("match")
        if match not in _MATCHES:
            raise _refuse(file, line, "match", match, _MATCHES)
        group = need("concept_group")
        if group not in CONDITION_GROUPS:
            raise _refuse(file, line, "concept_group", group, CONDITION_GROUPS)
    elif name == "drug":
        need("vocabulary_id")
        need("concept_code")
        drug_class = need("drug_class")
        if drug_class not in DRUG_CLASSES:
            raise _refuse(file, line, "drug_class", drug_class, DRUG_CLASSES)
    elif name == "route":
        need("vocabulary_id")
        need("concept_code")
        route = need("route")
        if route not in ROUTES:
            raise _refuse(file, line, "route", route, ROUTES)
    elif name == "visit":
        need("vocabulary_id")
        need("concept_code")
        kind = need("visit_kind")
        if kind not in VISIT_KINDS:
            raise _refuse(file, line, "visit_kind", kind, VISIT_KINDS)


def read_codelists(folder: str | Path | None = None) -> CodeLists:
    """Read and validate the seven code-list files.

    Parameters
    ----------
    folder
        A folder holding labs.csv, units.csv, ketone_ordinals.csv, conditions.csv, drugs.csv,
        routes.csv and visits.csv; None reads the bundled code lists.

    Returns
    -------
    CodeLists
        One validated polars DataFrame per list.

    Raises
    ------
    InputError
        A file or column is missing, or a line names an unknown analyte, specimen, class,
        route or visit kind, or repeats a code (the message names the file and line).

    Examples
    --------
    >>> lists = read_codelists()
    >>> lists["lab"].filter(pl.col("concept_code") == "2746-6")["specimen"].to_list()
    ['venous']
    """
    where = Path(folder) if folder is not None else codelists_dir()
    if not where.is_dir():
        msg = f"code list folder {where} does not exist"
        raise InputError(msg)
    frames = {name: _read_one(where, name) for name in CODELIST_FILES}
    return CodeLists(where, frames)


def register_codelists(con: duckdb.DuckDBPyConnection, lists: CodeLists) -> None:
    """Create the temporary tables ``dka_codelist_<name>`` from validated code lists.

    The frames travel as Arrow tables; no code-list text is pasted into SQL.
    """
    for name, frame in lists.frames.items():
        view = f"_dka_codelist_{name}_frame"
        con.register(view, frame.to_arrow())
        try:
            con.execute(f"create or replace temp table dka_codelist_{name} as select * from {view}")
        finally:
            con.unregister(view)

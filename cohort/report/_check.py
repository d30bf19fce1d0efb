"""Scan report outputs (CSV files and the tables of HTML files) for breaches of the disclosure rule.

What counts as a breach (the rule of :mod:`cohort.disclosure`):

- ``small_count``: a cell of a count column (by its header: ``persons``, ``episodes``, ``rows``,
  ``n``, ``events``, ``at_risk``, ``numerator``, ``denominator``, ``*_count``, ...; see
  :data:`COUNT_COLUMN_PATTERN`) holding a whole number from 1 to ``threshold - 1``.
- ``recoverable``: a count column with exactly one suppressed cell and no ``withheld`` cell, in a
  table that has a total row (first cell ``total`` or ``all``) and at least one other row: the
  suppressed count is the total less the others.
- ``person_identifier``: a column of person-level identifiers (``person_id``, ``episode_id``,
  ``visit_occurrence_id``, ``person_source_value``, ...).
- ``exact_date``: a cell holding a calendar date (``YYYY-MM-DD``) in a table, or a column named
  ``*_datetime`` / ``*_date``: exact dates of individual events stay out of the report. Months
  (``YYYY-MM``) are allowed.

The scanner reads the HTML tables with the standard library's parser; it does not execute the
page. Charts are built only from tables that passed disclosure control (see ``_html``).
"""

from __future__ import annotations

import csv
import gzip
import re
from dataclasses import dataclass
from html.parser import HTMLParser
from pathlib import Path

from cohort._errors import InputError
from cohort.disclosure import DEFAULT_THRESHOLD, SECONDARY_LABEL

__all__ = ["COUNT_COLUMN_PATTERN", "IDENTIFIER_COLUMNS", "Violation", "check_disclosure", "scan_table"]

#: Header names treated as counts (matched in full, case-insensitively).
COUNT_COLUMN_PATTERN = re.compile(
    r"(n|count|counts|persons|people|patients|episodes|rows|events|at_risk|n_at_risk|censored|"
    r"numerator|denominator|both|both_b|only_a|only_b|visits|visits_\w+|\w+_count|n_\w+|\w+_n|"
    r"events_so_far|censored_so_far|deaths|recurrences|excluded|episodes_\w+|persons_\w+|"
    r"[\w ]*\((n|count)\))",
    re.IGNORECASE,
)

#: Columns that identify a person or one of their records.
IDENTIFIER_COLUMNS = frozenset({
    "person_id", "person_source_value", "episode_id", "visit_occurrence_id", "visit_detail_id",
    "measurement_id", "drug_exposure_id", "condition_occurrence_id", "source_row_id",
})

_DATE = re.compile(r"\b\d{4}-\d{2}-\d{2}\b")
_DATE_COLUMN = re.compile(r".*_(datetime|date)$", re.IGNORECASE)
_TOTAL_ROW = {"total", "all", "overall"}


@dataclass(frozen=True)
class Violation:
    """One breach of the disclosure rule.

    Attributes
    ----------
    path
        The file.
    table
        Which table in it (``csv`` for a CSV file; ``table 3`` or the table's id for HTML).
    row
        Row number within the table body (1-based; 0 for the header).
    column
        Column header.
    value
        The offending text.
    rule
        ``small_count``, ``recoverable``, ``person_identifier`` or ``exact_date``.
    """

    path: Path
    table: str
    row: int
    column: str
    value: str
    rule: str

    def __str__(self) -> str:
        return f"{self.path} [{self.table}] row {self.row}, column `{self.column}`: {self.rule} ({self.value!r})"


def _whole(text: str) -> int | None:
    cleaned = text.strip().replace(",", "")
    if re.fullmatch(r"-?\d+(\.0+)?", cleaned):
        return int(float(cleaned))
    return None


def scan_table(
    header: list[str], rows: list[list[str]], *, path: Path, table: str, threshold: int = DEFAULT_THRESHOLD
) -> list[Violation]:
    """Check one table (header and body rows as text) against the disclosure rule.

    Examples
    --------
    >>> from pathlib import Path
    >>> found = scan_table(["reason", "rows"], [["a", "120"], ["b", "4"]], path=Path("x.csv"), table="csv")
    >>> [(v.row, v.rule) for v in found]
    [(2, 'small_count')]
    """
    found: list[Violation] = []
    label = f"<{threshold}"
    has_total = any(row and row[0].strip().lower() in _TOTAL_ROW for row in rows)
    for position, name in enumerate(header):
        column = name.strip()
        key = column.lower()
        if key in IDENTIFIER_COLUMNS:
            found.append(Violation(path, table, 0, column, column, "person_identifier"))
            continue
        if _DATE_COLUMN.fullmatch(key):
            found.append(Violation(path, table, 0, column, column, "exact_date"))
        is_count = bool(COUNT_COLUMN_PATTERN.fullmatch(key))
        cells = [row[position] if position < len(row) else "" for row in rows]
        for number, cell in enumerate(cells, start=1):
            if _DATE.search(cell):
                found.append(Violation(path, table, number, column, cell, "exact_date"))
            if is_count:
                value = _whole(cell)
                if value is not None and 1 <= value < threshold:
                    found.append(Violation(path, table, number, column, cell, "small_count"))
        if is_count and has_total and len(rows) > 1:  # a lone row (the total itself) has nothing to subtract
            suppressed = [number for number, cell in enumerate(cells, start=1) if cell.strip() == label]
            withheld = any(cell.strip() == SECONDARY_LABEL for cell in cells)
            if len(suppressed) == 1 and not withheld:
                found.append(Violation(path, table, suppressed[0], column, label, "recoverable"))
    return found


class _Tables(HTMLParser):
    """Collect every <table> of an HTML page as (id, header, rows)."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tables: list[tuple[str, list[str], list[list[str]]]] = []
        self._stack: list[dict] = []
        self._cell: list[str] | None = None
        self._row: list[str] | None = None
        self._in_head = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "table":
            ident = dict(attrs).get("id") or f"table {len(self.tables) + len(self._stack) + 1}"
            self._stack.append({"id": ident, "header": [], "rows": []})
        elif not self._stack:
            return
        elif tag == "thead":
            self._in_head = True
        elif tag == "tr":
            self._row = []
            self._row_all_th = True
        elif tag in ("td", "th"):
            self._cell = []
            if tag == "td":
                self._row_all_th = False

    def handle_endtag(self, tag: str) -> None:
        if not self._stack:
            return
        current = self._stack[-1]
        if tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append(" ".join("".join(self._cell).split()))
            self._cell = None
        elif tag == "tr" and self._row is not None:
            if self._in_head or (not current["header"] and not current["rows"] and self._row_all_th):
                current["header"] = self._row
            else:
                current["rows"].append(self._row)
            self._row = None
        elif tag == "thead":
            self._in_head = False
        elif tag == "table":
            done = self._stack.pop()
            self.tables.append((done["id"], done["header"], done["rows"]))

    _row_all_th = False

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)


def _csv_rows(path: Path) -> tuple[list[str], list[list[str]]]:
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt", encoding="utf-8", newline="") as handle:
        reader = csv.reader(handle)
        rows = list(reader)
    return (rows[0], rows[1:]) if rows else ([], [])


def check_disclosure(path: Path | str, *, threshold: int = DEFAULT_THRESHOLD) -> list[Violation]:
    """Scan a CSV or HTML file, or every such file under a folder, for disclosure breaches.

    Parameters
    ----------
    path
        A ``.csv``, ``.csv.gz``, ``.html`` or ``.htm`` file, or a folder (searched recursively).
    threshold
        Counts from 1 to ``threshold - 1`` must not appear.

    Returns
    -------
    list of Violation
        Empty when every table passes.

    Raises
    ------
    InputError
        The path does not exist, or is a file of another kind.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (folder / "t.csv").write_text("step,persons\\n1,120\\n2,<10\\n")
    >>> check_disclosure(folder)
    []
    """
    target = Path(path)
    if isinstance(threshold, bool) or not isinstance(threshold, int) or threshold < 1:
        msg = f"check_disclosure: threshold must be a whole number of 1 or more, got {threshold!r}"
        raise InputError(msg)
    if not target.exists():
        msg = f"check_disclosure: {target} does not exist; give a report file or a folder of outputs"
        raise InputError(msg)
    if target.is_dir():
        files = sorted(
            item for item in target.rglob("*")
            if item.is_file() and (item.name.endswith((".csv", ".csv.gz", ".html", ".htm")))
        )
    else:
        if not target.name.endswith((".csv", ".csv.gz", ".html", ".htm")):
            msg = f"check_disclosure: {target} is not a .csv or .html file; give one of those or a folder"
            raise InputError(msg)
        files = [target]
    found: list[Violation] = []
    for item in files:
        if item.name.endswith((".html", ".htm")):
            parser = _Tables()
            parser.feed(item.read_text(encoding="utf-8"))
            for ident, header, rows in parser.tables:
                found.extend(scan_table(header, rows, path=item, table=ident, threshold=threshold))
        else:
            header, rows = _csv_rows(item)
            found.extend(scan_table(header, rows, path=item, table="csv", threshold=threshold))
    return found

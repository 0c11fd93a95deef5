"""Tables as CSV files that are safe to open in a spreadsheet.

Formula injection is neutralised as the OWASP "CSV Injection" guidance recommends: a text
cell that begins with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return gets a leading
apostrophe, so a spreadsheet shows it as text instead of evaluating it; every cell is
quoted as needed and embedded quotes are doubled (the csv module does this).  We also treat
the full-width forms of those four characters the same way, since some spreadsheet
programs normalise them.  Numbers stay numbers: a numeric cell is written as the number
(full precision, the shortest text that reads back as the same float), and a text cell that
is just a number such as "-1.5" is left alone because a spreadsheet reads it as that number,
not as a formula.
"""
from __future__ import annotations

import csv
import io
import re
from pathlib import Path
from typing import Any

from trialcut.report.tables import ReportTable

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r", "＝", "＋", "－", "＠")
PLAIN_NUMBER = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?")


def neutralise(text: str) -> str:
    """The cell text a spreadsheet will not evaluate as a formula."""
    if text.startswith(FORMULA_STARTS) and not PLAIN_NUMBER.fullmatch(text):
        return "'" + text
    return text


def csv_cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(value)
    return neutralise(str(value))


def table_csv_text(table: ReportTable) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\r\n")   # RFC 4180 line ends
    writer.writerow([neutralise(str(c)) for c in table.columns])
    for row in table.rows:
        writer.writerow([csv_cell(v) for v in row])
    return buffer.getvalue()


def write_table_csv(table: ReportTable, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(table_csv_text(table).encode("utf-8"))
    return path

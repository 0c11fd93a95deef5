"""CSV files: formula injection neutralised per the OWASP "CSV Injection" guidance; numbers kept."""
from __future__ import annotations

import csv
import io

import pytest

from trialcut.report.csv_output import neutralise, table_csv_text
from trialcut.report.formatting import NumberFormat
from trialcut.report.tables import from_records


# OWASP CSV Injection: cells beginning with = + - @ tab or carriage return are prefixed with '.
@pytest.mark.parametrize("text", ["=1+2", "+SUM(A1)", "-2+3+cmd|' /C calc'!A0", "@SUM(1)", "\t=1", "\r=1",
                                  "=HYPERLINK(\"http://x\")"])
def test_formula_starts_get_an_apostrophe(text):
    assert neutralise(text) == "'" + text


@pytest.mark.parametrize("text", ["-1.5", "+2", "-3e-4", "Placebo", "Week 12", "", "a=b"])
def test_plain_text_and_numbers_are_left_alone(text):
    # A negative number is a number, not a formula: a spreadsheet reads "-1.5" as -1.5.
    assert neutralise(text) == text


def test_a_table_round_trips_through_the_csv_reader():
    table = from_records(
        [["=cmd|'/C calc'!A0", -1.25, 3, None, True], ['say "hi", then', 0.1 + 0.2, 0, 1e-12, False]],
        ("label", "estimate", "n", "p", "flag"), slug="t", title="t", number_format=NumberFormat())
    rows = list(csv.reader(io.StringIO(table_csv_text(table), newline="")))
    assert rows[0] == ["label", "estimate", "n", "p", "flag"]
    assert rows[1] == ["'=cmd|'/C calc'!A0", "-1.25", "3", "", "true"]
    # Full precision: the shortest text that reads back as the same float.
    assert float(rows[2][1]) == 0.1 + 0.2 and float(rows[2][3]) == 1e-12
    assert rows[2][0] == 'say "hi", then'   # quotes and separators survive (csv module quoting)


def test_header_cells_are_neutralised_too():
    table = from_records([[1]], ("=evil",), slug="t", title="t", number_format=NumberFormat())
    assert table_csv_text(table).splitlines()[0] == "'=evil"

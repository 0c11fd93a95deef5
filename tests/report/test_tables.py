"""Column widths of report tables, counted in characters from the shown text (no rendering)."""
from __future__ import annotations

from trialcut.report.formatting import NumberFormat
from trialcut.report.tables import CELL_PADDING, ROOM_PORTRAIT, from_records


def shares(table) -> list[float]:
    return [float(w.rstrip("%")) for w in table.column_widths(table.body())]


def test_widths_are_shares_of_the_table_in_proportion_to_the_longest_cells():
    table = from_records([["Placebo", 1.25], ["Lorvatide 10 mg", 2.5]], ("arm", "estimate"), slug="t", title="t",
                         number_format=NumberFormat(raw=1))
    widths = shares(table)
    assert abs(sum(widths) - 100) < 0.05
    # "Lorvatide 10 mg" (15 characters) against "Estimate" (8, the header's longest word), each plus padding.
    expected = 100 * (15 + CELL_PADDING) / (15 + 8 + 2 * CELL_PADDING)
    assert abs(widths[0] - expected) < 0.01


def test_a_long_text_column_gives_way_and_numbers_keep_their_width():
    sentence = " ".join(["word"] * 60)   # 299 characters: far more than a page holds on one line
    table = from_records([[sentence, 123456.5]], ("reason", "estimate"), slug="t", title="t",
                         number_format=NumberFormat(raw=1))
    widths = shares(table)
    # The number (8 characters shown, "123456.50") keeps at least its own width on the page.
    number_need = 100 * (len("123456.50") + CELL_PADDING) / ROOM_PORTRAIT
    assert widths[1] >= number_need - 0.01
    assert widths[0] > widths[1]

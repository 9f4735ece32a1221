"""Text cells of the CSV files the service writes, made safe to open in a spreadsheet.

A spreadsheet treats a cell that starts with ``=``, ``+``, ``-`` or ``@`` (or a tab or carriage return
followed by one) as a formula, so a column name or a category label chosen by whoever sent the data
(``=HYPERLINK(...)``) could run as one on the reader's machine ("CSV injection"). Following the
OWASP guidance on CSV injection (owasp.org, "CSV Injection"), a text cell that starts with one of
``= + - @ \\t \\r`` gets a leading single quote, which spreadsheets show as text. Numbers are written as
numbers and never pass through here.
"""

from __future__ import annotations

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def text_cell(value: str) -> str:
    """``value`` as a CSV text cell that no spreadsheet reads as a formula."""
    return "'" + value if value.startswith(FORMULA_STARTS) else value


def number_cell(value: float | None) -> str:
    """A number's cell: the shortest round-trip decimal, empty for a missing or non-finite value (never
    ``nan`` or ``inf``, which some readers take for text and others for numbers)."""
    if value is None or value != value or value in (float("inf"), float("-inf")):
        return ""
    return repr(float(value))

"""Reading the project's CSV tables: schedules and run data.

Both are small text tables with a header row whose cells name a column and its unit
in brackets (``time [h], X [g/L]``), ``#`` comment lines, and either ',' or ';'
between the columns (with ';', numbers may use a decimal comma, as many labs write
them). This module reads such a table into cells with their line numbers; what the
columns mean is for the caller.
"""

from __future__ import annotations

import csv
import math
import re

from .errors import InputError, Issue
from .problem.yamlio import read_text
from .units import parse_quantity, to_internal

HEADER_RE = re.compile(r"^\s*(?P<name>[^\[\]]+?)\s*(?:\[(?P<unit>[^\]]*)\])?\s*$")
_DECIMAL_COMMA = re.compile(r"^[-+]?\d*,\d+(?:[eE][-+]?\d+)?$")


class Table:
    """A CSV table as read: ``comments`` (line, text without '#'), ``rows``
    (line, cells) with the header first, and the ``delimiter``."""

    def __init__(self, path, comments, rows, delimiter):
        self.path, self.comments, self.rows, self.delimiter = str(path), comments, rows, delimiter

    @property
    def header(self):
        return self.rows[0]

    def number(self, lineno: int, column: str, text: str, empty_ok: bool = False):
        """The float in a cell (None for an empty cell where ``empty_ok``); bad input
        naming the line and column otherwise."""
        if text == "" and empty_ok:
            return None
        try:
            if not text.isascii():  # float() would read fullwidth digits as numbers
                raise ValueError
            value = float(decimal_point(text) if self.delimiter == ";" else text)
            if not math.isfinite(value):
                raise ValueError
        except ValueError:
            hint = ""
            if self.delimiter == ";" and "," in text and "." in text:
                hint = " (no thousands separators: write 1234,5 or 1234.5)"
            raise InputError.one(self.path, lineno, column, f"expected a number, got {text!r}{hint}") from None
        return value

    def check_width(self) -> None:
        """Every row has as many cells as the header."""
        header_line, header = self.header
        for lineno, cells in self.rows[1:]:
            if len(cells) != len(header):
                hint = ("; numbers with a decimal comma (0,12) need ';' between the columns"
                        if self.delimiter == "," and len(cells) > len(header) else "")
                raise InputError.one(self.path, lineno, "",
                                     f"row has {len(cells)} cells, the header has {len(header)}{hint}")


def read_table(path) -> Table:
    """Read a CSV table (size and kind checked first, see :func:`read_text`)."""
    text = read_text(path)
    comments, lines = [], []
    for lineno, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            comments.append((lineno, stripped[1:].strip()))
            continue
        lines.append((lineno, line))
    if not lines:
        raise InputError.one(path, None, "", "no header row")
    delimiter = _delimiter(path, *lines[0])
    rows = []
    for lineno, line in lines:
        try:
            cells = next(csv.reader([line], delimiter=delimiter))
        except csv.Error as exc:
            raise InputError.one(path, lineno, "", f"CSV error: {exc}") from None
        rows.append((lineno, [c.strip() for c in cells]))
    return Table(path, comments, rows, delimiter)


def header_cell(path, line: int, cell: str, position: int, example: str):
    """(name, unit text) of a header cell, or an Issue if it does not name both."""
    m = HEADER_RE.match(cell)
    if not m or not m.group("unit"):
        return Issue(str(path), line, cell or f"column {position + 1}",
                     f"header cells name a column and its unit in brackets, e.g. '{example}'")
    return m.group("name").strip(), m.group("unit").strip()


def unit_factor(path, line: int, cell: str, unit: str, kind: str):
    """(factor to internal units, pint quantity of one unit) of a column's unit, or an
    Issue naming the cell."""
    try:
        q = parse_quantity(f"1 {unit}", kind)
        return to_internal(q), q
    except ValueError as exc:
        msg = str(exc).replace("'1 ", "'", 1) if str(exc).startswith("'1 ") else str(exc)
        return Issue(str(path), line, cell, f"unit {msg}" if msg.startswith("'") else msg)


def _delimiter(path, lineno, header: str) -> str:
    """',' or ';' between the columns, read off the header row. With ';' (common where
    the decimal mark is a comma) numbers may be written 0,12 as well as 0.12."""
    outside = re.sub(r"\[[^\]]*\]", "", header)  # units in brackets do not count
    if ";" in outside and "," in outside:
        raise InputError.one(path, lineno, "", "the header mixes ',' and ';': separate the columns with one of "
                                               "them (with ';', numbers may use a decimal comma: 0,12)")
    return ";" if ";" in outside else ","


def decimal_point(text: str) -> str:
    """'0,12' -> '0.12' (one comma and digits only); anything else as it is."""
    return text.replace(",", ".") if _DECIMAL_COMMA.match(text) else text

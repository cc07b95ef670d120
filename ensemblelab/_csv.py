"""CSV for humans: text cells that a spreadsheet would run as a formula are neutralised.

A cell that begins with ``=``, ``+``, ``-`` or ``@`` (``+``/``-`` only when the
cell is not a number), a tab or a carriage return is written with a single
quote in front (``=HYPERLINK(...)`` -> ``'=HYPERLINK(...)``), the usual
defence against formula injection (common practice). A text cell that already
begins with a single quote gets one more, so that :func:`restore_cell` gives
every value back exactly (the tidy table loader uses it).

Numbers are never changed; column names are treated like cells.
"""

from __future__ import annotations

import csv
import io
from typing import Any

import pandas as pd

__all__ = ["neutralise_cell", "restore_cell", "neutralise_frame", "restore_frame",
           "to_csv_text", "neutralise_csv_text"]

_TRIGGERS = ("=", "+", "-", "@", "\t", "\r")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def neutralise_cell(value: Any) -> Any:
    """`value` with a leading single quote when it is text a spreadsheet would evaluate."""
    if not isinstance(value, str) or not value:
        return value
    first = value[0]
    if first == "'":
        return "'" + value
    if first in _TRIGGERS and not (first in "+-" and _is_number(value)):
        return "'" + value
    return value


def restore_cell(value: Any) -> Any:
    """Invert :func:`neutralise_cell` (drop one leading single quote of text)."""
    if isinstance(value, str) and value.startswith("'"):
        return value[1:]
    return value


def _text_columns(frame: pd.DataFrame) -> list[Any]:
    return [c for c in frame.columns
            if frame[c].dtype == object or pd.api.types.is_string_dtype(frame[c].dtype)]


def neutralise_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of `frame` with every text cell and column name neutralised."""
    out = frame.copy()
    for c in _text_columns(out):
        out[c] = out[c].map(neutralise_cell)
    out.columns = [neutralise_cell(c) if isinstance(c, str) else c for c in out.columns]
    return out


def restore_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """Invert :func:`neutralise_frame` (for text read back from a CSV written by us)."""
    out = frame.copy()
    out.columns = [restore_cell(c) for c in out.columns]
    for c in _text_columns(out):
        out[c] = out[c].map(restore_cell)
    return out


def to_csv_text(frame: pd.DataFrame, **kw: Any) -> str:
    """``frame.to_csv(**kw)`` of the neutralised frame (``index=False`` by default)."""
    kw.setdefault("index", False)
    return neutralise_frame(frame).to_csv(**kw)


def neutralise_csv_text(text: str) -> str:
    """Neutralise every cell of CSV `text` written by another writer (header included)."""
    rows = csv.reader(io.StringIO(text, newline=""))
    buf = io.StringIO(newline="")
    writer = csv.writer(buf, lineterminator="\n")
    for row in rows:
        writer.writerow([neutralise_cell(c) for c in row])
    return buf.getvalue()

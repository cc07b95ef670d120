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
import os
from typing import Any

import numpy as np
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


def _neutralised_column(col: Any) -> Any:
    # long tables repeat a few labels: neutralise each distinct text once (same cells as
    # col.map(neutralise_cell)); anything but plain text cells takes the per-cell path
    # (pandas' string dtype too, whose missing cells stay missing: code -1, the last entry)
    text = isinstance(col, pd.Series) and isinstance(col.dtype, pd.StringDtype)
    if isinstance(col, pd.Series) and (col.dtype == object or text) and len(col) > 64:
        try:
            codes, uniques = pd.factorize(col, use_na_sentinel=True)
        except TypeError:  # unhashable cells
            codes = None
        if codes is not None and (text or codes.min(initial=0) >= 0) and all(
                type(u) is str for u in uniques):
            table = np.array([neutralise_cell(u) for u in uniques] + [None], dtype=object)
            return pd.Series(table[codes], index=col.index, name=col.name, dtype=col.dtype)
    return col.map(neutralise_cell)


def neutralise_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of `frame` with every text cell and column name neutralised."""
    out = frame.copy()
    for c in _text_columns(out):
        out[c] = _neutralised_column(out[c])
    out.columns = [neutralise_cell(c) if isinstance(c, str) else c for c in out.columns]
    return out


def restore_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """Invert :func:`neutralise_frame` (for text read back from a CSV written by us)."""
    out = frame.copy()
    out.columns = [restore_cell(c) for c in out.columns]
    for c in _text_columns(out):
        out[c] = out[c].map(restore_cell)
    return out


def _quoted(text: str) -> str:
    """`text` as one CSV cell, quoted only when needed (csv.QUOTE_MINIMAL)."""
    if not text:
        return ""
    buf = io.StringIO(newline="")
    csv.writer(buf, lineterminator=os.linesep).writerow([text])
    return buf.getvalue()[: -len(os.linesep)]


def _float_texts(vals: np.ndarray) -> list[str]:
    """``repr`` of every float64 in `vals` (shortest round trip); a column of few
    distinct values (the grid columns of a tidy map) formats each distinct bit pattern
    once (so -0.0 and 0.0 keep their own text)."""
    n = vals.size
    if n > 256:
        bits = np.ascontiguousarray(vals).view(np.int64)
        uniq, inverse = np.unique(bits, return_inverse=True)
        if 4 * uniq.size < n:
            table = np.array(list(map(repr, uniq.view(np.float64).tolist())), dtype=object)
            return table[inverse.ravel()].tolist()
    return list(map(repr, vals.tolist()))


def _numeric_csv(frame: pd.DataFrame) -> str | None:
    """``frame.to_csv(index=False)`` for numeric and text columns, else None.

    Same text as pandas (float64 cells as the shortest round-trip repr, NaN as an empty
    cell; ints; True/False; text quoted as the csv module does; header through the csv
    module), built from Python values in one join rather than pandas' per-cell path.
    """
    # one column: the csv module writes an empty cell as '""' (a row must not be blank)
    if frame.empty or frame.shape[1] < 2 or isinstance(frame.columns, pd.MultiIndex) or not all(
            isinstance(c, str) for c in frame.columns):
        return None
    cols: list[list[str]] = []
    for name in frame.columns:
        col = frame[name]
        if not isinstance(col, pd.Series):  # duplicated column names
            return None
        dt = col.dtype
        if dt == np.float64:
            vals = col.to_numpy()
            txt = _float_texts(vals)
            for i in np.flatnonzero(np.isnan(vals)).tolist():
                txt[i] = ""
        elif dt == np.bool_ or (isinstance(dt, np.dtype) and dt.kind in "iu"):
            txt = list(map(str, col.to_numpy().tolist()))
        elif pd.api.types.is_string_dtype(dt):
            codes, uniques = pd.factorize(col, use_na_sentinel=True)
            if not all(isinstance(u, str) for u in uniques):
                return None
            # each distinct text quoted once as the csv module (and pandas) would
            table = [_quoted(u) for u in uniques] + [""]  # code -1 (missing): empty
            txt = [table[c] for c in codes.tolist()]
        else:
            return None
        cols.append(txt)
    head = io.StringIO(newline="")
    csv.writer(head, lineterminator=os.linesep).writerow(list(frame.columns))
    return head.getvalue() + os.linesep.join(map(",".join, zip(*cols, strict=True))) \
        + os.linesep


def to_csv_text(frame: pd.DataFrame, **kw: Any) -> str:
    """``frame.to_csv(**kw)`` of the neutralised frame (``index=False`` by default)."""
    kw.setdefault("index", False)
    if kw == {"index": False}:
        fast = _numeric_csv(neutralise_frame(frame))
        if fast is not None:
            return fast
    return neutralise_frame(frame).to_csv(**kw)


def neutralise_csv_text(text: str) -> str:
    """Neutralise every cell of CSV `text` written by another writer (header included)."""
    rows = csv.reader(io.StringIO(text, newline=""))
    buf = io.StringIO(newline="")
    writer = csv.writer(buf, lineterminator="\n")
    for row in rows:
        writer.writerow([neutralise_cell(c) for c in row])
    return buf.getvalue()

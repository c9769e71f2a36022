"""Output safety shared by every writer of CSV: one neutralising rule, one way to write.

A spreadsheet runs a cell as a formula when it starts with ``=``, ``+``, ``-``
or ``@`` (and some also after a tab or carriage return), and it reads a bare
carriage return in an unquoted cell as the start of a new row, where the next
characters start a new cell. OWASP, "CSV Injection"
(https://owasp.org/www-community/attacks/CSV_Injection): prefix such cells with
a single quote, and quote every cell that holds a delimiter, a quote or a line
break. :func:`write_csv` is the only way contentlab writes CSV (report tables,
``import --skip-bad`` rejects, ``score``/``drivers``/``experiment`` with
``--format csv``), so the rule lives in one place.
"""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import IO

import pandas as pd

FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
# The start of the cell or of any line inside it (after a CR or LF) where a formula character follows:
# a spreadsheet that splits the cell there, or strips a leading CR or tab, would run what follows.
_FORMULA_AT_LINE_START = re.compile(r"(?:^|(?<=[\r\n]))(?=[" + re.escape("".join(FORMULA_START)) + "])")
# RFC 4180: records end with CRLF; Python's csv writer quotes every cell holding a character of the line
# terminator, so with CRLF a cell with a bare CR (or LF) is always quoted and can never split a row.
LINE_TERMINATOR = "\r\n"


def neutralise_cell(value: object) -> object:
    """``value`` with a single quote before every formula start (OWASP CSV injection), text only.

    Cells beginning with ``=``, ``+``, ``-``, ``@``, tab or carriage return are
    prefixed, and so is every line inside a cell (after a CR or LF) that begins
    with one of them: ``"\\r=1"`` becomes ``"'\\r'=1"``. Numbers stay numbers: a
    negative number is data, not a formula.
    """
    if not isinstance(value, str) or not value:
        return value
    return _FORMULA_AT_LINE_START.sub("'", value)


def neutralise_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` with every text cell neutralised (headers too)."""
    out = frame.copy()
    for column in out.columns:
        if out[column].dtype == object or pd.api.types.is_string_dtype(out[column]):
            out[column] = out[column].map(neutralise_cell)
    out.columns = [neutralise_cell(str(c)) for c in out.columns]
    return out


def write_csv(frame: pd.DataFrame, target: str | IO[str], **to_csv_kwargs) -> None:
    """Write ``frame`` as CSV with every text cell neutralised and line breaks inside cells quoted.

    ``target`` is a path or an open text stream (``sys.stdout``); extra keyword
    arguments go to :meth:`pandas.DataFrame.to_csv` (``index`` defaults to False).
    """
    to_csv_kwargs.setdefault("index", False)
    clean = neutralise_frame(frame)
    if not isinstance(target, (str, os.PathLike)):
        clean.to_csv(target, lineterminator=LINE_TERMINATOR, **to_csv_kwargs)
        return
    with atomic_path(target) as tmp:
        clean.to_csv(tmp, lineterminator=LINE_TERMINATOR, **to_csv_kwargs)


class atomic_path:
    """``with atomic_path(path) as tmp:`` write ``tmp``; on success it replaces ``path`` in one step (os.replace).

    An error or Ctrl-C while writing leaves ``path`` as it was (an earlier file of that name intact) and removes
    the half-written temporary file, so a reader never sees a cut-off file.
    """

    def __init__(self, path: str | os.PathLike):
        self.path = Path(path)
        self.tmp = self.path.with_name(f".{self.path.name}.{os.getpid()}.tmp")

    def __enter__(self) -> Path:
        return self.tmp

    def __exit__(self, kind, value, trace) -> None:
        if kind is not None:
            self.tmp.unlink(missing_ok=True)
            return
        try:
            os.replace(self.tmp, self.path)
        except BaseException:  # the replace failed, or a stop signal arrived just before it: no half-step left
            self.tmp.unlink(missing_ok=True)
            raise


def write_text(path: str | os.PathLike, text: str) -> None:
    """Write a whole text file (UTF-8) through :class:`atomic_path`."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")

"""Output safety shared by every writer of CSV and HTML."""

from __future__ import annotations

import pandas as pd

_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def neutralise_cell(value: object) -> object:
    """Prefix text that a spreadsheet would run as a formula with a quote.

    OWASP, "CSV Injection": cells beginning with =, +, -, @, tab or carriage
    return are prefixed with a single quote so they are shown, not evaluated.
    Numbers stay numbers (a negative number is data, not a formula).
    """
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value


def neutralise_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` with every text cell neutralised (headers too)."""
    out = frame.copy()
    for column in out.columns:
        if out[column].dtype == object or pd.api.types.is_string_dtype(out[column]):
            out[column] = out[column].map(neutralise_cell)
    out.columns = [neutralise_cell(str(c)) for c in out.columns]
    return out

"""CSV files that are safe to open in a spreadsheet.

A text cell that begins with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return is
read by spreadsheet programs as a formula. Teams open vidodo's tables in spreadsheets
and some cells hold their own strings (source, wheel and run names, error messages),
so such cells get a leading apostrophe, as the OWASP guidance on CSV injection
recommends (common practice). Numbers are never changed: a negative number stays a
number.
"""

from __future__ import annotations

import pandas as pd

__all__ = ["neutralise_cell", "neutralised", "write_csv", "FORMULA_START"]

FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
"""First characters that make a spreadsheet treat a text cell as a formula."""


def neutralise_cell(value):
    """``value`` with a leading apostrophe if it is text a spreadsheet would evaluate."""
    if isinstance(value, str) and value.startswith(FORMULA_START):
        return "'" + value
    return value


def neutralised(table: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``table`` whose text cells (and column names) cannot run as formulas."""
    out = table.copy()
    for c in out.columns:
        col = out[c]
        if col.dtype == object or pd.api.types.is_string_dtype(col):
            out[c] = col.map(neutralise_cell)
    out.columns = [neutralise_cell(str(c)) if isinstance(c, str) else c
                   for c in out.columns]
    return out


def write_csv(table: pd.DataFrame, path, **kwargs) -> None:
    """Write ``table`` like ``DataFrame.to_csv(path, index=False, **kwargs)``, neutralised."""
    neutralised(table).to_csv(path, index=False, **kwargs)

"""CSV files that are safe to open in a spreadsheet.

A text cell that begins with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return is
read by spreadsheet programs as a formula. Teams open vidodo's tables in spreadsheets
and some cells hold their own strings (source, wheel and run names, error messages),
so such cells get a leading apostrophe, as the OWASP guidance on CSV injection
recommends (common practice). Numbers are never changed: a negative number stays a
number.

CSV files vidodo reads go through :func:`read_csv_checked`: a missing or unreadable file
is a one-line :class:`~vidodo.errors.InputError` naming it and what to do.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from .errors import InputError

__all__ = ["neutralise_cell", "neutralised", "write_csv", "read_csv_checked",
           "FORMULA_START"]

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


def read_csv_checked(path, if_missing, if_unreadable, **read_options) -> pd.DataFrame:
    """``pandas.read_csv(path, **read_options)``, refusing a missing or unreadable file.

    Parameters
    ----------
    path : str or Path
    if_missing, if_unreadable : str
        What the user should do, appended to the one-line message.

    Raises
    ------
    InputError
        ``"<path>: file not found; <if_missing>"`` or ``"<path>: not a readable CSV
        (<first line of the parser's message>); <if_unreadable>"``.
    """
    p = Path(path)
    try:
        return pd.read_csv(p, **read_options)
    except FileNotFoundError:
        raise InputError(f"{p}: file not found; {if_missing}") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        first = (str(exc).splitlines() or [type(exc).__name__])[0]
        raise InputError(f"{p}: not a readable CSV ({first}); {if_unreadable}") from None

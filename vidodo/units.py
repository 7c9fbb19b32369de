"""Display units for lengths: metres inside, mm / in / m only where people read figures.

Everything vidodo computes is in SI units. The terminal summary, the plots and the HTML
report convert lengths here, at the edge, with :func:`format_length`, and angles with
:func:`format_angle`. The inch is exactly 0.0254 m (international yard and pound
agreement, 1959).
"""

from __future__ import annotations

import math

__all__ = [
    "LENGTH_UNITS",
    "length_factor",
    "to_display",
    "format_length",
    "format_angle",
    "format_percent",
    "summary_lines",
]

LENGTH_UNITS = {"mm": 1000.0, "in": 1.0 / 0.0254, "m": 1.0}
"""Display unit -> how many of it make one metre."""

_DECIMALS = {"mm": 1, "in": 2, "m": 3}


def length_factor(unit: str) -> float:
    """How many display units make one metre.

    Parameters
    ----------
    unit : {'mm', 'in', 'm'}

    Returns
    -------
    float
        Display units per metre.
    """
    try:
        return LENGTH_UNITS[unit]
    except KeyError:
        raise ValueError(f"display unit {unit!r}: use one of {sorted(LENGTH_UNITS)}") from None


def to_display(value_m, unit: str):
    """Convert a length (scalar or array) from metres to the display unit."""
    return value_m * length_factor(unit)


def _finite(value) -> bool:
    try:
        return value is not None and math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def format_length(value_m, unit: str = "mm", *, decimals: int | None = None,
                  with_unit: bool = True) -> str:
    """A length in metres written in the display unit, e.g. ``'12.3 mm'``.

    Parameters
    ----------
    value_m : float or None
        Length [m]. None or NaN is written as an en dash.
    unit : {'mm', 'in', 'm'}
    decimals : int, optional
        Digits after the point (default: 1 for mm, 2 for in, 3 for m).
    with_unit : bool
        Append the unit name.
    """
    factor = length_factor(unit)
    if not _finite(value_m):
        return "\u2013"
    d = _DECIMALS[unit] if decimals is None else decimals
    text = f"{float(value_m) * factor:.{d}f}"
    return f"{text} {unit}" if with_unit else text


def format_angle(value_rad, *, decimals: int = 1, with_unit: bool = True) -> str:
    """An angle in radians written in degrees, e.g. ``'3.4 deg'``; NaN as an en dash."""
    if not _finite(value_rad):
        return "\u2013"
    text = f"{math.degrees(float(value_rad)):.{decimals}f}"
    return f"{text} deg" if with_unit else text


def format_percent(value, *, decimals: int = 2) -> str:
    """A percentage that is already in percent, e.g. ``'1.25 %'``; NaN as an en dash."""
    if not _finite(value):
        return "\u2013"
    return f"{float(value):.{decimals}f} %"


def _pass_text(value) -> str:
    if value is None:
        return "no tolerance"
    return "pass" if bool(value) else "FAIL"


def _pm(m: dict, key: str, fmt, unit: str) -> str:
    """A figure with its 1-sigma (``12.3 mm \u00b1 0.4 mm``), or the figure alone."""
    from .metrics import sigma_key

    v = m.get(key)
    if not _finite(v):
        return "\u2013"
    s = m.get(sigma_key(key))
    return fmt(v, unit) + (f" \u00b1 {fmt(s, unit)}" if _finite(s) else "")


def summary_lines(summary: dict, unit: str = "mm", *, warnings: bool = False) -> list[str]:
    """The compact end-of-run summary for the terminal, one string per line.

    Parameters
    ----------
    summary : dict
        The content of ``summary.json`` (DEVELOPERS.md, "Grade outputs").
    unit : {'mm', 'in', 'm'}
        Display unit for lengths.
    warnings : bool
        Also list the summary's warnings (commands usually print them to stderr).

    Returns
    -------
    list of str
        A header with the clock offset, a table with one row per odometry source
        (ATE, final error, drift, heading drift per turn, and pass/fail when a
        tolerance was set), the event count by kind, and the verdict. Nothing is
        printed here.
    """
    length_factor(unit)
    lines = []
    clock = summary.get("clock") or {}
    if clock:
        off = clock.get("offset_s")
        sig = clock.get("sigma_s")
        off_txt = f"{off:+.3f} s" if _finite(off) else "\u2013"
        sig_txt = f" \u00b1 {sig * 1000:.1f} ms" if _finite(sig) else ""
        lines.append(f"log clock offset {off_txt}{sig_txt} ({clock.get('method', '?')})")
    sources = summary.get("sources") or {}
    if sources:
        judged = any(isinstance(m, dict) and m.get("pass") is not None
                     for m in sources.values())
        head = ["source", "ATE", "final err", "max err", "drift", "heading/turn", ""]
        rows = [head]
        for name, m in sources.items():
            rows.append([
                str(name),
                _pm(m, "ate_rmse_m", format_length, unit),
                _pm(m, "final_err_m", format_length, unit),
                _pm(m, "max_err_m", format_length, unit),
                _pm(m, "drift_pct", lambda v, _u: format_percent(v), unit),
                _pm(m, "heading_drift_deg_per_turn",
                    lambda v, _u: format_angle(math.radians(v)), unit),
                _pass_text(m.get("pass")) if judged else "",
            ])
        widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
        for r in rows:
            cells = [r[0].ljust(widths[0])]
            cells += [c.rjust(w) for c, w in zip(r[1:], widths[1:], strict=True)]
            lines.append("  ".join(cells).rstrip())
    events = summary.get("events") or []
    if events:
        counts: dict[str, int] = {}
        for ev in events:
            counts[str(ev.get("kind", "?"))] = counts.get(str(ev.get("kind", "?")), 0) + 1
        lines.append("events: " + ", ".join(f"{k} x{n}" for k, n in sorted(counts.items())))
    else:
        lines.append("events: none")
    for w in (summary.get("warnings") or []) if warnings else ():
        lines.append(f"warning: {w}")
    if "verdict" in summary:
        lines.append(f"verdict: {summary['verdict']}")
    return lines

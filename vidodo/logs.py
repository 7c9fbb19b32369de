"""Reading a robot's log (CSV) into one clean, sorted, unit-converted table.

The robot profile names the columns: a time column (unit s, ms, us or ns), one column
of cumulative encoder counts per wheel (or two raw optical channels per wheel, decoded
by :mod:`vidodo.quadrature`), optionally an IMU heading and the robot's own pose.

What the reader does with imperfect logs, in order:

1. Cells are checked only in the columns the profile uses. A cell that is not a
   number raises :class:`~vidodo.errors.InputError` with its line number (as a text
   editor shows it: the header is line 1).
2. Blank rows (every used column empty) and rows without a time are dropped, with a
   warning giving the count and the first line numbers.
3. Rows are sorted by time (stable). Out-of-order rows are reported in a warning.
   Rows with the same time and the same values are duplicates: kept once, with a
   warning. Rows with the same time and different values are ambiguous: an
   :class:`~vidodo.errors.InputError` names their lines.
4. The declared time unit is checked against the data: a median step outside
   [20 us, 60 s] or a span over two days raises an error suggesting the unit that fits.
5. Counter wrap-around: differences of consecutive counts are taken modulo
   ``2**counter_bits`` and mapped to the signed range, so logs that print the counter
   signed or unsigned both unwrap. Values outside the counter's range raise an error.
6. Missing cells inside a used column (NaN between valid samples) are filled by
   linear interpolation in time (counts after unwrapping, rounded to whole counts;
   headings after unwrapping), with a warning. Rows before the first or after the
   last complete row are dropped (nothing to interpolate from), with a warning.
7. IMU heading: degrees or radians to radians, unwrapped when the profile says it is
   wrapped, heading change times the profile's scale, then its sign.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError
from .profiles import ANGLE_UNITS_RAD, LENGTH_UNITS_M, TIME_UNITS_S, RobotProfile
from .quadrature import decode_raw

__all__ = ["LogData", "read_log", "log_from_frame", "unwrap_counter", "check_time_unit",
           "STEP_RANGE_S", "MAX_SPAN_S"]

STEP_RANGE_S = (2e-5, 60.0)
"""Plausible median sampling step of a robot log [s] (50 kHz down to one a minute)."""
MAX_SPAN_S = 2 * 86400.0
"""Longest plausible log [s]."""

_LINES_SHOWN = 5


@dataclass(frozen=True)
class LogData:
    """A robot log, read and cleaned.

    ``frame`` columns: ``line`` (the sample's line number in the file, header = 1),
    ``t_s`` (log clock [s], strictly increasing), ``ticks_<wheel>`` (unwrapped
    cumulative counts, int64, wheel sign NOT applied), ``imu_heading_rad``
    (continuous [rad], IMU scale, sign and bias applied) when the profile has [imu], and
    ``pose_x_m``, ``pose_y_m``, ``pose_heading_rad`` (continuous) when it has [pose].
    """

    frame: pd.DataFrame
    """One row per sample, sorted by time (columns above)."""
    warnings: list[str] = field(default_factory=list)
    """What was repaired or looks doubtful, one line each."""
    path: Path | None = None
    """The file read (None for in-memory logs)."""
    quadrature: dict = field(default_factory=dict)
    """Per wheel with raw optical channels: its :class:`QuadratureResult`."""


def _lines_text(lines) -> str:
    lines = [int(v) for v in lines]
    shown = ", ".join(str(v) for v in lines[:_LINES_SHOWN])
    return shown + (", ..." if len(lines) > _LINES_SHOWN else "")


def _used_columns(robot: RobotProfile) -> list[str]:
    cols = [robot.time_column]
    for w in robot.wheels:
        if w.raw_a_column is not None and w.raw_b_column is not None:
            cols += [w.raw_a_column, w.raw_b_column]
        else:
            cols.append(w.column)
    if robot.imu is not None:
        cols.append(robot.imu.column)
    if robot.pose is not None:
        cols += [robot.pose.x_column, robot.pose.y_column, robot.pose.heading_column]
    return list(dict.fromkeys(cols))


def _to_numeric(raw: pd.DataFrame, cols, lines, where) -> pd.DataFrame:
    """Numeric copies of ``cols``; a non-numeric cell raises with its line number."""
    out = {}
    for c in cols:
        s = raw[c]
        if pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s):
            out[c] = s
            continue
        text = s.astype("string").str.strip()
        text = text.mask(text == "")
        num = pd.to_numeric(text, errors="coerce")
        bad = num.isna().to_numpy() & text.notna().to_numpy()
        bad &= ~text.str.lower().isin(["nan", "na", "null", "none"]).fillna(False).to_numpy()
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"{where}: line {lines[i]}, column '{c}': {text.iloc[i]!r} is not a number; "
                "fix or blank that cell"
            )
        out[c] = num.astype(float)
    return pd.DataFrame(out)


def check_time_unit(t_raw, unit: str, *, where="log", column="time") -> None:
    """Raise if the declared time unit does not fit the data.

    Parameters
    ----------
    t_raw : ndarray of shape (N,)
        Time values as logged, sorted, unique.
    unit : {'s', 'ms', 'us', 'ns'}
        The declared unit.

    Raises
    ------
    InputError
        When the median step leaves :data:`STEP_RANGE_S` or the span exceeds
        :data:`MAX_SPAN_S`, suggesting the unit that fits.
    """
    t = np.asarray(t_raw, dtype=float)
    if t.size < 2:
        return
    step_raw = float(np.median(np.diff(t)))
    span_raw = float(t[-1] - t[0])

    def ok(u):
        f = TIME_UNITS_S[u]
        lo, hi = STEP_RANGE_S[0] * (1 - 1e-9), STEP_RANGE_S[1] * (1 + 1e-9)  # rounding slack
        return lo <= step_raw * f <= hi and span_raw * f <= MAX_SPAN_S

    if ok(unit):
        return
    fits = [u for u in TIME_UNITS_S if ok(u)]
    f = TIME_UNITS_S[unit]
    seen = f"median step {step_raw * f:.3g} s and span {span_raw * f:.3g} s"
    if fits:
        best = min(fits, key=lambda u: abs(math.log10(step_raw * TIME_UNITS_S[u] / 0.01)))
        hint = f"the data fit time_unit = '{best}' (median step " \
               f"{step_raw * TIME_UNITS_S[best]:.3g} s); set that in the profile's [log] table"
    else:
        hint = "no time unit fits; check that time_column names the time"
    raise InputError(f"{where}: column '{column}' read as '{unit}' gives {seen}; {hint}")


def unwrap_counter(values, bits: int) -> np.ndarray:
    """Unwrap a wrapping counter into cumulative counts.

    Consecutive differences are taken modulo ``2**bits`` and mapped to
    ``[-2**(bits-1), 2**(bits-1))``, so a counter logged signed or unsigned unwraps the
    same way (domain notes sec. 4, "take counter differences modulo 2^n").

    Parameters
    ----------
    values : ndarray of shape (N,)
        Logged counts (integers).
    bits : int
        Counter width; 0 for a counter that never wraps.

    Returns
    -------
    ndarray of shape (N,), int64
        Cumulative counts starting at the first logged value.

    Examples
    --------
    >>> unwrap_counter(np.array([65534, 65535, 0, 1]), 16).tolist()
    [65534, 65535, 65536, 65537]
    >>> unwrap_counter(np.array([-2, -1, 0, 1]), 16).tolist()
    [-2, -1, 0, 1]
    """
    v = np.asarray(values).astype(np.int64)
    if v.size == 0:
        return v
    d = np.diff(v)
    if 0 < bits < 64:
        half = np.int64(1) << np.int64(bits - 1)
        d = ((d + half) & ((half << np.int64(1)) - np.int64(1))) - half
    return v[0] + np.concatenate([[0], np.cumsum(d)]).astype(np.int64)


def _counter_range_check(v, bits, where, column):
    if not 0 < bits < 64 or v.size == 0:
        return
    lo, hi = -(2 ** (bits - 1)), 2**bits - 1
    vmin, vmax = float(np.min(v)), float(np.max(v))
    if vmin < lo or vmax > hi:
        bad = vmin if vmin < lo else vmax
        raise InputError(
            f"{where}: column '{column}' holds {bad:.0f}, outside a {bits}-bit counter; "
            "set counter_bits in the profile's [[wheel]] to the counter's real width"
        )


def _fill(t, v_valid, valid):
    """Values at every row: ``v_valid`` where ``valid``, linear in time between."""
    out = np.empty(valid.size, dtype=float)
    out[valid] = v_valid
    if not valid.all():
        out[~valid] = np.interp(t[~valid], t[valid], v_valid)
    return out


def _read_csv(path, where, sep):
    try:
        return pd.read_csv(path, sep=sep, skip_blank_lines=False, skipinitialspace=True,
                           low_memory=False, encoding_errors="strict")
    except FileNotFoundError:
        raise InputError(f"{where}: file not found; check the path") from None
    except pd.errors.EmptyDataError:
        raise InputError(f"{where}: the file is empty; give a CSV with a header row") from None
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        msg = str(exc).strip().splitlines()[0]
        raise InputError(f"{where}: not a readable CSV ({msg}); save it as plain CSV") from None


def read_log(path, robot: RobotProfile) -> LogData:
    """Read a robot log CSV as the robot profile describes it.

    Parameters
    ----------
    path : str, Path or file-like
        The CSV file: a header row, then one row per sample. Commas separate the
        columns; a file whose header holds none but semicolons, tabs or bars is read
        with that separator.
    robot : RobotProfile
        Names the columns and their units.

    Returns
    -------
    LogData

    Raises
    ------
    InputError
        Missing file or column, non-numeric cell (with its line number), ambiguous
        duplicated timestamps, implausible time unit, counter out of range.
    """
    where = str(path) if isinstance(path, str | Path) else getattr(path, "name", "log")
    raw = _read_csv(path, where, ",")
    if len(raw.columns) == 1:  # semicolon- or tab-separated logs
        head = str(raw.columns[0])
        sep = max(";\t|", key=head.count)
        if head.count(sep):
            if hasattr(path, "seek"):
                path.seek(0)
            raw = _read_csv(path, where, sep)
    raw.columns = [str(c).strip().lstrip("\ufeff") for c in raw.columns]
    log = log_from_frame(raw, robot, where=where,
                         lines=np.arange(2, len(raw) + 2, dtype=np.int64))
    p = Path(path) if isinstance(path, str | Path) else None
    return LogData(log.frame, log.warnings, p, log.quadrature)


def log_from_frame(raw: pd.DataFrame, robot: RobotProfile, *, where="log",
                   lines=None) -> LogData:
    """Clean a log already held as a DataFrame (columns named as in the profile).

    Parameters
    ----------
    raw : DataFrame
        One row per sample, in file order.
    robot : RobotProfile
    where : str
        Name used in messages.
    lines : ndarray of shape (len(raw),), optional
        Line number of each row (default: row position + 2, header on line 1).

    Returns
    -------
    LogData
    """
    warnings: list[str] = []
    lines = np.arange(2, len(raw) + 2, dtype=np.int64) if lines is None else np.asarray(lines)
    used = _used_columns(robot)
    missing = [c for c in used if c not in raw.columns]
    if missing:
        raise InputError(
            f"{where}: column(s) {missing} named in the robot profile are not in the log; "
            f"columns present: {list(raw.columns)}"
        )
    num = _to_numeric(raw, used, lines, where)
    tc = robot.time_column

    # 2. blank rows and rows without a time
    isna = num.isna().to_numpy()
    blank = isna.all(axis=1)
    no_time = isna[:, used.index(tc)] & ~blank
    if blank.any():
        warnings.append(f"dropped {int(blank.sum())} blank row(s) at line(s) "
                        f"{_lines_text(lines[blank])}")
    if no_time.any():
        warnings.append(f"dropped {int(no_time.sum())} row(s) without a time in '{tc}' "
                        f"at line(s) {_lines_text(lines[no_time])}")
    keep = ~(blank | no_time)
    num = num.loc[keep].reset_index(drop=True)
    lines = lines[keep]
    if len(num) < 2:
        raise InputError(f"{where}: fewer than two samples with a time; nothing to read")

    # 3. sort, duplicates
    t_raw = num[tc].to_numpy()
    if np.any(np.diff(t_raw) < 0):
        back = np.flatnonzero(np.diff(t_raw) < 0) + 1
        warnings.append(f"{back.size} row(s) out of time order (first at line(s) "
                        f"{_lines_text(lines[back])}); sorted by '{tc}'")
        order = np.argsort(t_raw, kind="stable")
        num = num.iloc[order].reset_index(drop=True)
        lines = lines[order]
        t_raw = t_raw[order]
    same = np.flatnonzero(np.diff(t_raw) == 0) + 1
    if same.size:
        vals = num.to_numpy(dtype=float)
        eq = (vals[same] == vals[same - 1]) | (np.isnan(vals[same]) & np.isnan(vals[same - 1]))
        differ = same[~eq.all(axis=1)]
        if differ.size:
            i = int(differ[0])
            raise InputError(
                f"{where}: lines {lines[i - 1]} and {lines[i]} have the same time "
                f"{t_raw[i]!r} but different values ({differ.size} such pair(s)); "
                "the order is ambiguous: fix the log's timestamps"
            )
        warnings.append(f"dropped {same.size} exact duplicate row(s) at line(s) "
                        f"{_lines_text(lines[same])}")
        keep = np.ones(len(num), bool)
        keep[same] = False
        num = num.loc[keep].reset_index(drop=True)
        lines = lines[keep]
        t_raw = t_raw[keep]
    if len(num) < 2:
        raise InputError(f"{where}: fewer than two distinct times; nothing to read")

    # 4. time unit
    check_time_unit(t_raw, robot.time_unit, where=where, column=tc)
    t_s = t_raw.astype(float) * TIME_UNITS_S[robot.time_unit]

    # 6a. trim rows before the first / after the last complete row
    data_cols = [c for c in used if c != tc]
    valid = ~num[data_cols].isna().to_numpy() if data_cols else np.ones((len(num), 0), bool)
    for j, c in enumerate(data_cols):
        if not valid[:, j].any():
            raise InputError(f"{where}: column '{c}' has no numeric values; "
                             "check the column name in the robot profile")
    complete = valid.all(axis=1)
    if not complete.any():
        raise InputError(f"{where}: no row has every used column filled; "
                         f"columns used: {used}")
    first, last = int(np.argmax(complete)), len(complete) - 1 - int(np.argmax(complete[::-1]))
    if first > 0 or last < len(num) - 1:
        cut = np.r_[0:first, last + 1:len(num)]
        warnings.append(f"dropped {cut.size} incomplete row(s) at the start or end "
                        f"(line(s) {_lines_text(lines[cut])})")
        sl = slice(first, last + 1)
        num = num.iloc[sl].reset_index(drop=True)
        lines, t_s, valid = lines[sl], t_s[sl], valid[sl]
    holes = ~valid.all(axis=1)
    if holes.any():
        warnings.append(f"filled {int(holes.sum())} row(s) with empty cells (counts and "
                        "angles by linear interpolation in time, raw channels by holding the "
                        f"last reading), at line(s) {_lines_text(lines[holes])}")

    frame = {"line": lines.astype(np.int64), "t_s": t_s}
    quad = {}
    # 5/6b. wheels
    for w in robot.wheels:
        if w.raw_a_column is not None and w.raw_b_column is not None:
            a = num[w.raw_a_column].ffill().to_numpy(dtype=float)
            b = num[w.raw_b_column].ffill().to_numpy(dtype=float)
            res = decode_raw(a, b, t_s, threshold=w.raw_threshold, name=w.name)
            quad[w.name] = res
            warnings += res.warnings
            frame[f"ticks_{w.name}"] = res.counts
            continue
        series = num[w.column]
        col = series.to_numpy(dtype=float)
        ok = ~np.isnan(col)
        if pd.api.types.is_integer_dtype(series):
            v = series.to_numpy(dtype=np.int64)  # exact beyond 2**53
        else:
            v = col[ok]
            if np.any(v != np.round(v)):
                i = int(np.flatnonzero(ok)[np.flatnonzero(v != np.round(v))[0]])
                raise InputError(f"{where}: line {lines[i]}, column '{w.column}': {col[i]!r} is "
                                 "not a whole count; the column must hold cumulative encoder "
                                 "ticks")
        _counter_range_check(v, w.counter_bits, where, w.column)
        ticks = unwrap_counter(v, w.counter_bits)
        if w.counter_bits and v.size > 1:
            big = np.abs(np.diff(ticks)) > 2 ** (w.counter_bits - 2)
            if big.any():
                warnings.append(f"wheel '{w.name}': {int(big.sum())} step(s) over a quarter of "
                                f"the {w.counter_bits}-bit counter range; wrap-around may be "
                                "ambiguous: log faster")
        if not ok.all():
            full = np.empty(len(col), np.int64)
            full[ok] = ticks
            full[~ok] = np.round(np.interp(t_s[~ok], t_s[ok], ticks.astype(float)))
            ticks = full
        frame[f"ticks_{w.name}"] = ticks
    # 7. IMU
    if robot.imu is not None:
        imu = robot.imu
        h = num[imu.column].to_numpy(dtype=float) * ANGLE_UNITS_RAD[imu.unit]
        ok = ~np.isnan(h)
        hv = h[ok]
        jumps = np.abs(np.diff(hv)) > math.pi
        if imu.wrapped:
            hv = np.unwrap(hv)
        elif jumps.any():
            warnings.append(f"IMU column '{imu.column}' jumps by more than 180 deg "
                            f"{int(jumps.sum())} time(s) but the profile says it is not "
                            "wrapped; set wrapped = true in [imu] if it wraps")
        if imu.unit == "rad" and np.nanmax(np.abs(h)) > 2 * math.pi + 0.1 and imu.wrapped:
            warnings.append(f"IMU column '{imu.column}' is declared wrapped radians but reaches "
                            f"{np.nanmax(np.abs(h)):.1f}; is it in degrees?")
        tv = t_s[ok]
        hv = imu.sign * (hv[0] + imu.scale * (hv - hv[0])) - imu.bias_radps * (tv - tv[0])
        frame["imu_heading_rad"] = _fill(t_s, hv, ok)
    # pose
    if robot.pose is not None:
        pc = robot.pose
        fl, fa = LENGTH_UNITS_M[pc.length_unit], ANGLE_UNITS_RAD[pc.angle_unit]
        for key, col, f in (("pose_x_m", pc.x_column, fl), ("pose_y_m", pc.y_column, fl),
                            ("pose_heading_rad", pc.heading_column, fa)):
            v = num[col].to_numpy(dtype=float) * f
            ok = ~np.isnan(v)
            vv = np.unwrap(v[ok]) if key == "pose_heading_rad" else v[ok]
            frame[key] = _fill(t_s, vv, ok)
    _gap_warning(t_s, lines, warnings)
    return LogData(pd.DataFrame(frame), warnings, None, quad)


def _gap_warning(t_s, lines, warnings):
    dt = np.diff(t_s)
    med = float(np.median(dt))
    gaps = np.flatnonzero(dt > 10 * med)
    if gaps.size:
        warnings.append(f"{gaps.size} gap(s) longer than 10 median steps ({10 * med:.3g} s), "
                        f"the longest {dt[gaps].max():.3g} s, after line(s) "
                        f"{_lines_text(lines[gaps])}")

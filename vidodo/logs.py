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
           "counter_width_slip", "STEP_RANGE_S", "MAX_SPAN_S", "CHUNK_ROWS"]

STEP_RANGE_S = (2e-5, 0.5)
"""Plausible median sampling step of an odometry log [s]: 50 kHz down to 2 Hz (slower
logging cannot follow a turning robot; common practice). Milliseconds read as seconds
(or microseconds as milliseconds) give steps of seconds and fall outside."""
MAX_SPAN_S = 86400.0
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
    """The time column and every data column the profile reads, once each."""
    return list(dict.fromkeys([robot.time_column, *_consumers(robot)]))


def _to_numeric(raw: pd.DataFrame, cols, lines, where) -> dict:
    """Numeric arrays of ``cols`` (int64 where every cell is a whole number, else
    float64 with NaN for blanks); a non-numeric or infinite cell raises with its line."""
    out = {}
    for c in cols:
        s = raw[c]
        if pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s):
            arr = s.to_numpy()  # copied, so the parsed chunk is freed
            arr = np.array(arr, dtype=np.int64 if arr.dtype.kind in "iu" else float)
            _refuse_infinite(arr, c, lines, where)
            out[c] = arr
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
        out[c] = num.to_numpy(dtype=float, na_value=np.nan)
        _refuse_infinite(out[c], c, lines, where)
    return out


def _refuse_infinite(arr, column, lines, where) -> None:
    """An infinite cell (``inf``, or a number beyond the float range) is refused."""
    if arr.dtype.kind != "f":
        return
    inf = np.isinf(arr)
    if inf.any():
        i = int(np.flatnonzero(inf)[0])
        raise InputError(f"{where}: line {lines[i]}, column '{column}': "
                         f"{float(arr[i])} is not a finite number ({int(inf.sum())} "
                         "such cell(s)); fix or blank those cells")


def _fits_register(values, m: int) -> bool:
    """Whether every reading fits a register of ``m`` values, signed or unsigned.

    >>> _fits_register(np.array([0, 200, 255]), 256), _fits_register(np.array([-3, 300]), 256)
    (True, False)
    """
    lo, hi = int(values.min()), int(values.max())
    return (-(m // 2) <= lo and hi < m // 2) or (0 <= lo and hi < m)


def counter_width_slip(values, bits: int):
    """The narrower counter width the logged counts wrap at, if not the declared one.

    A 16-bit counter logged under ``counter_bits = 32`` (or a wrapping counter declared
    as not wrapping) jumps by nearly +-2^16 (or +-2^32) where it wraps; those jumps
    minus a whole multiple of the width are ordinary steps. Only widths whose register
    holds every logged reading (signed or unsigned) are considered.

    Parameters
    ----------
    values : ndarray of shape (N,), int64
        Logged counts in file order.
    bits : int
        Declared width (0: never wraps).

    Returns
    -------
    tuple or None
        ``(width_bits, index, jump)``: the width that explains every big jump, the row
        index after the first such jump and its size; None when nothing points to one.
    """
    v = np.asarray(values, dtype=np.int64)
    if v.size < 21:  # too few steps to tell a wrap from motion
        return None
    d = np.diff(v)
    for b in (8, 16, 24, 32):
        if bits and b >= bits:
            break
        m = np.int64(1) << np.int64(b)
        if not _fits_register(v, int(m)):  # a b-bit counter's readings fit b bits
            continue
        big = (d > m // 2) | (d < -(m // 2))  # more than a b-bit counter can step
        n_big = int(np.count_nonzero(big))
        if not n_big or n_big > 0.05 * d.size:  # wraps are rare events
            continue
        typical = float(np.percentile(np.abs(d[~big]), 99))
        wraps = np.round(d[big] / float(m)).astype(np.int64)
        rest = d[big] - wraps * m
        limit = min(float(m) / 8.0, max(16.0, 8.0 * typical))
        if np.all(np.abs(wraps) == 1) and np.all(np.abs(rest) <= limit):
            i = int(np.flatnonzero(big)[0])
            return b, i + 1, int(d[i])
    return None


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
    t = np.asarray(t_raw)
    if t.size < 2:
        return
    step = np.diff(t)
    step_raw = float(np.median(step, overwrite_input=True))
    del step
    span_raw = float(t[-1]) - float(t[0])

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
    elif step_raw * f > STEP_RANGE_S[1] and span_raw * f <= MAX_SPAN_S:
        hint = (f"odometry needs a sample every {STEP_RANGE_S[1]:g} s or faster; check that "
                "time_column names the time, or log faster")
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
    v = np.asarray(values).astype(np.int64, copy=False)
    out = np.empty(v.shape, np.int64)
    if v.size == 0:
        return out
    out[0] = 0
    d = out[1:]  # the steps, computed in place (a long log holds one extra array only)
    np.subtract(v[1:], v[:-1], out=d)
    if 0 < bits < 64:
        half = np.int64(1) << np.int64(bits - 1)
        d += half
        d &= (half << np.int64(1)) - np.int64(1)
        d -= half
    np.cumsum(out, out=out)
    out += v[0]
    return out


def unwrap_inplace(p):
    """``numpy.unwrap(p)`` (period 2 pi) computed into ``p`` itself, for long arrays.

    Same operations as NumPy's, so the same numbers; holds two extra arrays at most.

    Parameters
    ----------
    p : ndarray of shape (N,), float64
        Angles [rad]; overwritten.

    Returns
    -------
    ndarray
        ``p``, unwrapped.
    """
    if p.size < 2:
        return p
    d = np.diff(p)
    dd = d + math.pi
    np.mod(dd, 2 * math.pi, out=dd)
    dd -= math.pi
    dd[(dd == -math.pi) & (d > 0)] = math.pi
    dd -= d
    dd[(d < math.pi) & (d > -math.pi)] = 0
    del d
    np.cumsum(dd, out=dd)
    p[1:] += dd
    return p


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
    if valid.all():
        return v_valid
    out = np.empty(valid.size, dtype=float)
    out[valid] = v_valid
    if not valid.all():
        out[~valid] = np.interp(t[~valid], t[valid], v_valid)
    return out


CHUNK_ROWS = 200_000
"""Rows parsed at a time: a big log is never held as text and numbers at once."""


def _read_csv(path, where, sep, **kw):
    try:
        return pd.read_csv(path, sep=sep, skip_blank_lines=False, skipinitialspace=True,
                           encoding_errors="strict", **kw)
    except Exception as exc:  # noqa: BLE001 - mapped to one-line input errors
        raise _csv_error(exc, where) from None


def _chunks(path, where, sep):
    """The file's rows, :data:`CHUNK_ROWS` at a time, with read errors as InputError."""
    reader = _read_csv(path, where, sep, chunksize=CHUNK_ROWS)
    with reader:
        while True:
            try:
                chunk = next(reader)
            except StopIteration:
                return
            except Exception as exc:  # noqa: BLE001 - mapped to one-line input errors
                raise _csv_error(exc, where) from None
            yield chunk


def _csv_error(exc, where):
    """The one-line InputError for an exception raised while reading the CSV."""
    if isinstance(exc, FileNotFoundError):
        return InputError(f"{where}: file not found; check the path")
    if isinstance(exc, IsADirectoryError):
        return InputError(f"{where}: is a folder; give the log CSV file")
    if isinstance(exc, pd.errors.EmptyDataError):
        return InputError(f"{where}: the file is empty; give a CSV with a header row")
    if isinstance(exc, pd.errors.ParserError | UnicodeDecodeError | ValueError):
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        return InputError(f"{where}: not a readable CSV ({msg}); save it as plain CSV")
    if isinstance(exc, OSError):
        return InputError(f"{where}: cannot read ({exc.strerror or exc})")
    return exc


def _clean_name(c) -> str:
    return str(c).strip().lstrip("\ufeff")


def _check_columns(columns, used, where):
    missing = [c for c in used if c not in columns]
    if missing:
        raise InputError(
            f"{where}: column(s) {missing} named in the robot profile are not in the log; "
            f"columns present: {list(columns)}"
        )


def read_log(path, robot: RobotProfile) -> LogData:
    """Read a robot log CSV as the robot profile describes it.

    The file is parsed :data:`CHUNK_ROWS` rows at a time and only the columns the
    profile uses are kept, so the peak memory stays under twice the file size
    (``benchmarks/resources.py``).

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
        Missing file or column, non-numeric or infinite cell (with its line number),
        ambiguous duplicated timestamps, implausible time unit, counter out of range
        or of another width.
    """
    where = str(path) if isinstance(path, str | Path) else getattr(path, "name", "log")
    head = _read_csv(path, where, ",", nrows=0)
    sep = ","
    if len(head.columns) == 1:  # semicolon- or tab-separated logs
        first = str(head.columns[0])
        cand = max(";\t|", key=first.count)
        if first.count(cand):
            sep = cand
            if hasattr(path, "seek"):
                path.seek(0)
            head = _read_csv(path, where, sep, nrows=0)
    used = _used_columns(robot)
    _check_columns([_clean_name(c) for c in head.columns], used, where)
    if hasattr(path, "seek"):
        path.seek(0)
    num, n = _read_columns(path, where, sep, used)
    log = _clean(num, robot, where, np.arange(2, n + 2, dtype=np.int64))
    p = Path(path) if isinstance(path, str | Path) else None
    return LogData(log.frame, log.warnings, p, log.quadrature)


def _row_bound(path) -> int | None:
    """More rows than the file can hold (its newline count + 1), or None for streams."""
    if not isinstance(path, str | Path):
        return None
    n = 1
    with open(path, "rb") as fh:
        while block := fh.read(1 << 22):
            n += block.count(b"\n")
    return n


class _Column:
    """One used column, filled chunk by chunk into an array allocated once.

    Allocating the whole column up front (from the file's newline count) keeps the
    chunks' small arrays from piling up in the heap: concatenating them at the end
    would hold every column twice and leave the heap fragmented.
    """

    def __init__(self, capacity):
        self.capacity = capacity
        self.data = None
        self.parts = []  # streams of unknown length: concatenated at the end
        self.n = 0

    def add(self, arr):
        if self.capacity is None:
            self.parts.append(arr)
            return
        if self.data is None:
            self.data = np.empty(self.capacity, arr.dtype)
        elif arr.dtype.kind == "f" and self.data.dtype.kind != "f":
            self.data = self.data.astype(float)  # a column of whole numbers gained a blank
        self.data[self.n:self.n + arr.size] = arr
        self.n += arr.size

    def array(self):
        if self.capacity is None:
            return np.concatenate(self.parts) if self.parts else np.zeros(0)
        return self.data[:self.n] if self.data is not None else np.zeros(0)


def _read_columns(path, where, sep, used) -> tuple[dict, int]:
    """The used columns as numeric arrays, and the number of rows read."""
    if hasattr(path, "seek"):
        path.seek(0)
    bound = _row_bound(path)
    cols = {c: _Column(bound) for c in used}
    n = 0
    # every column is parsed (a ragged row must fail, which usecols would hide), but
    # only a chunk at a time, and only the used ones are kept
    for chunk in _chunks(path, where, sep):
        chunk.columns = [_clean_name(c) for c in chunk.columns]
        lines = np.arange(n + 2, n + 2 + len(chunk), dtype=np.int64)
        for c, arr in _to_numeric(chunk, used, lines, where).items():
            cols[c].add(arr)
        n += len(chunk)
        del chunk
    return {c: cols.pop(c).array() for c in used}, n


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
    lines = np.arange(2, len(raw) + 2, dtype=np.int64) if lines is None else np.asarray(lines)
    used = _used_columns(robot)
    _check_columns(raw.columns, used, where)
    return _clean(_to_numeric(raw, used, lines, where), robot, where, lines)


def _take(num: dict, rows) -> dict:
    """Every column at ``rows`` (a mask or an index), replacing the old arrays."""
    for c in list(num):
        num[c] = num[c][rows]
    return num


def _drop_blank_rows(num, tc, lines, warnings):
    blank = None
    for a in num.values():
        na = np.isnan(a) if a.dtype.kind == "f" else np.zeros(a.size, bool)
        blank = na if blank is None else blank & na
    t = num[tc]
    no_time = (np.isnan(t) if t.dtype.kind == "f" else np.zeros(t.size, bool)) & ~blank
    if blank.any():
        warnings.append(f"dropped {int(blank.sum())} blank row(s) at line(s) "
                        f"{_lines_text(lines[blank])}")
    if no_time.any():
        warnings.append(f"dropped {int(no_time.sum())} row(s) without a time in '{tc}' "
                        f"at line(s) {_lines_text(lines[no_time])}")
    keep = ~(blank | no_time)
    if not keep.all():
        _take(num, keep)
        lines = lines[keep]
    return lines


def _sort_and_dedupe(num, tc, lines, where, warnings):
    t_raw = num[tc]
    if np.any(np.diff(t_raw) < 0):
        back = np.flatnonzero(np.diff(t_raw) < 0) + 1
        warnings.append(f"{back.size} row(s) out of time order (first at line(s) "
                        f"{_lines_text(lines[back])}); sorted by '{tc}'")
        order = np.argsort(t_raw, kind="stable")
        _take(num, order)
        lines = lines[order]
        t_raw = num[tc]
    same = np.flatnonzero(np.diff(t_raw) == 0) + 1
    if same.size:
        eq = np.ones(same.size, bool)
        for a in num.values():
            x, y = a[same], a[same - 1]
            eq &= (x == y) | (np.isnan(x) & np.isnan(y)) if a.dtype.kind == "f" else x == y
        differ = same[~eq]
        if differ.size:
            i = int(differ[0])
            raise InputError(
                f"{where}: lines {lines[i - 1]} and {lines[i]} have the same time "
                f"{float(t_raw[i]):g} but different values ({differ.size} such pair(s)); "
                "the order is ambiguous: fix the log's timestamps"
            )
        warnings.append(f"dropped {same.size} exact duplicate row(s) at line(s) "
                        f"{_lines_text(lines[same])}")
        keep = np.ones(len(t_raw), bool)
        keep[same] = False
        _take(num, keep)
        lines = lines[keep]
    return lines


def _trim_incomplete(num, tc, used, lines, where, warnings):
    """Drop rows before the first and after the last complete row; report holes."""
    data_cols = [c for c in used if c != tc]
    complete = np.ones(len(lines), bool)
    for c in data_cols:
        a = num[c]
        if a.dtype.kind != "f":
            continue
        ok = ~np.isnan(a)
        if not ok.any():
            raise InputError(f"{where}: column '{c}' has no numeric values; "
                             "check the column name in the robot profile")
        complete &= ok
    if not complete.any():
        raise InputError(f"{where}: no row has every used column filled; "
                         f"columns used: {used}")
    first, last = int(np.argmax(complete)), len(complete) - 1 - int(np.argmax(complete[::-1]))
    if first > 0 or last < len(complete) - 1:
        cut = np.r_[0:first, last + 1:len(complete)]
        warnings.append(f"dropped {cut.size} incomplete row(s) at the start or end "
                        f"(line(s) {_lines_text(lines[cut])})")
        sl = slice(first, last + 1)
        _take(num, sl)
        lines, complete = lines[sl], complete[sl]
    if not complete.all():
        warnings.append(f"filled {int((~complete).sum())} row(s) with empty cells (counts "
                        "and angles by linear interpolation in time, raw channels by holding "
                        f"the last reading), at line(s) {_lines_text(lines[~complete])}")
    return lines


def _clean(num: dict, robot: RobotProfile, where, lines) -> LogData:
    """Steps 2-7 of the module notes on numeric columns (arrays, freed as consumed)."""
    warnings: list[str] = []
    used = _used_columns(robot)
    tc = robot.time_column
    lines = _drop_blank_rows(num, tc, lines, warnings)
    if len(lines) < 2:
        raise InputError(f"{where}: fewer than two samples with a time; nothing to read")
    lines = _sort_and_dedupe(num, tc, lines, where, warnings)
    if len(lines) < 2:
        raise InputError(f"{where}: fewer than two distinct times; nothing to read")
    check_time_unit(num[tc], robot.time_unit, where=where, column=tc)
    lines = _trim_incomplete(num, tc, used, lines, where, warnings)
    t_s = num.pop(tc).astype(float)
    t_s *= TIME_UNITS_S[robot.time_unit]
    uses = {c: sum(c == u for u in _consumers(robot)) for c in num}

    def take(col):
        uses[col] -= 1
        return num.pop(col) if uses[col] <= 0 else num[col]

    frame = {"line": lines.astype(np.int64, copy=False), "t_s": t_s}
    quad = {}
    for w in robot.wheels:
        if w.raw_a_column is not None and w.raw_b_column is not None:
            a = pd.Series(take(w.raw_a_column)).ffill().to_numpy(dtype=float)
            b = pd.Series(take(w.raw_b_column)).ffill().to_numpy(dtype=float)
            res = decode_raw(a, b, t_s, threshold=w.raw_threshold, name=w.name)
            quad[w.name] = res
            warnings += res.warnings
            frame[f"ticks_{w.name}"] = res.counts
            continue
        frame[f"ticks_{w.name}"] = _wheel_ticks(take(w.column), w, t_s, lines, where,
                                                warnings)
    if robot.imu is not None:
        frame["imu_heading_rad"] = _imu_heading(take(robot.imu.column), robot.imu, t_s,
                                                warnings)
    if robot.pose is not None:
        pc = robot.pose
        fl, fa = LENGTH_UNITS_M[pc.length_unit], ANGLE_UNITS_RAD[pc.angle_unit]
        for key, col, f in (("pose_x_m", pc.x_column, fl), ("pose_y_m", pc.y_column, fl),
                            ("pose_heading_rad", pc.heading_column, fa)):
            v = take(col) * f  # a new float array
            ok = ~np.isnan(v)
            vv = v[ok] if not ok.all() else v
            if key == "pose_heading_rad":
                vv = unwrap_inplace(vv)
            frame[key] = _fill(t_s, vv, ok)
            del v, vv
    _gap_warning(t_s, lines, warnings)
    return LogData(pd.DataFrame(frame, copy=False), warnings, None, quad)


def _consumers(robot: RobotProfile) -> list[str]:
    """Every use of a data column, with repeats (a column read twice is kept longer)."""
    out = []
    for w in robot.wheels:
        if w.raw_a_column is not None and w.raw_b_column is not None:
            out += [w.raw_a_column, w.raw_b_column]
        else:
            out.append(w.column)
    if robot.imu is not None:
        out.append(robot.imu.column)
    if robot.pose is not None:
        out += [robot.pose.x_column, robot.pose.y_column, robot.pose.heading_column]
    return out


def _wheel_ticks(col, w, t_s, lines, where, warnings):
    """Unwrapped cumulative counts of one wheel, holes filled (steps 5 and 6b)."""
    if col.dtype.kind in "iu":
        ok = np.ones(col.size, bool)
        v = col.astype(np.int64, copy=False)  # exact beyond 2**53
    else:
        ok = ~np.isnan(col)
        v = col[ok]
        frac = np.flatnonzero(v != np.round(v))
        if frac.size:
            i = int(np.flatnonzero(ok)[frac[0]])
            raise InputError(f"{where}: line {lines[i]}, column '{w.column}': {col[i]:g} is "
                             "not a whole count; the column must hold cumulative encoder "
                             "ticks")
    _counter_range_check(v, w.counter_bits, where, w.column)
    slip = counter_width_slip(v, w.counter_bits)
    if slip is not None:
        b, i, jump = slip
        raise InputError(
            f"{where}: line {lines[np.flatnonzero(ok)[i]]}, column '{w.column}' jumps by "
            f"{jump:+d} (near {'-' if jump < 0 else '+'}2^{b}): the counter wraps at {b} "
            f"bits but the profile says counter_bits = {w.counter_bits}; set counter_bits "
            f"= {b} in wheel '{w.name}'")
    ticks = unwrap_counter(v, w.counter_bits)
    del v
    if w.counter_bits and ticks.size > 1:
        step = np.diff(ticks)
        quarter = 2 ** (w.counter_bits - 2)
        big = (step > quarter) | (step < -quarter)
        del step
        if big.any():
            warnings.append(f"wheel '{w.name}': {int(big.sum())} step(s) over a quarter of "
                            f"the {w.counter_bits}-bit counter range; wrap-around may be "
                            "ambiguous: log faster")
    if not ok.all():
        full = np.empty(ok.size, np.int64)
        full[ok] = ticks
        full[~ok] = np.round(np.interp(t_s[~ok], t_s[ok], ticks.astype(float)))
        ticks = full
    return ticks


def _imu_heading(col, imu, t_s, warnings):
    """Continuous IMU heading [rad], scale and sign applied, holes filled (step 7).

    Computed in place on one new array (a long log holds two extra arrays at most).
    """
    h = col * ANGLE_UNITS_RAD[imu.unit]  # a new float array
    ok = ~np.isnan(h)
    hv = h if ok.all() else h[ok]
    d = np.diff(hv)
    n_jumps = int(np.count_nonzero((d > math.pi) | (d < -math.pi)))
    del d
    peak = max(float(np.max(hv)), -float(np.min(hv)))
    if not imu.wrapped and n_jumps:
        warnings.append(f"IMU column '{imu.column}' jumps by more than 180 deg "
                        f"{n_jumps} time(s) but the profile says it is not "
                        "wrapped; set wrapped = true in [imu] if it wraps")
    if imu.unit == "rad" and peak > 2 * math.pi + 0.1 and imu.wrapped:
        warnings.append(f"IMU column '{imu.column}' is declared wrapped radians but reaches "
                        f"{peak:.1f}; is it in degrees?")
    if imu.wrapped:
        unwrap_inplace(hv)
    h0 = float(hv[0])
    hv -= h0  # sign * (h0 + scale * (h - h0)), in place
    hv *= imu.scale
    hv += h0
    hv *= imu.sign
    if imu.bias_radps:  # a constant gyro bias, integrated from the first reading
        tv = t_s if hv is h else t_s[ok]
        hv -= imu.bias_radps * (tv - tv[0])
    return _fill(t_s, hv, ok)


def _gap_warning(t_s, lines, warnings):
    dt = np.diff(t_s)
    med = float(np.median(dt))
    gaps = np.flatnonzero(dt > 10 * med)
    if gaps.size:
        warnings.append(f"{gaps.size} gap(s) longer than 10 median steps ({10 * med:.3g} s), "
                        f"the longest {dt[gaps].max():.3g} s, after line(s) "
                        f"{_lines_text(lines[gaps])}")

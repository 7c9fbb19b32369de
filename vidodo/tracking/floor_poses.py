"""The floor registrations a track was measured with, kept beside it.

A truth track is only as right as the floor registration it went through, and every
picture drawn from it afterwards (the replay, the report's frames) must use the very
same registration, or a ring drawn from the track lands elsewhere than the marker it was
measured from: a replay that registers the frames again may pick another reference, a
grid one tile off, or no points where the track had them.

:class:`RecordingRegistrar` wraps the registrar the tracker uses and keeps every
registration it hands out; :func:`write_floor_poses` saves them as CSV (``track.floor.csv``
beside ``track.csv``; columns below), :func:`read_floor_poses` reads them back as
:class:`FloorPoses`, whose :meth:`~FloorPoses.at` gives the registration in effect at
a frame time the way the tracker used it (the last one made at or before that time).

Columns: ``t_s, ok, method, rms_px, rms_floor_m, n_points, fx_px, fy_px, cx_px, cy_px,
dist_0 .. dist_<k>, rvec_0..2, tvec_0_m..tvec_2_m, readout_s, rvec_rate_0..2,
tvec_rate_0_mps..tvec_rate_2_mps, detection_readout_s`` (the rolling-shutter readout the
tracker placed detections in time with; the same on every row).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..csvsafe import read_csv_checked
from ..errors import InputError

__all__ = ["RecordingRegistrar", "FloorPoses", "write_floor_poses", "read_floor_poses",
           "floor_poses_path"]


class RecordingRegistrar:
    """A registrar that keeps every registration it returns (in call order).

    Parameters
    ----------
    inner : object
        Anything with ``register(frame_bgr, t_s, mask=None) -> FrameRegistration``.
    """

    def __init__(self, inner):
        self.inner = inner
        self.records: list = []

    def register(self, frame_bgr, t_s, mask=None):
        """Register through the wrapped registrar and keep the result."""
        reg = (self.inner.register(frame_bgr, t_s, mask=mask) if mask is not None
               else self.inner.register(frame_bgr, t_s))
        self.records.append(reg)
        return reg

    def __getattr__(self, name):
        return getattr(self.inner, name)


def floor_poses_path(track_csv) -> Path:
    """Where the registrations of a track CSV live: ``track.csv`` -> ``track.floor.csv``."""
    p = Path(track_csv)
    return p.with_name(p.stem + ".floor.csv")


def _vec(v, n):
    a = np.full(n, np.nan) if v is None else np.asarray(v, float).ravel()
    return a if a.size == n else np.resize(a, n)


def write_floor_poses(registrations, path, *, detection_readout_s: float = 0.0) -> Path:
    """Save registrations (``FrameRegistration`` objects) as CSV; returns ``path``."""
    regs = list(registrations)
    n_dist = max([np.asarray(r.dist_coeffs).size for r in regs] + [5])
    rows = []
    for r in regs:
        k = np.asarray(r.camera_matrix, float)
        row = {"t_s": float(r.t_s), "ok": bool(r.ok), "method": r.method,
               "rms_px": float(r.rms_px), "rms_floor_m": float(r.rms_floor_m),
               "n_points": int(r.n_points), "fx_px": k[0, 0], "fy_px": k[1, 1],
               "cx_px": k[0, 2], "cy_px": k[1, 2]}
        d = np.zeros(n_dist)
        dd = np.asarray(r.dist_coeffs, float).ravel()
        d[:dd.size] = dd
        row.update({f"dist_{i}": d[i] for i in range(n_dist)})
        row.update({f"rvec_{i}": v for i, v in enumerate(_vec(r.rvec, 3))})
        row.update({f"tvec_{i}_m": v for i, v in enumerate(_vec(r.tvec, 3))})
        row["readout_s"] = float(getattr(r, "readout_s", 0.0) or 0.0)
        row.update({f"rvec_rate_{i}": v
                    for i, v in enumerate(_vec(getattr(r, "rvec_rate", None), 3))})
        row.update({f"tvec_rate_{i}_mps": v
                    for i, v in enumerate(_vec(getattr(r, "tvec_rate", None), 3))})
        row["detection_readout_s"] = float(detection_readout_s)
        rows.append(row)
    path = Path(path)
    pd.DataFrame(rows).to_csv(path, index=False, float_format="%.10g")
    return path


@dataclass(frozen=True)
class FloorPoses:
    """Registrations of one track, sorted by time."""

    registrations: tuple
    """``FrameRegistration`` per registration made, in time order."""
    detection_readout_s: float = 0.0
    """Readout the tracker placed detections in time with [s]."""

    @property
    def t_s(self) -> np.ndarray:
        """Times of the registrations [s]."""
        return np.array([r.t_s for r in self.registrations], float)

    def at(self, t_s: float, tol_s: float = 1e-4):
        """The registration in effect at ``t_s``: the last successful one made at or
        before it (None before the first)."""
        times = self.t_s
        i = int(np.searchsorted(times, t_s + tol_s, side="right")) - 1
        while i >= 0:
            if self.registrations[i].ok:
                return self.registrations[i]
            i -= 1
        return None

    def __len__(self):
        return len(self.registrations)


def _frame_registration(row, dist_cols):
    from ..registration.frame import FrameRegistration

    k = np.array([[row["fx_px"], 0.0, row["cx_px"]], [0.0, row["fy_px"], row["cy_px"]],
                  [0.0, 0.0, 1.0]])
    rate_r = np.array([row[f"rvec_rate_{i}"] for i in range(3)], float)
    rate_t = np.array([row[f"tvec_rate_{i}_mps"] for i in range(3)], float)
    has_rate = bool(np.all(np.isfinite(rate_r)) and np.all(np.isfinite(rate_t)))
    method = row["method"] if isinstance(row["method"], str) else ""
    return FrameRegistration(
        float(row["t_s"]), str(row["ok"]).strip().lower() in ("true", "1"), k,
        np.array([row[c] for c in dist_cols], float),
        np.array([row[f"rvec_{i}"] for i in range(3)], float),
        np.array([row[f"tvec_{i}_m"] for i in range(3)], float),
        float(row["rms_px"]), float(row["rms_floor_m"]), int(row["n_points"]), method,
        readout_s=float(row["readout_s"]) if math.isfinite(row["readout_s"]) else 0.0,
        rvec_rate=rate_r if has_rate else None, tvec_rate=rate_t if has_rate else None)


def read_floor_poses(path) -> FloorPoses:
    """Read registrations written by :func:`write_floor_poses`.

    Raises
    ------
    InputError
        Unreadable file or a missing column (naming it).
    """
    p = Path(path)
    df = read_csv_checked(p, "track the video again", "track the video again")
    need = ["t_s", "ok", "method", "rms_px", "rms_floor_m", "n_points", "fx_px", "fy_px",
            "cx_px", "cy_px", "readout_s", "detection_readout_s"] + \
        [f"rvec_{i}" for i in range(3)] + [f"tvec_{i}_m" for i in range(3)] + \
        [f"rvec_rate_{i}" for i in range(3)] + [f"tvec_rate_{i}_mps" for i in range(3)]
    missing = [c for c in need if c not in df.columns]
    dist_cols = sorted((c for c in df.columns if c.startswith("dist_")),
                       key=lambda c: int(c.split("_")[1]))
    if missing or not dist_cols:
        raise InputError(f"{p}: column {(missing or ['dist_0'])[0]!r} missing; is this a "
                         "track.floor.csv written by vidodo?")
    df = df.sort_values("t_s", kind="stable")
    regs = tuple(_frame_registration(row, dist_cols) for _, row in df.iterrows())
    ro = float(df["detection_readout_s"].iloc[0]) if len(df) else 0.0
    return FloorPoses(regs, ro if math.isfinite(ro) else 0.0)

"""The truth track's result and its CSV file."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from ..errors import InputError

__all__ = ["TRACK_COLUMNS", "REGISTRATION_COLUMNS", "TrackResult", "save_track_csv",
           "load_track_csv", "shared_column_names"]

TRACK_COLUMNS = [
    "t_s", "x_m", "y_m", "heading_rad", "sigma_xy_m", "sigma_heading_rad", "vx_mps",
    "vy_mps", "speed_mps", "omega_radps", "ax_mps2", "ay_mps2", "detected", "interpolated",
]
REGISTRATION_COLUMNS = ["t_s", "ok", "rms_px", "rms_floor_m", "fresh"]
SHARED_PREFIX = "shared"
"""Optional columns after :data:`TRACK_COLUMNS`: ``shared<k>_x_m, shared<k>_y_m``, the
modes of the position error the run's samples share
(:mod:`vidodo.tracking.shared_error`); a track without them is read as before."""


def shared_column_names(columns):
    """The shared-error mode columns among ``columns``, in pairs of x and y, in order."""
    out = []
    k = 1
    while f"{SHARED_PREFIX}{k}_x_m" in columns and f"{SHARED_PREFIX}{k}_y_m" in columns:
        out += [f"{SHARED_PREFIX}{k}_x_m", f"{SHARED_PREFIX}{k}_y_m"]
        k += 1
    return out


# ----------------------------------------------------------------------- results
@dataclass(frozen=True)
class TrackResult:
    """The truth track of one video and how far to trust it."""

    track: pd.DataFrame
    """One row per video frame, columns :data:`TRACK_COLUMNS` and the shared error's
    modes (:func:`shared_column_names`; SI units, floor frame;
    ``sigma_xy_m`` is the RMS of the position error magnitude: the smoother's
    uncertainty from the fresh part of the corner noise, plus the persistent part (both
    estimated from the rigid fits' residuals, over the run by
    :func:`estimate_corner_noise` and around each frame by :func:`local_corner_noise`,
    and scaled per signal by the smoother's innovation likelihood), an optional common
    shift of all corners (``corner_bias_px`` per axis), the detector's pixel locking
    where the marker's edges run along the pixel grid and it holds its sub-pixel place
    (:mod:`~vidodo.tracking.pixel_lock`), the registration's own error
    (its parameter covariance carried through the pose fit, or where larger its
    prediction error at evidence it did not use, at the marker's image scale) and the
    readout's timing error; ``sigma_heading_rad`` likewise from the fresh and
    persistent corner noise (the persistent part times
    :data:`~vidodo.tracking.detector.ROTATION_EXCESS`), the registration's covariance
    and the turn rate)."""
    quality: dict
    """Frames, detection fraction, marker cell size [px], gaps, dropped/duplicated
    frames, registration statistics, readout time [s], corner noise [px]."""
    warnings: list = field(default_factory=list)
    """Plain-language warnings about anything that makes the track less certain."""
    registrations: pd.DataFrame | None = None
    """Per frame: t_s, ok, rms_px, rms_floor_m of the registration in effect, and
    ``fresh`` (registered on this very frame)."""
    timings_s: dict = field(default_factory=dict)
    """Seconds per stage (``decode``, ``register``, ``detect``, ``smooth``; see
    :mod:`vidodo.timings`)."""



# ------------------------------------------------------------------------- files
def save_track_csv(result, path):
    """Write the truth track as CSV (columns :data:`TRACK_COLUMNS`, then the shared
    error's modes where the track has them; SI units)."""
    track = result.track if isinstance(result, TrackResult) else result
    track.to_csv(path, index=False, columns=TRACK_COLUMNS + shared_column_names(
        track.columns), float_format="%.9g")


def load_track_csv(path) -> pd.DataFrame:
    """Read a truth track written by :func:`save_track_csv`.

    Raises
    ------
    InputError
        If the file is missing or a column is absent.
    """
    try:
        df = pd.read_csv(path)
    except FileNotFoundError:
        raise InputError(f"{path}: track file not found; run 'vidodo track' first") from None
    missing = [c for c in TRACK_COLUMNS if c not in df.columns]
    if missing:
        raise InputError(f"{path}: column '{missing[0]}' missing; is this a vidodo track CSV?")
    for c in ("detected", "interpolated"):
        df[c] = df[c].astype(str).str.lower().isin(("true", "1"))
    return df[TRACK_COLUMNS + shared_column_names(df.columns)]


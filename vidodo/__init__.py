"""vidodo: check a mobile robot's odometry against video of the run.

The few entry points a notebook needs are attributes of the package; each is imported
on first use, so ``import vidodo`` itself loads nothing heavy. SI units throughout:
metres, radians, seconds; names carry their unit (``t_s``, ``x_m``, ``heading_rad``).

=========================  ==================================================================
grade a run                :func:`grade_run` (video + log + profiles -> :class:`GradeResult`)
grade from a truth track   :func:`grade_tracks`, :func:`read_track_csv`
settings                   :class:`GradeSettings`, :class:`Tolerances`
load profiles              :func:`load_robot`, :func:`load_field`, :func:`load_camera`
track a video              :func:`track_video` (the truth track with its 1-sigma),
                           :class:`TrackSettings`
read a log                 :func:`read_log`
rebuild odometry           :func:`odometry_result`
fit a profile              :class:`FitRun`, :func:`fit_profile`, :func:`tune_profile`
write outputs              :func:`write_outputs` (CSV/JSON), :func:`write_report` (plots,
                           HTML, replay), :func:`grade_run_folder` (everything for a run
                           folder)
=========================  ==================================================================

Examples
--------
>>> import vidodo
>>> vidodo.Tolerances(position_m=0.05).is_set
True
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

_HOME = {
    "grade_run": "pipeline",
    "grade_tracks": "pipeline",
    "read_track_csv": "pipeline",
    "GradeResult": "pipeline",
    "GradeSettings": "pipeline",
    "Tolerances": "pipeline",
    "load_robot": "profiles",
    "load_field": "profiles",
    "load_camera": "profiles",
    "track_video": "tracking.tracker",
    "TrackSettings": "tracking.settings",
    "read_log": "logs",
    "odometry_result": "odometry",
    "FitRun": "profile_fit",
    "fit_profile": "profile_fit",
    "tune_profile": "tuning",
    "write_outputs": "report.grade_files",
    "write_report": "report.build",
    "grade_run_folder": "batch",
}
"""Public name -> the module (below ``vidodo``) that defines it."""

__all__ = ["__version__", *_HOME]


def __getattr__(name: str):
    """Import the module behind a public name on first use (PEP 562)."""
    home = _HOME.get(name)
    if home is None:
        raise AttributeError(f"module 'vidodo' has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{home}"), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))

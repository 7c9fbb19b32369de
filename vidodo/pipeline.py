"""Grading a run: the one place that wires the stages together.

``grade_run`` takes the footage and the robot's log, measures the truth track (or
reuses one), reads the log and rebuilds every odometry source, puts the log on the
video clock (:mod:`vidodo.sync`), anchors each source at the truth pose where motion
starts, computes the per-source figures (:mod:`vidodo.metrics`), finds events
(:mod:`vidodo.events`) and compares each source with the user's tolerances.

Anchoring: the truth pose at motion start is the mean of the still samples before it
(or, when the log starts later, a local fit at the log's first sample). A marker's
heading is less certain than its position, so the start heading is combined, by
inverse variance, with the rotation that lays the source's first metre of travel
(up to the first event) onto the truth's (:func:`vidodo.metrics.anchor_heading_from_travel`);
both figures are in ``summary.json`` under ``settings.anchor_heading``.

Pass/fail compares a source's *final* anchored position and heading errors (where the
robot believes it is at the end of the run, having started from the truth pose) with
the tolerances. Without tolerances every source is graded but none passes or fails.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .csvsafe import read_csv_checked
from .drift_sigma import DriftInputs, derived_sigmas, figure_sigmas
from .errors import InputError, MeasurementError
from .events import EventSettings, active_kinds, detect_events, events_frame
from .metrics import (
    RPE_PAIRS_RULE,
    MetricSettings,
    SourceMetrics,
    anchor_heading_from_travel,
    anchor_poses,
    drift_table,
    local_pose,
    motion_start_index,
    path_length,
    source_metrics,
    travel_direction,
    umeyama,
)
from .odometry import odometry_result, rim_travel
from .outputs import jsonable
from .profiles import FieldProfile, RobotProfile, load_camera, load_field, load_robot
from .se2 import interpolate_poses
from .sync import ClockSync, estimate_clock, manual_clock
from .timings import StageTimes, merged
from .tracking.result import shared_column_names

__all__ = ["Tolerances", "GradeSettings", "GradeResult", "grade_run", "grade_tracks",
           "read_track_csv", "TRACK_COLUMNS"]

TRACK_COLUMNS = ["t_s", "x_m", "y_m", "heading_rad", "sigma_xy_m", "sigma_heading_rad",
                 "vx_mps", "vy_mps", "speed_mps", "omega_radps", "ax_mps2", "ay_mps2",
                 "detected", "interpolated"]
_REQUIRED = ["t_s", "x_m", "y_m", "heading_rad", "sigma_xy_m", "sigma_heading_rad"]


@dataclass(frozen=True)
class Tolerances:
    """What a source may be off by at the end of the run and still pass."""

    position_m: float | None = None
    """Final anchored position error allowed [m] (None: not graded)."""
    heading_rad: float | None = None
    """Final anchored heading error allowed [rad] (None: not graded)."""

    @property
    def is_set(self) -> bool:
        """True when at least one tolerance is given."""
        return self.position_m is not None or self.heading_rad is not None

    def check(self, m: SourceMetrics) -> bool | None:
        """Pass (True), fail (False) or not graded (None) for one source."""
        if not self.is_set:
            return None
        ok = True
        if self.position_m is not None:
            ok &= m.final_err_m is not None and m.final_err_m <= self.position_m
        if self.heading_rad is not None:
            ok &= (m.final_heading_err_rad is not None
                   and abs(m.final_heading_err_rad) <= self.heading_rad)
        return bool(ok)

    def to_dict(self) -> dict:
        """For the summary (display units beside SI)."""
        return {"position_m": self.position_m, "heading_rad": self.heading_rad,
                "heading_deg": None if self.heading_rad is None
                else math.degrees(self.heading_rad),
                "compared": "final anchored error"}


@dataclass(frozen=True)
class GradeResult:
    """Everything measured about one run."""

    truth: pd.DataFrame
    """Truth track, video clock (columns in DEVELOPERS.md)."""
    truth_quality: dict
    """Tracker quality figures."""
    clock: ClockSync
    """Log clock -> video clock."""
    odometry: dict
    """Per source: DataFrame on the video clock in the source's own frame."""
    anchored: dict
    """Per source: DataFrame ``t_s, x_m, y_m, heading_rad`` on the truth samples,
    anchored at motion start (floor frame; NaN outside the log)."""
    best_fit: dict
    """Per source: the rigid SE(2) :class:`~vidodo.metrics.Alignment` of the anchored
    track onto truth (over the whole overlap)."""
    anchor: dict
    """Anchor instant and truth pose: ``t_s, x_m, y_m, heading_rad, index``."""
    metrics: dict
    """Per source: :class:`~vidodo.metrics.SourceMetrics`."""
    drift: pd.DataFrame
    """The drift table (drift.csv)."""
    events: pd.DataFrame
    """The events table (events.csv)."""
    event_list: tuple
    """The same events as :class:`~vidodo.events.Event` objects."""
    tolerances: Tolerances
    """Tolerances used."""
    summary: dict
    """summary.json content."""
    warnings: tuple[str, ...] = ()
    """What could not be measured, or is doubtful."""
    passed: dict = field(default_factory=dict)
    """Per source: True, False or None (no tolerance)."""
    floor_poses: object = None
    """:class:`~vidodo.tracking.floor_poses.FloorPoses` the truth track was measured with (written
    as ``track.floor.csv``), or None when not known."""

    @property
    def verdict(self) -> str:
        """'pass', 'fail' or 'graded' (no tolerance set)."""
        return self.summary["verdict"]


def read_track_csv(path) -> pd.DataFrame:
    """Read a truth track CSV written by ``vidodo track`` or ``vidodo grade``.

    Parameters
    ----------
    path : str or Path
        The CSV (columns in DEVELOPERS.md).

    Returns
    -------
    DataFrame
        ``t_s`` [s] strictly increasing, ``x_m``, ``y_m`` [m], ``heading_rad`` [rad],
        ``sigma_xy_m`` [m], ``sigma_heading_rad`` [rad] and whatever else the file has;
        ``detected`` and ``interpolated`` as booleans.

    Raises
    ------
    InputError
        File missing, or a required column absent.
    """
    p = Path(path)
    df = read_csv_checked(p, "check the --track path", "give a track.csv")
    missing = [c for c in _REQUIRED if c not in df.columns]
    if missing:
        raise InputError(f"{p}: missing column(s) {missing}; give a track written by "
                         "'vidodo track'")
    for c in ("detected", "interpolated"):
        if c in df.columns:
            df[c] = df[c].astype(str).str.lower().isin(["true", "1", "1.0"])
    if not np.all(np.diff(df["t_s"].to_numpy(float)) > 0):
        raise InputError(f"{p}: column t_s must be strictly increasing")
    return df


def _profile(obj, loader):
    if obj is None or isinstance(obj, RobotProfile | FieldProfile) or hasattr(obj, "fx_px"):
        return obj
    return loader(obj)


def _anchor(truth, sxy):
    """Anchor sample and truth pose there (mean over the still time before motion)."""
    t = truth["t_s"].to_numpy(float)
    q = truth[["x_m", "y_m", "heading_rad"]].to_numpy(float).copy()
    if "detected" in truth:
        q[~truth["detected"].to_numpy(bool)] = np.nan
    sh = 0.0
    if "sigma_heading_rad" in truth:
        sig = truth["sigma_heading_rad"].to_numpy(float)
        sh = float(np.nanmedian(sig)) if np.isfinite(sig).any() else 0.0
    k = motion_start_index(q[:, :2], sxy, heading_rad=q[:, 2], sigma_heading_rad=sh)
    moved = k is not None
    if k is None:
        good = np.flatnonzero(np.isfinite(q).all(axis=1))
        if good.size == 0:
            raise MeasurementError("truth track has no detected sample; nothing to grade")
        k = int(good[0])
    # average the still samples within 1 s before the start (robot at rest)
    still = np.flatnonzero((t >= t[k] - 1.0) & (t <= t[k]) & np.isfinite(q).all(axis=1))
    if moved and still.size:
        x, y = q[still, 0].mean(), q[still, 1].mean()
        h = math.atan2(np.sin(q[still, 2]).mean(), np.cos(q[still, 2]).mean())
    else:
        x, y, h = q[k]
    return k, (float(x), float(y), float(h)), moved


@dataclass(frozen=True)
class GradeSettings:
    """How a run is graded: the clock, the tolerances and the event thresholds."""

    clock_offset_s: float | None = None
    """Manual ``t_video - t_log`` [s]; found from the motion when None."""
    tolerances: Tolerances = field(default_factory=Tolerances)
    """Pass/fail limits (none by default)."""
    events: EventSettings = field(default_factory=EventSettings)
    """Event detection thresholds."""
    registrar: object = None
    """How the floor is registered while tracking (a
    :class:`~vidodo.registration.registrar.FloorRegistrar`: points, start tile, limits);
    default: the automatic one for the field and camera."""


@dataclass(frozen=True)
class _Reference:
    """The truth track as the grading steps use it, and the anchor where motion starts."""

    frame: pd.DataFrame
    t: np.ndarray
    q: np.ndarray
    """Truth poses ``x_m, y_m, heading_rad`` (heading unwrapped), shape (N, 3)."""
    sigma_xy_m: float
    sigma_heading_rad: float
    sigma_heading_each: np.ndarray
    path_m: np.ndarray
    k_anchor: int
    anchor_pose: tuple
    moved: bool


@dataclass(frozen=True)
class _SourceGrade:
    anchored: pd.DataFrame
    metrics: SourceMetrics | None
    best_fit: object | None
    anchor_heading: dict | None


def _truth_parts(truth):
    """A truth DataFrame, its quality figures and warnings from a DataFrame or a
    :class:`~vidodo.tracking.result.TrackResult`."""
    if isinstance(truth, pd.DataFrame):
        return truth, {}, []
    return truth.track, dict(truth.quality), list(truth.warnings)


def grade_tracks(truth, log, robot, settings: GradeSettings | None = None, *, odometry=None,
                 inputs=None, field=None) -> GradeResult:
    """Grade a run from a truth track and a log already read.

    The steps, in order: put the log on the video clock (:func:`_clock_step`), find the
    truth's anchor where motion starts (:func:`_reference_step`), map every source to
    the video clock (:func:`_video_clock_step`), find events (:func:`_events_step`),
    anchor and measure every source (:func:`_source_step`), summarise
    (:func:`_summary_step`).

    Parameters
    ----------
    truth : DataFrame or TrackResult
        Truth track on the video clock (columns in DEVELOPERS.md: ``t_s`` [s], ``x_m``,
        ``y_m`` [m], ``heading_rad`` [rad], ``sigma_xy_m`` [m], ``sigma_heading_rad``
        [rad]), or the tracker's result (its quality and warnings go into the summary).
    log : LogData
        The robot's log (:func:`vidodo.logs.read_log`).
    robot : RobotProfile
    settings : GradeSettings, optional
        Clock offset [s], tolerances, event thresholds.
    odometry : dict of str -> DataFrame, optional
        Odometry sources on the log clock; rebuilt from ``log`` when None.
    inputs : dict, optional
        File paths recorded in the summary.
    field : FieldProfile, optional
        Recorded in the summary (``field``) for the plots.

    Returns
    -------
    GradeResult
    """
    settings = settings or GradeSettings()
    times = StageTimes()
    tracked_s = getattr(truth, "timings_s", None)
    truth, quality, warn = _truth_parts(truth)
    missing = [c for c in _REQUIRED if c not in truth.columns]
    if missing:
        raise InputError(f"truth track: missing column(s) {missing}")
    truth = truth.reset_index(drop=True)
    warn += list(getattr(log, "warnings", []))
    if odometry is None:
        od = odometry_result(log, robot)
        odometry = od.tracks
        warn += list(od.warnings)
    with times.stage("sync"):
        clock = _clock_step(truth, odometry, settings.clock_offset_s, quality, warn)
    ref = _reference_step(truth, warn)
    with times.stage("sync"):
        video_tracks, covered = _video_clock_step(odometry, clock, ref, warn)
    with times.stage("events"):
        ev = _events_step(ref, log, robot, clock, {n: video_tracks[n] for n in covered},
                          settings.events, warn)
    graded = {name: _source_step(name, p, video_tracks[name], ref, ev.events, warn,
                                 float(clock.sigma_s or 0.0))
              for name, p in covered.items()}
    result = _summary_step(ref, clock, video_tracks, graded, ev, settings, quality, warn,
                           inputs=inputs, field=field)
    return replace(result, summary={**result.summary,
                                    "timings_s": merged(tracked_s, times.as_dict())})


def _clock_step(truth, odometry, clock_offset_s, quality, warn) -> ClockSync:
    """Log clock -> video clock, found from the motion or from a manual offset."""
    if clock_offset_s is None:
        clock = estimate_clock(truth, odometry)
    else:
        clock = manual_clock(truth, odometry, float(clock_offset_s))
    warn += list(clock.warnings)
    if quality.get("readout_source") == "none":
        warn.append("clock: the camera's rolling-shutter readout time is unknown, so truth "
                    "times are frame times; the offset may be off by up to half a readout "
                    "(phones: 5-30 ms); give a camera profile with readout_s")
    return clock


def _reference_step(truth, warn) -> _Reference:
    """The truth's typical 1-sigma, path length and anchor pose where motion starts."""
    sxy_all = truth["sigma_xy_m"].to_numpy(float)
    sxy = float(np.nanmedian(sxy_all)) if np.isfinite(sxy_all).any() else 0.002
    sh_all = truth["sigma_heading_rad"].to_numpy(float)
    sh = float(np.nanmedian(sh_all)) if np.isfinite(sh_all).any() else math.radians(0.5)
    q = truth[["x_m", "y_m", "heading_rad"]].to_numpy(float).copy()
    q[:, 2] = _unwrap_nan(q[:, 2])
    k_anchor, anchor_pose, moved = _anchor(truth, sxy)
    if not moved:
        warn.append("the truth track shows no motion: drift %, RPE and heading drift per "
                    "turn are not measured")
    return _Reference(frame=truth, t=truth["t_s"].to_numpy(float), q=q, sigma_xy_m=sxy,
                      sigma_heading_rad=sh, sigma_heading_each=sh_all,
                      path_m=path_length(q[:, :2], gate_m=3.0 * sxy), k_anchor=k_anchor,
                      anchor_pose=anchor_pose, moved=moved)


def _video_clock_step(odometry, clock, ref, warn):
    """Every source on the video clock, and its poses at the truth samples where the
    log covers the video."""
    video_tracks, covered = {}, {}
    for name, df in odometry.items():
        vdf = df.copy()
        vdf["t_s"] = clock.to_video(df["t_s"].to_numpy(float))
        video_tracks[name] = vdf
        p = interpolate_poses(ref.t, vdf["t_s"].to_numpy(float),
                              vdf[["x_m", "y_m", "heading_rad"]].to_numpy(float))
        if not np.isfinite(p).all(axis=1).any():
            warn.append(f"source {name!r}: the log does not cover the video; not graded")
            continue
        covered[name] = p
    return video_tracks, covered


def _events_step(ref, log, robot, clock, video_tracks, event_settings, warn):
    """Events from truth, wheel travel, IMU and the sources (no alignment needed, and
    the anchoring must not lean on them)."""
    wheel_travel = None
    names = [w for w in robot.wheels if f"ticks_{w.name}" in log.frame.columns]
    t_log_video = clock.to_video(log.frame["t_s"].to_numpy(float))
    if names:
        steps = rim_travel(log, names)
        cumt = np.vstack([np.zeros((1, len(names))), np.cumsum(steps, axis=0)])
        wheel_travel = pd.DataFrame(cumt, columns=[w.name for w in names])
        wheel_travel.insert(0, "t_s", t_log_video)
    imu = None
    if "imu_heading_rad" in log.frame.columns:
        imu = pd.DataFrame({"t_s": t_log_video,
                            "heading_rad": log.frame["imu_heading_rad"].to_numpy(float)})
    src_poses = {n: (v["t_s"].to_numpy(float),
                     v[["x_m", "y_m", "heading_rad"]].to_numpy(float))
                 for n, v in video_tracks.items()}
    ev = detect_events(ref.frame, wheel_travel, robot, imu_heading=imu,
                       source_poses=src_poses, settings=event_settings)
    warn += list(ev.warnings)
    return ev


def _source_step(name, p, vdf, ref, events, warn, clock_sigma_s=0.0) -> _SourceGrade:
    """Anchor one source at the truth pose where motion starts and measure it, each
    figure with its 1-sigma (:mod:`vidodo.drift_sigma`)."""
    t, q, sxy = ref.t, ref.q, ref.sigma_xy_m
    ta, qa = float(t[ref.k_anchor]), ref.anchor_pose
    pa = interpolate_poses(np.array([ta]), vdf["t_s"].to_numpy(float),
                           vdf[["x_m", "y_m", "heading_rad"]].to_numpy(float))[0]
    if not np.isfinite(pa).all():
        first = int(np.flatnonzero(np.isfinite(p).all(axis=1) & np.isfinite(q).all(
            axis=1))[0])
        ta, pa, qa = float(t[first]), p[first], local_pose(t, q, float(t[first]), sxy)
        warn.append(f"source {name!r}: the log starts after motion start; anchored at "
                    f"{ta:.2f} s instead")
    a = anchor_poses(p, pa, qa)
    k0 = int(np.searchsorted(t, ta))
    later = [e.t_start_s for e in events if e.t_start_s > ta]
    shared = _shared_modes(ref.frame)
    sig_rest = _filled(ref.frame["sigma_xy_m"].to_numpy(float), sxy)
    if shared is not None:
        sig_rest = np.sqrt(np.clip(sig_rest**2 - np.sum(shared**2, axis=(1, 2)), 0.0, None))
    dh, sig_rot = anchor_heading_from_travel(
        t, q, a, k0, sigma_m=sig_rest, t_stop_s=min(later) - 0.05 if later else None,
        shared_m=shared)
    heading = None
    if dh is not None:
        # the truth heading at the start and the heading implied by the first
        # stretch of travel (up to the first event), combined by inverse variance
        # (sigma of one truth sample: averaging still frames does not remove a bias)
        sh_k = ref.sigma_heading_each[k0]
        sh_k = float(sh_k) if np.isfinite(sh_k) else ref.sigma_heading_rad
        w = sh_k**2 / (sh_k**2 + sig_rot**2)
        qa = (qa[0], qa[1], qa[2] + w * dh)
        a = anchor_poses(p, pa, qa)
        heading = {"truth_heading_rad": float(qa[2] - w * dh),
                   "travel_correction_rad": float(dh),
                   "travel_sigma_rad": float(sig_rot), "weight": float(w)}
    anchored = pd.DataFrame({"t_s": t, "x_m": a[:, 0], "y_m": a[:, 1],
                             "heading_rad": a[:, 2]})
    kw = MetricSettings(sigma_heading_rad=ref.sigma_heading_rad, sigma_m=sxy, name=name)
    try:
        m = source_metrics(t, q, a, ref.path_m, kw)
    except MeasurementError as exc:
        warn.append(str(exc))
        return _SourceGrade(anchored, None, None, heading)
    m = replace(m, sigma=_figure_sigmas(m, ref, vdf, k0, ta, qa, sig_rot if dh is not None
                                        else None, clock_sigma_s, kw))
    if not ref.moved:
        m = _without_motion_figures(m)
    warn += list(m.warnings)
    ok = np.isfinite(a).all(axis=1) & np.isfinite(q).all(axis=1)
    try:
        best = umeyama(a[ok, :2], q[ok, :2])
    except MeasurementError:
        best = None
    return _SourceGrade(anchored, m, best, heading)


def _filled(values, typical):
    """Per-sample values with the missing ones (NaN) replaced by ``typical``."""
    return np.where(np.isfinite(values), values, typical)


def _figure_sigmas(m, ref, vdf, k0, ta, qa, sig_rot, clock_sigma_s, kw):
    """1-sigma of the source's figures: the truth track, the anchor pose (position and
    the heading combined with the first travel's, ``sig_rot``) and the clock drawn."""
    sxy_all = ref.frame["sigma_xy_m"].to_numpy(float)
    sh_k = ref.sigma_heading_each[k0]
    sh_k = float(sh_k) if np.isfinite(sh_k) else ref.sigma_heading_rad
    sa_h = sh_k if sig_rot is None else math.sqrt(sh_k**2 * sig_rot**2
                                                  / (sh_k**2 + sig_rot**2))
    sa_xy = float(sxy_all[k0]) if np.isfinite(sxy_all[k0]) else ref.sigma_xy_m
    return derived_sigmas(m, figure_sigmas(DriftInputs(
        t_s=ref.t, truth_poses=ref.q, sigma_xy_m=sxy_all,
        sigma_heading_rad=ref.sigma_heading_each, cum_length_m=ref.path_m,
        source_at=_shifted_source(ref.t, vdf, ta), anchor_pose=tuple(qa),
        anchor_sigma=(sa_xy, sa_h), clock_sigma_s=clock_sigma_s, metric_settings=kw,
        shared_m=_shared_modes(ref.frame), anchor_index=k0), measured=m.max_err_m))


def _shared_modes(truth):
    """The truth track's shared-error modes, ndarray (N, K, 2) [m], or None when the
    track has none (written before they existed, or made elsewhere)."""
    cols = shared_column_names(truth.columns)
    if not cols:
        return None
    return np.nan_to_num(truth[cols].to_numpy(float)).reshape(len(truth), -1, 2)


def _summary_step(ref, clock, video_tracks, graded, ev, settings, quality, warn, *,
                  inputs, field) -> GradeResult:
    """Drift table, events table, verdict and summary.json content."""
    metrics = {n: g.metrics for n, g in graded.items() if g.metrics is not None}
    if not metrics:
        raise MeasurementError("no odometry source overlaps the truth track; nothing graded")
    anchored = {n: g.anchored for n, g in graded.items()}
    tol = settings.tolerances
    t, q = ref.t, ref.q
    flags = active_kinds(t, ev.events)
    direction = travel_direction(q[:, :2], q[:, 2],
                                 min_step_m=max(6.0 * ref.sigma_xy_m, 0.01))
    drift = drift_table(ref.frame, {n: anchored[n][["x_m", "y_m", "heading_rad"]].to_numpy()
                                    for n in metrics}, ref.path_m, direction, flags)
    events_df = events_frame(ev.events)
    passed = {n: tol.check(m) for n, m in metrics.items()}
    if not tol.is_set:
        verdict = "graded"
    else:
        verdict = "pass" if all(v for v in passed.values()) else "fail"
    pose = ref.anchor_pose
    anchor = {"t_s": float(t[ref.k_anchor]), "x_m": pose[0], "y_m": pose[1],
              "heading_rad": pose[2], "index": int(ref.k_anchor), "motion": ref.moved}
    warn = list(dict.fromkeys(warn))
    summary = {
        "vidodo_version": __version__,
        "inputs": dict(inputs or {}),
        "settings": {"events": asdict(settings.events), "anchor": anchor,
                     "anchor_heading": {n: g.anchor_heading for n, g in graded.items()
                                        if g.anchor_heading is not None},
                     "rpe_pairs": RPE_PAIRS_RULE},
        "clock": {"offset_s": clock.offset_s, "sigma_s": clock.sigma_s,
                  "confidence": clock.confidence, "method": clock.method,
                  "source": clock.source, "rate": clock.rate, "ref_log_s": clock.ref_log_s},
        "truth": dict(quality),
        "field": None if field is None else {
            "tiles_x": field.tiles_x, "tiles_y": field.tiles_y,
            "tile_size_m": field.tile_size_m},
        "sources": {n: {**{k: v for k, v in m.to_dict().items() if k != "warnings"},
                        "pass": passed[n]} for n, m in metrics.items()},
        "events": events_df.to_dict(orient="records"),
        "tolerances": tol.to_dict(),
        "verdict": verdict,
        "warnings": warn,
    }
    return GradeResult(truth=ref.frame, truth_quality=dict(quality), clock=clock,
                       odometry=video_tracks, anchored=anchored,
                       best_fit={n: g.best_fit for n, g in graded.items()
                                 if g.best_fit is not None},
                       anchor=anchor, metrics=metrics, drift=drift, events=events_df,
                       event_list=ev.events, tolerances=tol, summary=jsonable(summary),
                       warnings=tuple(warn), passed=passed)


def _shifted_source(t, vdf, t_anchor):
    """``source_at(dt)`` for :class:`DriftInputs`: the source's poses on ``t`` and at
    the anchor instant with its video times moved by ``dt`` [s]."""
    def source_at(dt_s):
        ts = vdf["t_s"].to_numpy(float) + dt_s
        poses = vdf[["x_m", "y_m", "heading_rad"]].to_numpy(float)
        return (interpolate_poses(t, ts, poses),
                interpolate_poses(np.array([t_anchor]), ts, poses)[0])
    return source_at


def _without_motion_figures(m: SourceMetrics) -> SourceMetrics:
    return replace(m, drift_pct=None, heading_drift_deg_per_turn=None, rpe_path_rmse_m=None,
                   ate_rmse_m=None, best_fit_scale=None, best_fit_angle_rad=None)


def _unwrap_nan(h):
    out = h.copy()
    ok = np.isfinite(h)
    out[ok] = np.unwrap(h[ok])
    return out


def grade_run(video, log, robot, field, camera=None, *, settings=None, track=None,
              progress=None) -> GradeResult:
    """Grade one run: video + log + profiles -> drift, events, verdict.

    Parameters
    ----------
    video : str or Path
        The footage (not read when ``track`` is given).
    log : str, Path or LogData
        The robot's log CSV.
    robot, field : profile or path
        Robot and field profiles (TOML paths or loaded profiles).
    camera : CameraProfile or path, optional
        Lens profile; the tracker estimates one when absent.
    settings : GradeSettings, optional
        Manual clock offset [s], tolerances, event thresholds, floor registrar.
    track : DataFrame or path, optional
        A truth track to reuse instead of tracking the video. Its registrations are
        taken from ``<track>.floor.csv`` beside it when there.
    progress : callable, optional
        Passed to the tracker.

    Returns
    -------
    GradeResult

    Raises
    ------
    InputError, MeasurementError (SyncError, TrackingError)
        With one line saying what is wrong and what to do.
    """
    from .logs import LogData, read_log

    robot = _profile(robot, load_robot)
    field = _profile(field, load_field)
    camera = _profile(camera, load_camera)
    inputs = {"video": _abs(video),
              "log": _abs(getattr(log, "path", log)),
              "robot": _abs(robot.path) if robot.path else robot.name,
              "field": _abs(field.path) if field else None,
              "camera": _abs(camera.path) if camera is not None else None}
    if track is None:
        from .input_checks import camera_matches_video

        camera_matches_video(camera, video)  # before a whole tracking pass
        truth, poses = _track_recorded(video, robot, field, camera,
                                       (settings or GradeSettings()).registrar, progress)
    elif isinstance(track, pd.DataFrame):
        truth, poses = track, None
        inputs["track"] = "given"
    else:
        truth, poses = read_track_csv(track), _sibling_floor_poses(track)
        inputs["track"] = _abs(track)
    logdata = log if isinstance(log, LogData) else read_log(log, robot)
    result = grade_tracks(truth, logdata, robot, settings, inputs=inputs,
                          field=field)
    return replace(result, floor_poses=poses)


def _track_recorded(video, robot, field, camera, registrar, progress):
    """Track the video, keeping the floor registrations the track was measured with."""
    from .registration.registrar import FloorRegistrar
    from .tracking.floor_poses import FloorPoses, RecordingRegistrar
    from .tracking.tracker import track_video

    recorder = RecordingRegistrar(registrar if registrar is not None
                                  else FloorRegistrar(field, camera))
    tres = track_video(video, robot, field, camera, progress=progress,
                       registrar=recorder)
    readout = float((getattr(tres, "quality", None) or {}).get("readout_s") or 0.0)
    return tres, FloorPoses(tuple(recorder.records), readout)


def _sibling_floor_poses(track):
    """The registrations saved beside a track CSV, or None when there are none."""
    from .tracking.floor_poses import floor_poses_path, read_floor_poses

    p = floor_poses_path(track)
    return read_floor_poses(p) if p.is_file() else None


def _abs(path):
    return None if path is None else str(Path(path).resolve())

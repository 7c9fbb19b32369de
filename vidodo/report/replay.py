"""Annotated replay: the footage with the truth track and every source drawn back into it.

For each frame, the drift table row at that frame's time gives the truth pose and each
odometry source's believed pose (floor frame, metres). Each pose is turned into the
floor position of the robot's marker (the pose composed with the marker's body-frame
offset, at the marker's height above the floor) and projected into the frame with that
frame's floor registration (:meth:`vidodo.registration.registrar.FrameRegistration.floor_to_image`,
the inverse of the mapping the tracker used). So the truth ring sits on the marker in
the image when tracking and registration are right, and each source's ring sits where
that source believed the marker was.

The frame also carries a readout (time, error per source in the display unit) and the
events active at that moment, with their floor position marked.

Frames are streamed: one is decoded (in a background thread), annotated and handed to
the encoder at a time, with its time as it was decoded (one decoding pass).
Cost (``benchmarks/replay_speed.py``): by default the replay is half the footage's size
(:data:`DEFAULT_SCALE`; ``scale=1`` for full size) and encoded with a fast x264 preset
(:data:`ENCODER_PRESET`); the floor is registered when the tracker would register it
(every frame while the camera moves, once a second while it is still: the policy of
:class:`vidodo.tracking.registration_policy.RegistrationPolicy`), not on every frame.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
import pandas as pd

from ..errors import InputError
from ..grid_overlay import grid_layer, grid_polylines_px
from ..units import format_length
from .plots import EVENT_STYLE, source_colors, source_prefixes

__all__ = [
    "TRUTH_BGR",
    "TRUTH_TRAIL_BGR",
    "ReplayTracks",
    "marker_points_m",
    "frame_overlay",
    "annotate_frame",
    "ReplaySetup",
    "ReplayStyle",
    "write_replay",
    "replay_from_grade",
    "grade_registration",
    "grade_input",
]

DEFAULT_SCALE = 0.5
"""Replay size relative to the footage unless told otherwise (a 1080p clip gives a
960x540 replay: rings and text are drawn for that size, the encoder has a quarter of the
pixels)."""
ENCODER_PRESET = "superfast"
"""x264 speed preset of the replay (a review copy, not an archive)."""
ENCODER_CRF = 23
"""x264 constant rate factor of the replay (x264's own default)."""
TRUTH_BGR = (0, 255, 0)
"""Colour of the truth marker ring and crosshair (pure green)."""
TRUTH_TRAIL_BGR = (40, 160, 40)
"""Colour of the truth track already driven."""
_HEADING_BGR = (255, 255, 255)
_HALO_BGR = (0, 0, 0)
_PANEL_BGR = (20, 20, 20)


def _hex_to_bgr(h: str) -> tuple[int, int, int]:
    h = h.lstrip("#")
    r, g, b = (int(h[i:i + 2], 16) for i in (0, 2, 4))
    return (b, g, r)


@dataclass(frozen=True)
class ReplayTracks:
    """Poses to draw, one row per truth sample (video clock)."""

    t_s: np.ndarray
    """Sample times [s], shape (N,)."""
    truth: np.ndarray
    """Truth poses (x_m, y_m, heading_rad), shape (N, 3)."""
    sources: dict
    """Source name -> poses, shape (N, 3)."""
    errors: dict
    """Source name -> anchored position error [m], shape (N,)."""
    events: tuple = ()
    """(number, kind, t_start_s, t_end_s, x_m, y_m) of every event."""

    @classmethod
    def from_tables(cls, drift: pd.DataFrame, events: pd.DataFrame | None = None,
                    sources: dict | None = None) -> ReplayTracks:
        """Build from a drift table and events table in the grade output formats."""
        sources = source_prefixes(drift) if sources is None else sources

        def pose(p):
            h = f"{p}_heading_rad"
            head = drift[h].to_numpy(float) if h in drift else np.full(len(drift), np.nan)
            return np.column_stack([drift[f"{p}_x_m"].to_numpy(float),
                                    drift[f"{p}_y_m"].to_numpy(float), head])

        evs = []
        if events is not None:
            for i, ev in enumerate(events.itertuples(index=False), start=1):
                t0 = float(getattr(ev, "t_start_s", np.nan))
                t1 = float(getattr(ev, "t_end_s", np.nan))
                if not math.isfinite(t0):
                    continue  # an event with no time cannot be shown as it happens
                evs.append((i, str(getattr(ev, "kind", "event")), t0,
                            t1 if math.isfinite(t1) else t0,
                            float(getattr(ev, "x_m", np.nan)), float(getattr(ev, "y_m", np.nan))))
        return cls(
            t_s=drift["t_s"].to_numpy(float),
            truth=pose("truth"),
            sources={n: pose(p) for n, p in sources.items()},
            errors={n: drift[f"{p}_err_m"].to_numpy(float) for n, p in sources.items()},
            events=tuple(evs),
        )

    def row_at(self, t_s: float, max_gap_s: float = 0.05) -> int | None:
        """Index of the sample nearest ``t_s``, or None if none is within ``max_gap_s``."""
        if self.t_s.size == 0:
            return None
        i = int(np.searchsorted(self.t_s, t_s))
        cands = [j for j in (i - 1, i) if 0 <= j < self.t_s.size]
        j = min(cands, key=lambda j: abs(self.t_s[j] - t_s))
        return j if abs(self.t_s[j] - t_s) <= max_gap_s else None


def marker_points_m(poses, marker=None):
    """Floor positions of a robot's marker for robot poses.

    Parameters
    ----------
    poses : array_like of shape (N, 3)
        Robot reference point and heading ``(x_m, y_m, heading_rad)``.
    marker : Marker, optional
        The robot profile's marker (body-frame offset ``x_m, y_m`` and height ``z_m``);
        None puts the point at the reference point on the floor.

    Returns
    -------
    ndarray of shape (N, 3)
        Marker centre ``(x, y, z)`` in the floor frame [m]. A missing heading (NaN)
        with a non-zero offset gives NaN.
    """
    p = np.asarray(poses, dtype=float).reshape(-1, 3)
    mx = 0.0 if marker is None else float(marker.x_m)
    my = 0.0 if marker is None else float(marker.y_m)
    mz = 0.0 if marker is None else float(marker.z_m)
    c, s = np.cos(p[:, 2]), np.sin(p[:, 2])
    if mx == 0.0 and my == 0.0:
        x, y = p[:, 0], p[:, 1]
    else:
        x = p[:, 0] + c * mx - s * my
        y = p[:, 1] + s * mx + c * my
    return np.column_stack([x, y, np.full(len(p), mz)])


def _pose_after(tracks: ReplayTracks, poses, row: int, dt_s: float):
    """The pose ``dt_s`` after sample ``row`` (linear between neighbouring samples)."""
    if dt_s <= 0:
        return poses[row]
    lo, hi = max(row - 1, 0), min(row + 3, len(tracks.t_s))
    ts, p = tracks.t_s[lo:hi], poses[lo:hi]
    t = tracks.t_s[row] + dt_s
    head = np.unwrap(p[:, 2]) if np.all(np.isfinite(p[:, 2])) else p[:, 2]
    return np.array([np.interp(t, ts, p[:, 0]), np.interp(t, ts, p[:, 1]),
                     np.interp(t, ts, head)])


def _seen_poses(tracks, poses_list, row, registration, marker, readout_s, height_px):
    """Each track's pose at the moment the rows showing it were read (rolling shutter):
    the row of the marker's projection gives the delay after the frame time, iterated
    twice; every track's marker projected in one call per iteration. (S, 3)."""
    out = np.array([poses[row] for poses in poses_list], float).reshape(-1, 3)
    if not readout_s or not height_px:
        return out
    active = np.ones(len(out), bool)
    for _ in range(2):
        idx = np.nonzero(active)[0]
        if not len(idx):
            break
        px = _project(registration, marker_points_m(out[idx], marker))
        for k, p in zip(idx, px, strict=True):
            if not np.all(np.isfinite(p)):
                active[k] = False  # keeps the pose of the last good step
                continue
            dt = float(np.clip(p[1] / height_px, 0.0, 1.0)) * readout_s
            out[k] = _pose_after(tracks, poses_list[k], row, dt)
    return out


def frame_overlay(tracks: ReplayTracks, row: int | None, registration, *, marker=None,
                  trail_s: float = 3.0, heading_len_m: float = 0.15, readout_s: float = 0.0,
                  height_px: int | None = None) -> dict:
    """Pixel positions of everything drawn on one frame.

    Parameters
    ----------
    tracks : ReplayTracks
    row : int or None
        Sample shown on this frame (None: nothing but the events).
    registration : FrameRegistration
        This frame's floor registration; only ``ok`` and ``floor_to_image`` are used.
    marker : Marker, optional
        Marker offset and height on the robot.
    trail_s : float
        Length of the track drawn behind each pose [s].
    heading_len_m : float
        Length of the heading tick on the floor [m].
    readout_s : float
        Rolling-shutter readout the track's detections were placed in time with [s]:
        a pose is drawn as it was when the rows showing it were read, ``v / height_px *
        readout_s`` after the frame time (0: at the frame time, as the track was made).
    height_px : int, optional
        Frame height [px] (needed with ``readout_s``).

    Returns
    -------
    dict
        ``truth_px`` (2,) or None, ``truth_tip_px``, ``truth_trail_px`` (M, 2),
        ``sources``: name -> dict(``px``, ``tip_px``, ``trail_px``), ``events``: list of
        (number, kind, px or None, active). NaN where a point is not visible.
    """
    out = {"truth_px": None, "truth_tip_px": None, "truth_trail_px": np.empty((0, 2)),
           "sources": {}, "events": []}
    if registration is None or not getattr(registration, "ok", False):
        return out
    if row is None:
        return out
    t_now = tracks.t_s[row]
    lo = int(np.searchsorted(tracks.t_s, t_now - trail_s))
    named = [("__truth__", tracks.truth), *tracks.sources.items()]
    cur = _seen_poses(tracks, [poses for _, poses in named], row, registration, marker,
                      readout_s, height_px)
    pts = marker_points_m(cur, marker)
    tip = pts.copy()
    tip[:, 0] += heading_len_m * np.cos(cur[:, 2])
    tip[:, 1] += heading_len_m * np.sin(cur[:, 2])
    trails = [marker_points_m(poses[lo:row + 1], marker) for _, poses in named]
    trails = [tr[np.all(np.isfinite(tr), axis=1)] for tr in trails]
    shown = [ev for ev in tracks.events if t_now >= ev[2]]
    spots = np.array([[ev[4], ev[5], 0.0] for ev in shown], float).reshape(-1, 3)
    # everything in one projection (each point is mapped on its own: the same pixels)
    px_all = _project(registration, np.vstack([pts, tip, *trails, spots]))
    n = len(named)
    px, tip_px = px_all[:n], px_all[n:2 * n]
    cuts = np.cumsum([2 * n] + [len(tr) for tr in trails])
    for k, (name, _poses) in enumerate(named):
        trail_px = px_all[cuts[k]:cuts[k + 1]]
        if name == "__truth__":
            out["truth_px"], out["truth_tip_px"] = px[k], tip_px[k]
            out["truth_trail_px"] = trail_px
        else:
            out["sources"][name] = {"px": px[k], "tip_px": tip_px[k], "trail_px": trail_px}
    for (num, kind, t0, t1, ex, ey), spot_px in zip(shown, px_all[cuts[-1]:], strict=True):
        active = t0 - 0.25 <= t_now <= t1 + 0.75
        found = spot_px if math.isfinite(ex) and math.isfinite(ey) else None
        out["events"].append((num, kind, found, active))
    return out


def _project(registration, pts_m):
    pts_m = np.asarray(pts_m, float).reshape(-1, 3)
    if len(pts_m) == 0:
        return np.empty((0, 2))
    good = np.all(np.isfinite(pts_m), axis=1)
    px = np.full((len(pts_m), 2), np.nan)
    if good.any():
        px[good] = np.asarray(registration.floor_to_image(pts_m[good]), float).reshape(-1, 2)
    return px


def _finite_px(p) -> bool:
    return p is not None and bool(np.all(np.isfinite(p)))


def _pt(p, shift=4):
    """Sub-pixel point for OpenCV drawing with ``shift`` fractional bits."""
    f = 1 << shift
    return (int(round(float(p[0]) * f)), int(round(float(p[1]) * f)))


def _polyline(img, pts, color, thickness):
    pts = np.asarray(pts, float)
    pts = pts[np.all(np.isfinite(pts), axis=1)]
    if len(pts) >= 2:
        arr = np.round(pts * 16).astype(np.int32).reshape(-1, 1, 2)
        cv2.polylines(img, [arr], False, color, thickness, cv2.LINE_AA, shift=4)


def _ring(img, p, radius, color, thickness, cross=False, halo=None):
    """A ring (and crosshair) at ``p``; ``halo``: a colour drawn 2 px wider underneath, so
    the ring's edges blend with one known colour whatever the floor or robot under it
    (the ring's centre then survives anti-aliasing and the video's half-resolution
    colour planes without a pull towards the brighter or more colourful side)."""
    layers = ([(halo, 2)] if halo is not None else []) + [(color, 0)]
    for c, extra in layers:
        cv2.circle(img, _pt(p), int(radius * 16), c, thickness + extra, cv2.LINE_AA, shift=4)
        if cross:
            r = radius * 0.55
            for d in ((r, 0), (0, r)):
                a = (p[0] - d[0], p[1] - d[1])
                b = (p[0] + d[0], p[1] + d[1])
                cv2.line(img, _pt(a), _pt(b), c, max(1, thickness - 1) + extra, cv2.LINE_AA,
                         shift=4)


def annotate_frame(frame_bgr, overlay: dict, *, lines=(), colors: dict | None = None,
                   scale: float | None = None):
    """Draw an overlay (from :func:`frame_overlay`) and a readout on a copy of a frame.

    Parameters
    ----------
    frame_bgr : ndarray of shape (H, W, 3), uint8
    overlay : dict
        Pixel positions from :func:`frame_overlay`.
    lines : sequence of (str, BGR tuple)
        Readout lines drawn in a panel at the top left.
    colors : dict, optional
        Source name -> BGR colour.
    scale : float, optional
        Size of rings and text relative to a 720-row frame (default from the frame).

    Returns
    -------
    ndarray
        The annotated frame; the truth ring is drawn last, in :data:`TRUTH_BGR`.
    """
    img = np.ascontiguousarray(frame_bgr.copy())
    h = img.shape[0]
    s = (h / 720.0) if scale is None else scale
    radius = max(6.0, 14.0 * s)
    thick = max(1, int(round(2 * s)))
    colors = colors or {}
    # events: a marker on the floor where each happened; larger while active
    for num, kind, px, active in overlay.get("events", []):
        if not _finite_px(px):
            continue
        c = _hex_to_bgr(EVENT_STYLE.get(kind, ("#555555", "P"))[0])
        r = radius * (1.6 if active else 0.7)
        cv2.circle(img, _pt(px), int(r * 16), c, -1 if not active else thick + 1,
                   cv2.LINE_AA, shift=4)
        org = (int(px[0] + r + 3), int(px[1] - r))
        fs = 0.7 * max(s, 0.7)
        cv2.putText(img, str(num), org, cv2.FONT_HERSHEY_SIMPLEX, fs, (0, 0, 0), thick + 3,
                    cv2.LINE_AA)
        cv2.putText(img, str(num), org, cv2.FONT_HERSHEY_SIMPLEX, fs, c, thick + 1,
                    cv2.LINE_AA)
    # sources: trail, ring, heading tick
    for name, d in overlay.get("sources", {}).items():
        c = colors.get(name, (200, 200, 200))
        _polyline(img, d["trail_px"], c, thick)
        if _finite_px(d["px"]):
            _ring(img, d["px"], radius * 0.8, c, thick)
            if _finite_px(d["tip_px"]):
                cv2.line(img, _pt(d["px"]), _pt(d["tip_px"]), c, thick, cv2.LINE_AA, shift=4)
    # readout panel
    if lines:
        _panel(img, lines, s)
    # truth last, on top of everything
    _polyline(img, overlay.get("truth_trail_px", ()), TRUTH_TRAIL_BGR, thick + 1)
    tp = overlay.get("truth_px")
    if _finite_px(tp):
        tip = overlay.get("truth_tip_px")
        if _finite_px(tip):
            cv2.line(img, _pt(tp), _pt(tip), _HEADING_BGR, thick, cv2.LINE_AA, shift=4)
        _ring(img, tp, radius, TRUTH_BGR, thick + 1, cross=True, halo=_HALO_BGR)
    return img


def _panel(img, lines, s):
    font = cv2.FONT_HERSHEY_SIMPLEX
    fs = max(0.42, 0.55 * s)
    th = 1 if s < 1.5 else 2
    sizes = [cv2.getTextSize(t, font, fs, th)[0] for t, _ in lines]
    lh = int(max(sz[1] for sz in sizes) * 1.8) + 2
    w = max(sz[0] for sz in sizes) + 16
    hgt = lh * len(lines) + 8
    x0, y0 = 8, 8
    roi = img[y0:y0 + hgt, x0:x0 + w]
    if roi.size:
        roi[:] = (roi * 0.35 + np.array(_PANEL_BGR) * 0.65).astype(np.uint8)
    for i, (t, c) in enumerate(lines):
        cv2.putText(img, t, (x0 + 8, y0 + (i + 1) * lh - 4), font, fs, c, th, cv2.LINE_AA)


def readout_lines(tracks: ReplayTracks, row: int | None, t_s: float, colors: dict,
                  unit: str = "mm"):
    """The text panel of one frame: time, each source's error, active events."""
    lines = [(f"t = {t_s:7.2f} s   error (anchored drift)", (235, 235, 235))]
    for name in tracks.sources:
        err = tracks.errors[name][row] if row is not None else float("nan")
        lines.append((f"{name}: {format_length(err, unit)}", colors.get(name, (200, 200, 200))))
    lines.append(("truth (video)", TRUTH_BGR))
    for num, kind, t0, t1, _, _ in tracks.events:
        if t0 - 0.25 <= t_s <= t1 + 0.75:
            c = _hex_to_bgr(EVENT_STYLE.get(kind, ("#555555", "P"))[0])
            lines.append((f"EVENT {num}: {kind.replace('_', ' ')}", c))
    return lines


def _robot_mask(shape, registration, pose, robot, margin_m=0.05):
    """Pixels covered by the robot's box (to keep it out of floor registration)."""
    if registration is None or not registration.ok or pose is None \
            or not np.all(np.isfinite(pose)):
        return None
    hl = robot.length_m / 2 + margin_m
    hw = robot.width_m / 2 + margin_m
    corners = np.array([[hl, hw], [hl, -hw], [-hl, -hw], [-hl, hw]])
    c, s = math.cos(pose[2]), math.sin(pose[2])
    xy = corners @ np.array([[c, s], [-s, c]]) + pose[:2]
    pts = np.vstack([np.column_stack([xy, np.zeros(4)]),
                     np.column_stack([xy, np.full(4, robot.height_m + margin_m)])])
    px = _project(registration, pts)
    px = px[np.all(np.isfinite(px), axis=1)]
    if len(px) < 3:
        return None
    mask = np.zeros(shape[:2], np.uint8)
    cv2.fillConvexPoly(mask, cv2.convexHull(np.round(px).astype(np.int32)), 1)
    return mask.astype(bool)


class _Resized:
    """A frame registration seen through an image resized by ``(sx, sy)`` (pixel centres
    at integers on both sides: ``u' = (u + 0.5) sx - 0.5``)."""

    def __init__(self, registration, sx: float, sy: float):
        self._reg = registration
        self._s = np.array([sx, sy], float)

    def floor_to_image(self, pts_m):
        px = np.asarray(self._reg.floor_to_image(pts_m), float)
        return (px + 0.5) * self._s - 0.5

    def __getattr__(self, name):
        return getattr(self._reg, name)


def _replay_size(shape, scale: float) -> tuple[int, int]:
    """(width, height) of the replay: even, at least 2 px [px]."""
    if not (0.0 < scale <= 1.0):
        raise InputError(f"replay: scale must be in (0, 1], got {scale}")
    h, w = shape[:2]
    return max(2, int(round(w * scale / 2)) * 2), max(2, int(round(h * scale / 2)) * 2)


class _Increasing:
    """Frame times made strictly increasing and not negative, as the encoder needs, one
    at a time as they are decoded [s] (a time not after the previous one becomes the
    previous one + 1 ms; all are shifted so that the first is not negative)."""

    def __init__(self):
        self._first = self._prev = None

    def __bool__(self) -> bool:
        return self._prev is not None

    def __call__(self, t_s: float) -> float:
        t = float(t_s)
        if self._prev is not None and not t > self._prev:
            t = self._prev + 1e-3
        if self._first is None:
            self._first = t
        self._prev = t
        return t - min(0.0, self._first)


def _register_fn(registration, field, camera):
    """``register(frame, t_s, mask_fn, index)`` -> the registration in effect for a frame
    (see :func:`write_replay`, ``registration``)."""
    if registration is None or hasattr(registration, "register"):
        from ..tracking.registration_policy import RegistrationPolicy

        if registration is None:
            if field is None:
                raise InputError("replay: needs the field profile (or a registration) to "
                                 "map floor positions into the frames")
            from ..registration.registrar import FloorRegistrar

            registration = FloorRegistrar(field, camera)
        policy = RegistrationPolicy(registration, field or registration.field)

        def register(frame, t_s, mask_fn, index):
            return policy.update(frame, index, t_s, mask_fn)[0]
    elif callable(registration) and not hasattr(registration, "floor_to_image"):
        def register(frame, t_s, mask_fn, index):
            if not getattr(registration, "takes_mask", True):  # recorded: no mask needed
                return registration(frame, t_s)
            mask = mask_fn()
            return registration(frame, t_s, mask) if mask is not None else \
                registration(frame, t_s)
    else:
        def register(frame, t_s, mask_fn, index):
            return registration
    return register


@dataclass(frozen=True)
class ReplaySetup:
    """What the replay needs to know about the run besides its tables."""

    robot: object = None
    """RobotProfile: its first marker's offset and height place the rings; its box is
    masked out of the floor registration."""
    field: object = None
    """FieldProfile; needed unless ``registration`` is given."""
    camera: object = None
    """CameraProfile (lens) for the floor registration."""
    registration: object = None
    """One FrameRegistration for every frame (fixed camera); a registrar (e.g. the one
    the tracker used, which saves registering the first frame from scratch again) run
    when :class:`vidodo.tracking.registration_policy.RegistrationPolicy` says so (as
    while tracking); or
    ``f(frame_bgr, t_s, mask) -> FrameRegistration`` called on every frame. Default: a
    new :class:`vidodo.registration.registrar.FloorRegistrar` for ``field`` and
    ``camera``, run as a registrar."""
    marker: object = None
    """The Marker whose position is drawn (default: the robot's first marker; without
    either, the robot's reference point on the floor)."""
    sources: dict | None = None
    """Source display name -> drift column prefix (default: every source in the
    drift table)."""
    readout_s: float = 0.0
    """Rolling-shutter readout the track was made with (see :func:`frame_overlay`) [s]."""


@dataclass(frozen=True)
class ReplayStyle:
    """How the replay looks."""

    units: str = "mm"
    """Display unit of the readout: 'mm', 'in' or 'm'."""
    trail_s: float = 3.0
    """Track length drawn behind each pose [s]."""
    codec: str = "h264"
    """Codec for :func:`vidodo.encode.write_video` ('h264' plays in browsers)."""
    grid: bool = True
    """Draw the registered tile grid and field outline, faint, on every frame (needs the
    field profile), so a wrong floor mapping shows at a glance."""
    scale: float | None = None
    """Replay size relative to the footage, in (0, 1]; default :data:`DEFAULT_SCALE`."""


def write_replay(video_path, drift: pd.DataFrame, events: pd.DataFrame | None, out_path,
                 setup: ReplaySetup | None = None, style: ReplayStyle | None = None, *,
                 progress=None) -> Path:
    """Write the annotated replay of a run.

    Parameters
    ----------
    video_path : path
        The run's footage.
    drift, events : DataFrame
        Grade outputs (DEVELOPERS.md, "Grade outputs").
    out_path : path
        The mp4 to write.
    setup : ReplaySetup, optional
        Robot, field and camera profiles, or a registration; marker; sources; readout
        time the track was made with.
    style : ReplayStyle, optional
        Display unit, trail length [s], codec, tile grid on or off, size.
    progress : callable, optional
        ``progress(done, total)`` per frame.

    Returns
    -------
    Path
        ``out_path``.
    """
    from ..video import VideoReader, VideoTruncatedError

    setup, style = setup or ReplaySetup(), style or ReplayStyle()
    robot, marker = setup.robot, setup.marker
    video_path, out_path = Path(video_path), Path(out_path)
    sources = source_prefixes(drift) if setup.sources is None else setup.sources
    tracks = ReplayTracks.from_tables(drift, events, sources)
    colors = {n: _hex_to_bgr(c) for n, c in source_colors(sources).items()}
    if marker is None and robot is not None and robot.markers:
        marker = robot.markers[0]
    register = _register_fn(setup.registration, setup.field, setup.camera)
    times = _Increasing()
    scale = DEFAULT_SCALE if style.scale is None else float(style.scale)
    _replay_size((2, 2), scale)  # a bad scale fails before anything is decoded
    steps = np.diff(tracks.t_s)
    gap = 0.6 * float(np.median(steps)) if steps.size else 0.05  # a row per frame
    state = {"reg": None, "pose": None}

    def frames():
        with VideoReader(video_path) as reader:
            total = reader.info.frame_count or None
            try:
                for index, t_s, frame in reader:
                    t_out = times(t_s)  # the encoder takes each frame's time with it
                    # handed over as I420: OpenCV's conversion costs a tenth of the
                    # encoder's own (same BT.601 limited range; encode.write_video)
                    yield cv2.cvtColor(annotated(index, t_s, frame),
                                       cv2.COLOR_BGR2YUV_I420), t_out
                    if progress is not None:
                        progress(index + 1, total)
            except VideoTruncatedError:
                if not times:
                    raise  # nothing could be decoded: the message names the footage
                return  # every good frame was annotated

    def annotated(index, t_s, frame):
        def mask_fn():
            return (_robot_mask(frame.shape, state["reg"], state["pose"], robot)
                    if robot is not None else None)

        reg = base = register(frame, t_s, mask_fn, index)
        row = tracks.row_at(t_s, max_gap_s=gap)
        state["reg"] = reg if getattr(reg, "ok", False) else state["reg"]
        state["pose"] = tracks.truth[row] if row is not None else state["pose"]
        (h0, w0), (w, h) = frame.shape[:2], _replay_size(frame.shape, scale)
        resized_from = frame  # the decoder's frame: drawn on a copy (the reader keeps it)
        if (w, h) != (w0, h0):
            frame = cv2.resize(frame, (w, h), interpolation=cv2.INTER_AREA)
            reg = None if reg is None else _Resized(reg, w / w0, h / h0)
        ov = frame_overlay(tracks, row, reg, marker=marker, trail_s=style.trail_s,
                           readout_s=setup.readout_s, height_px=frame.shape[0])
        lines = readout_lines(tracks, row, t_s, colors, style.units)
        if not getattr(reg, "ok", False):
            lines.append(("floor not registered in this frame", (0, 0, 255)))
        if style.grid and setup.field is not None and getattr(reg, "ok", False):
            if state.get("grid_of") is not base:  # a registration holds for many frames
                state["grid_of"], state["grid"] = base, grid_layer(
                    grid_polylines_px(reg, setup.field), frame.shape, alpha=0.35)
            frame = state["grid"].draw(frame if frame is not resized_from else frame.copy())
        return annotate_frame(frame, ov, lines=lines, colors=colors)

    from ..encode import write_video

    out_path.parent.mkdir(parents=True, exist_ok=True)
    write_video(out_path, frames(), codec=style.codec, crf=ENCODER_CRF,
                preset=ENCODER_PRESET)
    return out_path


def replay_from_grade(data, out_path, *, units: str = "mm", progress=None,
                      registration=None, grid: bool = True,
                      scale: float | None = None) -> Path:
    """Write the replay for a :class:`vidodo.report.build.GradeData`.

    The footage and profiles are the ones named in ``summary['inputs']`` (``video``,
    ``robot``, ``field``, optional ``camera``), relative to the grade folder or absolute.
    The frames are mapped with the registrations the truth track was measured with
    (``track.floor.csv`` in the grade folder, :func:`grade_registration`); only a grade
    folder without them registers the frames again.

    Raises
    ------
    InputError
        When the footage or a profile cannot be found.
    """
    from ..profiles import load_camera, load_field, load_robot

    inputs = data.summary.get("inputs") or {}

    def find(key, required=True):
        return grade_input(data, key, required=required)

    video = find("video")
    robot = load_robot(find("robot"))
    # the whole field profile (floor fiducials, origin hint) when its file is there;
    # the summary's tile grid alone otherwise
    field_path = find("field", required=data.field is None)
    field = load_field(field_path) if field_path is not None else data.field
    cam_path = find("camera", required=False)
    camera = load_camera(cam_path) if cam_path is not None else None
    readout = 0.0
    recorded = data.folder is not None and (Path(data.folder) / "track.floor.csv").is_file()
    if registration is None or recorded:  # the registrations the track was made with win
        registration, readout = grade_registration(data.folder, field, camera,
                                                   inputs.get("points"))
    setup = ReplaySetup(robot=robot, field=field, camera=camera, registration=registration,
                        sources=data.sources, readout_s=readout)
    return write_replay(video, data.drift, data.events, out_path, setup,
                        ReplayStyle(units=units, grid=grid, scale=scale), progress=progress)



def grade_input(data, key: str, *, required: bool = True):
    """The file ``summary['inputs'][key]`` of a grade names (as given, or relative to the
    grade folder), or None when it is not there and not ``required``.

    Raises
    ------
    InputError
        When a required file cannot be found.
    """
    p = (data.summary.get("inputs") or {}).get(key)
    cands = []
    if isinstance(p, str) and p:
        cands.append(Path(p))
        if data.folder is not None:
            cands.append(Path(data.folder) / p)
    for c in cands:
        if c.is_file():
            return c
    if required:
        raise InputError(f"{data.folder}/summary.json: inputs.{key} = {p!r} not found; "
                         "run the report where the run folder is, or skip the replay")
    return None


def grade_registration(folder, field, camera=None, points=None):
    """How the frames of a grade are mapped to the floor: ``(register, readout_s)``.

    With ``track.floor.csv`` in the grade folder (the registrations the truth track was
    measured with), ``register(frame, t_s, mask=None)`` returns the one in effect at
    ``t_s``, and ``readout_s`` is the rolling-shutter readout the track used. Without
    it, a new :class:`vidodo.registration.registrar.FloorRegistrar` (with the grade's
    points CSV when it had one), which the replay runs on the tracker's schedule, and
    ``readout_s`` is 0.
    """
    from ..registration.frame import failed
    from ..registration.registrar import FloorRegistrar
    from ..tracking.floor_poses import read_floor_poses

    path = None if folder is None else Path(folder) / "track.floor.csv"
    if path is not None and path.is_file():
        poses = read_floor_poses(path)

        def register(frame, t_s, mask=None):
            reg = poses.at(t_s)
            return reg if reg is not None else failed(t_s, "not registered when tracked")

        register.takes_mask = False  # looked up by time: the robot's pixels do not matter
        return register, poses.detection_readout_s
    pts = points if isinstance(points, str) and Path(points).is_file() else None
    return FloorRegistrar(field, camera, points_csv=pts), 0.0

"""The report's registration section: frames with the registered grid, and its figures.

For a grade folder, :func:`registration_summary` picks the frames at the start, middle and
end of the registered stretch (and, when the camera moved, the frame whose registration
fitted worst), draws on each the tile grid and field outline the floor mapping implies
(:func:`vidodo.grid_overlay.draw_grid_overlay`, opaque, in :data:`~vidodo.grid_overlay.
GRID_BGR`), and gathers the self-check figures of those registrations and of the whole
run (residuals in pixels and on the floor, observations used) and how the reference was
registered (automatic grid, points CSV or floor fiducials; with or without a lens
profile). The registrations are the ones the truth track was measured with
(``track.floor.csv``), so the pictures show the mapping the figures rest on.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np

from .errors import VidodoError
from .grid_overlay import draw_grid_overlay

__all__ = ["RegistrationFrame", "RegistrationSummary", "registration_summary",
           "method_description"]


@dataclass(frozen=True)
class RegistrationFrame:
    """One frame shown in the report."""

    role: str
    """'start', 'middle', 'end' or 'worst'."""
    t_s: float
    """Frame time [s]."""
    jpeg: bytes
    """The frame with the grid drawn, JPEG."""
    scale: float
    """Size of the picture relative to the frame."""
    ok: bool
    method: str
    rms_px: float
    """Residual of the registration's observations [px]."""
    rms_floor_m: float
    """The same on the floor [m]."""
    n_points: int


@dataclass(frozen=True)
class RegistrationSummary:
    """What the registration section shows."""

    method: str
    """How the reference frame was registered, in words."""
    lens: str
    """Lens profile used, or that the lens was estimated."""
    source: str
    """Where the registrations shown come from."""
    moving: bool
    """True when the camera moved (a hand-held clip)."""
    n_registrations: int
    n_ok: int
    rms_px_median: float
    rms_px_max: float
    rms_floor_m_median: float
    rms_floor_m_max: float
    frames: tuple = ()
    note: str = ""
    """Why frames are missing, when they are."""


def method_description(method: str, points_name: str | None = None) -> str:
    """A registration method code ('grid', 'points+seams', ...) in words."""
    base, _, extra = (method or "").partition("+")
    words = {"grid": "automatic tile grid",
             "markers": "floor fiducials",
             "points": "points CSV" + (f" ({points_name})" if points_name else "")}
    text = words.get(base, base or "unknown")
    if extra == "seams":
        text += ", refined on the tile seams"
    return text


def _pick_times(regs):
    ok = [r for r in regs if r.ok]
    if not ok:
        return {}, False
    t = np.array([r.t_s for r in ok])
    picks = {"start": ok[0], "middle": ok[int(np.argmin(np.abs(t - (t[0] + t[-1]) / 2)))],
             "end": ok[-1]}
    poses = np.array([np.concatenate([np.ravel(r.rvec), np.ravel(r.tvec)]) for r in ok])
    moving = bool(np.ptp(poses, axis=0).max() > 1e-6) if len(ok) > 1 else False
    if moving:
        fresh = [r for r in ok if r.method != "static"] or ok
        picks["worst"] = max(fresh, key=lambda r: r.rms_px)
    return picks, moving


def _frames_at(video, times):
    """Frames at (or just after) each wanted time: {wanted_t: (t_s, frame)}."""
    from .video import VideoReader

    with VideoReader(video, threaded=False, check_identical=False) as reader:
        return reader.frames_at(times)  # frames in between only decoded, not converted


def _picture(frame, reg, field, max_width_px):
    scale = min(1.0, max_width_px / frame.shape[1])
    img = frame if frame.ndim == 3 else cv2.cvtColor(frame, cv2.COLOR_GRAY2BGR)
    if scale < 1.0:
        img = cv2.resize(img, None, fx=scale, fy=scale, interpolation=cv2.INTER_AREA)
    else:
        img = img.copy()
    draw_grid_overlay(img, reg, field, alpha=1.0, thickness=2, scale=scale)
    ok, buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, 92])
    return (buf.tobytes() if ok else b""), scale


def registration_summary(data, *, max_width_px: int = 960) -> RegistrationSummary | None:
    """The registration section of a grade folder (None when nothing can be said).

    Parameters
    ----------
    data : vidodo.report.build.GradeData
    max_width_px : int
        Widest picture [px]; larger frames are shrunk.
    """
    from .profiles import load_camera, load_field
    from .report.replay import grade_input
    from .tracking.floor_poses import read_floor_poses

    folder = None if data.folder is None else Path(data.folder)
    poses_path = None if folder is None else folder / "track.floor.csv"
    if poses_path is None or not poses_path.is_file():
        return None
    poses = read_floor_poses(poses_path)
    regs = list(poses.registrations)
    inputs = data.summary.get("inputs") or {}
    cam_path = grade_input(data, "camera", required=False)
    points = inputs.get("points")
    ref = next((r for r in regs if r.ok), None)
    ok_regs = [r for r in regs if r.ok]
    rms = np.array([r.rms_px for r in ok_regs], float)
    rms_m = np.array([r.rms_floor_m for r in ok_regs], float)

    def stat(a, f):
        a = a[np.isfinite(a)]
        return float(f(a)) if a.size else float("nan")

    picks, moving = _pick_times(regs)
    base = dict(
        method=method_description(ref.method if ref else "",
                                  Path(points).name if isinstance(points, str) else None),
        lens=(f"lens profile {Path(cam_path).name}" if cam_path is not None else
              "no lens profile: focal length and distortion estimated from the tiles"),
        source="the registrations the truth track was measured with (track.floor.csv)",
        moving=moving, n_registrations=len(regs), n_ok=len(ok_regs),
        rms_px_median=stat(rms, np.median), rms_px_max=stat(rms, np.max),
        rms_floor_m_median=stat(rms_m, np.median), rms_floor_m_max=stat(rms_m, np.max))
    try:
        video = grade_input(data, "video")
        field_path = grade_input(data, "field", required=data.field is None)
        field = load_field(field_path) if field_path is not None else data.field
        if cam_path is not None:
            load_camera(cam_path)  # a broken profile is reported like a missing one
        frames = _frames_at(video, [r.t_s for r in picks.values()])
    except VidodoError as exc:
        return RegistrationSummary(**base, note=f"no frames shown: {exc}")
    shown = []
    for role, r in picks.items():
        if r.t_s not in frames:
            continue
        t_s, frame = frames[r.t_s]
        reg = poses.at(t_s)
        if reg is None:
            continue
        jpeg, scale = _picture(frame, reg, field, max_width_px)
        shown.append(RegistrationFrame(role, float(t_s), jpeg, scale, bool(reg.ok),
                                       reg.method, float(reg.rms_px), float(reg.rms_floor_m),
                                       int(reg.n_points)))
    return RegistrationSummary(**base, frames=tuple(shown))

"""The placement planner's map as a PNG: expected error and marker cell size over the field.

Two panels, top view to scale with the tile grid: the expected 1-sigma position error
(colour, mm) and the marker cell size (colour, px); hatched grey where the marker is in
view but too small to detect, dark grey where it is out of view; the camera's footprint
position marked when it stands beside the field.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import ListedColormap
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from .planner import PlanMap

__all__ = ["plan_figure", "write_plan_png"]


def _panel(ax, plan: PlanMap, fld, values, label, cmap, title):
    k = 1000.0
    step = (plan.x_m[1] - plan.x_m[0]) if plan.x_m.size > 1 else 0.05
    extent = ((plan.x_m[0] - step / 2) * k, (plan.x_m[-1] + step / 2) * k,
              (plan.y_m[0] - step / 2) * k, (plan.y_m[-1] + step / 2) * k)
    shown = np.where(plan.detectable, values, np.nan)
    im = ax.imshow(shown, origin="lower", extent=extent, cmap=cmap, interpolation="nearest")
    small = plan.in_view & ~plan.detectable
    out = ~plan.in_view
    ax.imshow(np.where(out, 1.0, np.nan), origin="lower", extent=extent,
              cmap=ListedColormap(["#424242"]), interpolation="nearest", vmin=0, vmax=1)
    ax.contourf(plan.x_m * k, plan.y_m * k, small.astype(float), levels=[0.5, 1.5],
                colors="none", hatches=["///"])
    ax.imshow(np.where(small, 1.0, np.nan), origin="lower", extent=extent, alpha=0.35,
              cmap=ListedColormap(["#9e9e9e"]), interpolation="nearest", vmin=0, vmax=1)
    sx, sy = fld.size_m
    for i in range(fld.tiles_x + 1):
        ax.plot([i * fld.tile_size_m * k] * 2, [0, sy * k], color="white", lw=0.5)
    for j in range(fld.tiles_y + 1):
        ax.plot([0, sx * k], [j * fld.tile_size_m * k] * 2, color="white", lw=0.5)
    ax.set_xlim(0, sx * k)
    ax.set_ylim(0, sy * k)
    ax.set_aspect("equal")
    ax.set_xlabel("x [mm]")
    ax.set_ylabel("y [mm]")
    ax.set_title(title, fontsize=9)
    ax.figure.colorbar(im, ax=ax, label=label, shrink=0.8)


def timing_note(settings) -> str:
    """The map's line on the motion it assumes (the timing term's speed and readout)."""
    if not settings.readout_sigma_s > 0:
        return "readout time known: no rolling-shutter timing term"
    return (f"assumes a drive speed of {settings.speed_mps:.2f} m/s (rolling-shutter "
            f"timing, readout uncertain by {settings.readout_sigma_s * 1000:.0f} ms)")


def plan_figure(plan: PlanMap, fld, marker, *, title: str = "", settings=None) -> Figure:
    """Two panels: expected 1-sigma error [mm] and marker cell size [px]; with
    ``settings`` (:class:`~vidodo.planner.PlanSettings`) the title states the motion the
    error assumes (:func:`timing_note`)."""
    fig = Figure(figsize=(12.0, 5.8), dpi=110)
    FigureCanvasAgg(fig)
    a1, a2 = fig.subplots(1, 2)
    _panel(a1, plan, fld, plan.sigma_xy_m * 1000.0, "expected 1-sigma per axis [mm]",
           "viridis", "expected position error (1-sigma)")
    _panel(a2, plan, fld, plan.cell_px, "marker cell [px]", "magma",
           "marker cell size in the image")
    a2.legend(handles=[Patch(facecolor="#9e9e9e", hatch="///", label="too small to detect"),
                       Patch(facecolor="#424242", label="out of view")],
              loc="upper right", fontsize=7, framealpha=0.9)
    det = plan.detectable
    worst = np.nanmax(np.where(det, plan.sigma_xy_m, np.nan)) * 1000 if det.any() else np.nan
    fig.suptitle(title or (f"placement plan: marker {marker.size_m * 1000:.0f} mm at "
                           f"{marker.z_m * 1000:.0f} mm; detectable on "
                           f"{100 * det.mean():.0f}% of the field, worst 1-sigma "
                           f"{worst:.1f} mm")
                 + ("" if settings is None else "\n" + timing_note(settings)), fontsize=10)
    fig.tight_layout()
    return fig


def write_plan_png(plan: PlanMap, fld, marker, path, *, title: str = "",
                   settings=None) -> Path:
    """Write :func:`plan_figure` as a PNG and return its path."""
    from .report.plots import save_figure

    return save_figure(plan_figure(plan, fld, marker, title=title, settings=settings), path)


def _tracked_registration(folder, video):
    """The track's first good registration (``track.floor.csv`` in ``folder``) and the
    footage's frame size ``(w, h)`` [px]; ``(None, (0, 0))`` without one."""
    from .tracking.floor_poses import read_floor_poses
    from .video import probe_video

    path = None if folder is None else Path(folder) / "track.floor.csv"
    if path is None or not path.is_file():
        return None, (0, 0)
    reg = next((r for r in read_floor_poses(path).registrations if r.ok), None)
    if reg is None:
        return None, (0, 0)
    info = probe_video(video)
    return reg, (info.width_px, info.height_px)


def plan_of_grade(summary: dict, folder, out_dir) -> dict[str, Path]:
    """``{'plan': plan.png}``: the planner's map for the camera of a graded run.

    The camera's pose and lens come from the first registration the track was measured
    with (``track.floor.csv`` in ``folder``), or else from registering the footage's
    first frame (``summary.inputs.video``, ``field``, ``camera``); the corner noise and
    the common corner shift from the track's quality in the summary, the registration's
    parameter covariance (when the registration carries one) or size from it. Empty when any of
    these cannot be had (the report is written without the map).
    """
    import math

    import cv2

    from .errors import VidodoError
    from .planner import CameraView, PlanSettings, plan_map
    from .profiles import load_camera, load_field, load_robot
    from .registration.registrar import FloorRegistrar
    from .tracking.finish import quality_readout_sigma_s

    inputs = summary.get("inputs") or {}
    quality = summary.get("truth") or {}
    sigma_px = quality.get("corner_sigma_px")

    def path(key):
        p = inputs.get(key)
        if not isinstance(p, str) or not p:
            return None
        for cand in (Path(p), Path(folder) / p if folder is not None else None):
            if cand is not None and cand.is_file():
                return cand
        return None

    video, robot_p, field_p = path("video"), path("robot"), path("field")
    if None in (video, robot_p, field_p) or not isinstance(sigma_px, int | float) \
            or not math.isfinite(sigma_px) or sigma_px <= 0:
        return {}
    try:
        robot, fld = load_robot(robot_p), load_field(field_p)
        if not robot.markers:
            return {}
        reg, (w, h) = _tracked_registration(folder, video)
        if reg is None:
            camera = load_camera(path("camera")) if path("camera") else None
            cap = cv2.VideoCapture(str(video))
            ok, frame = cap.read()
            cap.release()
            if not ok:
                return {}
            reg = FloorRegistrar(fld, camera).register(frame, 0.0)
            h, w = frame.shape[:2]
    except (VidodoError, cv2.error, OSError):
        return {}
    if not reg.ok:
        return {}
    view = CameraView(np.asarray(reg.camera_matrix, float), np.asarray(reg.dist_coeffs, float),
                      np.asarray(reg.rvec, float).ravel(), np.asarray(reg.tvec, float).ravel(),
                      w, h)
    bias = quality.get("corner_bias_px")
    settings = PlanSettings(sigma_corner_px=float(sigma_px), registration=reg,
                            corner_bias_px=float(bias) if isinstance(bias, int | float)
                            and math.isfinite(bias) else PlanSettings.corner_bias_px,
                            margin_m=min(robot.length_m, robot.width_m) / 2,
                            readout_sigma_s=quality_readout_sigma_s(quality))
    plan = plan_map(fld, robot.markers[0], view, settings)
    return {"plan": write_plan_png(plan, fld, robot.markers[0], Path(out_dir) / "plan.png",
                                   title=f"this run's camera: expected 1-sigma (corner noise "
                                         f"{sigma_px:.2f} px) and marker cell size",
                                   settings=settings)}

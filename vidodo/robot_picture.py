"""A picture of a robot profile: top view to scale, so profile mistakes show at a glance.

The page shows the robot with its front up and its left side on the left (body +x up,
body +y to the left): the footprint (the profile's ``length_m`` x ``width_m`` box,
centred on the reference point), every encoder wheel with its name, an arrow along the
direction in which its counts rise (the rolling direction, reversed when ``sign`` is
-1), a dashed line along the motion the wheel cannot sense (its free-roller direction,
sideways for plain and omni wheels, turned by the roller angle for mecanum wheels, from
the single wheel model in :mod:`vidodo.wheels`), each tracking wheel's lever arm (the
perpendicular from the reference point to its rolling line), every marker with its
printed top and offset, and the reference point with the body axes.

:func:`robot_layout` computes everything drawn (page coordinates, metres) so it can be
tested apart from the drawing; :func:`robot_figure` draws it with matplotlib's object
interface on the Agg canvas.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Polygon, Rectangle

from .profiles import RobotProfile, marker_corners_local

__all__ = ["WheelGlyph", "MarkerGlyph", "RobotLayout", "body_to_page", "robot_layout",
           "robot_figure", "write_robot_picture", "PICTURE_NAME"]

PICTURE_NAME = "robot.png"
"""File name of the robot picture in grade folders and verb outputs."""

_POWERED = "#1565c0"
_TRACKING = "#2e7d32"
_MARKER = "#6a1b9a"


def body_to_page(points_m):
    """Body-frame points (x forward, y left) -> page points (right, up) [m].

    The robot's front points up the page and its left side is on the left:
    ``page = (-y, x)``.

    Parameters
    ----------
    points_m : array_like of shape (N, 2) or (2,)

    Returns
    -------
    ndarray of the same shape [m].
    """
    p = np.asarray(points_m, dtype=float)
    return np.stack([-p[..., 1], p[..., 0]], axis=-1)


@dataclass(frozen=True)
class WheelGlyph:
    """One wheel as drawn, page coordinates [m]."""

    name: str
    powered: bool
    centre: tuple[float, float]
    counts_up: tuple[float, float]
    """Unit vector along which the wheel's counts rise (direction x sign)."""
    blind: tuple[float, float]
    """Unit vector of the motion the wheel does not sense (free-roller direction)."""
    roller_deg: float
    sign: int
    lever_foot: tuple[float, float]
    """Foot of the perpendicular from the reference point to the rolling line."""
    lever_m: float
    """Signed lever arm: rim speed per unit turn rate (``A[i, 2]``) [m]."""
    label: str


@dataclass(frozen=True)
class MarkerGlyph:
    """One marker as drawn, page coordinates [m]."""

    corners: np.ndarray
    """(4, 2) corners in OpenCV order (printed top-left first)."""
    top_mid: tuple[float, float]
    """Midpoint of the printed top edge."""
    label: str


@dataclass(frozen=True)
class RobotLayout:
    """Everything :func:`robot_figure` draws, in page coordinates [m]."""

    footprint: np.ndarray
    """(4, 2) corners of the robot's box."""
    wheels: tuple[WheelGlyph, ...]
    markers: tuple[MarkerGlyph, ...]
    extent: tuple[float, float, float, float]
    """(left, right, bottom, top) covering every item with a margin."""


def _wheel_glyph(w) -> WheelGlyph:
    from .wheels import wheel_rows

    d = np.array([math.cos(w.direction_rad), math.sin(w.direction_rad)])
    # motion the wheel does not sense: A_row[:2] . v = 0 (single wheel model)
    row = wheel_rows([w])[0]
    blind = np.array([-row[1], row[0]]) / math.hypot(row[0], row[1])
    p = np.array([w.x_m, w.y_m])
    foot = p - d * float(p @ d)  # closest point of the rolling line to the origin
    kind = "drive" if w.powered else "tracking"
    label = (f"{w.name} ({kind})\nx {w.x_m * 1000:+.0f} y {w.y_m * 1000:+.0f} mm, "
             f"dir {math.degrees(w.direction_rad):.0f}\u00b0\nroller "
             f"{math.degrees(w.roller_rad):+.0f}\u00b0, sign {w.sign:+d}, "
             f"r {w.radius_m * 1000:.1f} mm\n{w.ticks_per_rev:g} counts/enc. turn, "
             f"gear {w.gear_ratio:g} enc. turns/wheel turn")
    return WheelGlyph(
        name=w.name, powered=w.powered, centre=tuple(body_to_page(p)),
        counts_up=tuple(body_to_page(d * w.sign)), blind=tuple(body_to_page(blind)),
        roller_deg=math.degrees(w.roller_rad), sign=w.sign,
        lever_foot=tuple(body_to_page(foot)), lever_m=float(row[2]), label=label)


def _marker_glyph(m) -> MarkerGlyph:
    c, s = math.cos(m.yaw_rad), math.sin(m.yaw_rad)
    rot = np.array([[c, -s], [s, c]])
    body = marker_corners_local(m.size_m) @ rot.T + np.array([m.x_m, m.y_m])
    page = body_to_page(body)
    label = (f"marker {m.family} id {m.id}, {m.size_m * 1000:.0f} mm\n"
             f"at x {m.x_m * 1000:+.0f} y {m.y_m * 1000:+.0f} mm, "
             f"z {m.z_m * 1000:.0f} mm, yaw {math.degrees(m.yaw_rad):.0f}\u00b0")
    return MarkerGlyph(corners=page, top_mid=tuple(page[:2].mean(axis=0)), label=label)


def robot_layout(robot: RobotProfile) -> RobotLayout:
    """Page geometry of a robot profile (front up, left on the left) [m]."""
    hl, hw = robot.length_m / 2, robot.width_m / 2
    footprint = body_to_page(np.array([[hl, hw], [hl, -hw], [-hl, -hw], [-hl, hw]]))
    wheels = tuple(_wheel_glyph(w) for w in robot.wheels)
    markers = tuple(_marker_glyph(m) for m in robot.markers)
    pts = [footprint, np.zeros((1, 2))]
    pts += [np.array([w.centre]) for w in wheels]
    pts += [m.corners for m in markers]
    allp = np.vstack(pts)
    span = max(float(np.ptp(allp[:, 0])), float(np.ptp(allp[:, 1])), 0.1)
    pad = 0.15 * span
    side = 0.75 * span  # room for the wheel labels left and right
    extent = (float(allp[:, 0].min() - side), float(allp[:, 0].max() + side),
              float(allp[:, 1].min() - pad), float(allp[:, 1].max() + pad))
    return RobotLayout(footprint=footprint, wheels=wheels, markers=markers, extent=extent)


def _draw_marker(ax, glyph: MarkerGlyph):
    ax.add_patch(Polygon(glyph.corners, closed=True, facecolor="#ede7f6",
                         edgecolor=_MARKER, lw=1.6, zorder=2))
    ctr = glyph.corners.mean(axis=0)
    top = np.asarray(glyph.top_mid)
    ax.annotate("", xy=top, xytext=ctr, zorder=3,
                arrowprops=dict(arrowstyle="-|>", color=_MARKER, lw=1.2))
    ax.text(*(top + 0.15 * (top - ctr)), "top", color=_MARKER, fontsize=7,
            ha="center", va="center", zorder=3)


def _draw_wheel(ax, w: WheelGlyph, radius_m: float, scale_m: float):
    colour = _POWERED if w.powered else _TRACKING
    cx, cy = w.centre
    ux, uy = w.counts_up
    ang = math.degrees(math.atan2(uy, ux))
    half_l, half_w = max(radius_m, 0.01), max(0.35 * radius_m, 0.006)
    box = Rectangle((cx - half_l, cy - half_w), 2 * half_l, 2 * half_w, facecolor="white",
                    edgecolor=colour, lw=1.6, zorder=4)
    from matplotlib.transforms import Affine2D

    box.set_transform(Affine2D().rotate_deg_around(cx, cy, ang) + ax.transData)
    ax.add_patch(box)
    a = 0.22 * scale_m
    ax.annotate("", xy=(cx + a * ux, cy + a * uy), xytext=(cx, cy), zorder=6,
                arrowprops=dict(arrowstyle="-|>", color=colour, lw=2.0))
    bx, by = w.blind
    b = 0.12 * scale_m
    ax.plot([cx - b * bx, cx + b * bx], [cy - b * by, cy + b * by], ls="--", lw=1.0,
            color=colour, zorder=5)
    if not w.powered:  # lever arm of a tracking wheel
        fx, fy = w.lever_foot
        ax.plot([0, fx], [0, fy], ls=":", lw=1.2, color=_TRACKING, zorder=3)
        ax.text(fx / 2, fy / 2, f"{abs(w.lever_m) * 1000:.0f} mm", fontsize=7,
                color=_TRACKING, ha="center", va="bottom", zorder=7)


def _draw_wheel_labels(ax, glyphs, layout):
    """Wheel labels in two columns beside the footprint, leader lines to the wheels."""
    x0, x1, y0, y1 = layout.extent
    fx0, fx1 = layout.footprint[:, 0].min(), layout.footprint[:, 0].max()
    for side in (-1, 1):
        mine = [g for g in glyphs if (g.centre[0] >= 0) == (side > 0)]
        mine.sort(key=lambda g: -g.centre[1])
        step = (y1 - y0) / max(len(mine), 1)
        col_x = (fx1 + 0.25 * (x1 - fx1)) if side > 0 else (fx0 - 0.25 * (fx0 - x0))
        for i, g in enumerate(mine):
            ly = y1 - step * (i + 0.5)
            colour = _POWERED if g.powered else _TRACKING
            ax.plot([g.centre[0], col_x], [g.centre[1], ly], lw=0.6, color=colour,
                    alpha=0.7, zorder=3)
            ax.text(col_x, ly, g.label, fontsize=6.5, color=colour,
                    ha="left" if side > 0 else "right", va="center", zorder=7,
                    bbox=dict(facecolor="white", edgecolor=colour, lw=0.5, pad=1.5))


def _draw_frame(ax, robot, layout, scale_m):
    fp = layout.footprint
    ax.add_patch(Polygon(fp, closed=True, facecolor="#fafafa", edgecolor="#424242",
                         lw=2.0, zorder=1))
    front = fp[:2].mean(axis=0)
    ax.text(front[0], front[1] + 0.02 * scale_m, "FRONT", ha="center", va="bottom",
            fontsize=9, fontweight="bold", color="#424242")
    left = fp[[0, 3]].mean(axis=0)
    ax.text(left[0] + 0.02 * scale_m, fp[:, 1].min() + 0.03 * scale_m, "LEFT", ha="left",
            va="bottom", fontsize=9, fontweight="bold", color="#424242")
    a = 0.3 * scale_m
    for vec, text in (((0.0, a), "x forward"), ((-a, 0.0), "y left")):
        ax.annotate("", xy=vec, xytext=(0, 0), zorder=8,
                    arrowprops=dict(arrowstyle="-|>", color="black", lw=1.4))
        ax.text(vec[0] * 1.08, vec[1] * 1.08, text, fontsize=7, ha="center", va="bottom")
    ax.plot([0], [0], marker="+", ms=14, mew=2, color="#d32f2f", zorder=9)
    ax.plot([0], [0], marker="o", ms=6, mfc="none", mec="#d32f2f", mew=1.5, zorder=9)
    ax.text(0.02 * scale_m, -0.03 * scale_m, "reference point", fontsize=7,
            color="#d32f2f", va="top", zorder=9)


def _draw_scale_bar(ax, layout):
    x0, x1, y0, _ = layout.extent
    bar = 0.1  # a 100 mm scale bar
    bx, by = x0 + 0.03 * (x1 - x0), y0 + 0.03 * (x1 - x0)
    ax.plot([bx, bx + bar], [by, by], color="black", lw=3, solid_capstyle="butt")
    ax.text(bx + bar / 2, by + 0.01, "100 mm", ha="center", va="bottom", fontsize=7)


def robot_figure(robot: RobotProfile, *, title: str = "") -> Figure:
    """Top view of a robot profile to scale (equal axes in metres).

    Parameters
    ----------
    robot : RobotProfile
    title : str
        Title above the drawing (default: the robot's name).

    Returns
    -------
    matplotlib.figure.Figure
    """
    layout = robot_layout(robot)
    x0, x1, y0, y1 = layout.extent
    scale_m = float(np.ptp(layout.footprint[:, 1]))
    width_in = 10.0
    fig = Figure(figsize=(width_in, width_in * (y1 - y0) / (x1 - x0) + 1.4), dpi=110)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    _draw_frame(ax, robot, layout, scale_m)
    for m in layout.markers:
        _draw_marker(ax, m)
    for w, glyph in zip(robot.wheels, layout.wheels, strict=True):
        _draw_wheel(ax, glyph, w.radius_m, scale_m)
    _draw_wheel_labels(ax, layout.wheels, layout)
    for i, m in enumerate(layout.markers):
        ax.text(0.99, 0.99 - 0.07 * i, m.label, transform=ax.transAxes, ha="right",
                va="top", fontsize=7, color=_MARKER)
    _draw_scale_bar(ax, layout)
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_title(title or f"robot profile '{robot.name}': top view to scale, front up",
                 fontsize=10)
    fig.text(0.01, 0.01, "arrow: direction in which the wheel's counts rise (rolling "
             "direction x sign); dashed: motion the wheel cannot sense (free rollers); "
             "dotted: tracking-wheel lever arm; gear = encoder turns per wheel turn",
             fontsize=6.5, color="#424242")
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    return fig


def write_robot_picture(robot: RobotProfile, path) -> Path:
    """Write :func:`robot_figure` as a PNG and return its path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    robot_figure(robot).savefig(path, format="png", metadata={PNG_KEY: PNG_TEXT})
    return path


PNG_KEY = "vidodo"
"""Keyword of the PNG text chunk (``tEXt``) every robot picture carries."""
PNG_TEXT = "robot picture"
"""Text of that chunk; together they tell a picture vidodo wrote from a user's PNG."""
_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def is_vidodo_png(path) -> bool:
    """True if ``path`` is a PNG carrying vidodo's text chunk (written by this module).

    Only the chunks before the image data are read (text chunks precede ``IDAT``).
    """
    mark = b"tEXt" + PNG_KEY.encode() + b"\0" + PNG_TEXT.encode()
    with open(path, "rb") as fh:
        head = fh.read(1 << 16)
    return head.startswith(_PNG_MAGIC) and mark in head.split(b"IDAT", 1)[0]

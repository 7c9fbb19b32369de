"""Plausible ranges of profile values for a small wheeled robot on a tiled floor.

A value outside its range is refused with :class:`~vidodo.errors.InputError` (exit 2),
naming the file, the table and the key; when the value divided into metres from
millimetres, centimetres or inches would fit, the message names that slip
("48 m looks like millimetres: 0.048"). The ranges are generous bounds for student and
hobby robots and their fields (from memory: wheels of a few millimetres to a few
decimetres radius, robots under two metres, fields under a few dozen metres, encoders
up to a few million counts per revolution); they exist to catch typing and unit
mistakes, not to judge a design. Every size that drives the amount of work (tile
counts, image size) is bounded here too, so an absurd value is refused at once.
"""

from __future__ import annotations

import math

from .errors import InputError

__all__ = ["RANGES", "check_value", "check_robot", "check_field", "check_camera"]

RANGES = {
    "robot.length_m": (0.03, 2.0, "m"),
    "robot.width_m": (0.03, 2.0, "m"),
    "robot.height_m": (0.01, 2.0, "m"),
    "wheel.x_m": (-1.0, 1.0, "m"),
    "wheel.y_m": (-1.0, 1.0, "m"),
    "wheel.radius_m": (0.003, 0.25, "m"),
    "wheel.ticks_per_rev": (1.0, 1e7, "counts"),
    "wheel.gear_ratio": (1e-3, 1e4, ""),
    "marker.size_m": (0.01, 0.6, "m"),
    "marker.x_m": (-1.0, 1.0, "m"),
    "marker.y_m": (-1.0, 1.0, "m"),
    "marker.z_m": (0.0, 2.0, "m"),
    "imu.scale": (0.5, 2.0, ""),
    "floor.tiles_x": (1, 200, "tiles"),
    "floor.tiles_y": (1, 200, "tiles"),
    "floor.tile_size_m": (0.05, 3.0, "m"),
    "floor.extent_m": (0.2, 60.0, "m"),
    "floor_marker.size_m": (0.01, 2.0, "m"),
    "camera.width_px": (16, 16384, "px"),
    "camera.height_px": (16, 16384, "px"),
    "camera.readout_s": (0.0, 0.25, "s"),
    "camera.distortion": (-1e4, 1e4, ""),
}
"""Key -> (lowest, highest, unit) of every checked profile value."""

_SLIPS = (("millimetres", 1e-3), ("centimetres", 1e-2), ("inches", 0.0254))
_TIME_SLIPS = (("milliseconds", 1e-3), ("microseconds", 1e-6))


def _fmt(v) -> str:
    v = float(v)
    return f"{v:.6g}"


def check_value(where: str, key: str, value, rng: str | None = None) -> None:
    """Refuse ``value`` of ``key`` outside ``RANGES[rng or key-with-table]``.

    Parameters
    ----------
    where : str
        File and table, for the message.
    key : str
        The key as written in the profile (``radius_m``).
    value : float
    rng : str
        Entry of :data:`RANGES`.

    Raises
    ------
    InputError
        Outside the range, with the likely unit slip when one fits.
    """
    lo, hi, unit = RANGES[rng]
    v = float(value)
    if not math.isfinite(v):
        raise InputError(f"{where}: key '{key}' = {value} is not a finite number")
    if lo <= v <= hi:
        return
    slips = _SLIPS if unit == "m" else (_TIME_SLIPS if unit == "s" else ())
    fits = [f"{name}: {_fmt(v * f)}" for name, f in slips if lo <= v * f <= hi]
    if fits:
        base = "metres" if unit == "m" else "seconds"
        raise InputError(f"{where}: key '{key}' = {_fmt(v)} {unit} looks like "
                         f"{', or '.join(fits)}; write it in {base}")
    u = f" {unit}" if unit else ""
    raise InputError(f"{where}: key '{key}' = {_fmt(v)}{u} is outside the plausible range "
                     f"{_fmt(lo)} to {_fmt(hi)}{u} for a small robot and field; check it")


def check_robot(robot) -> None:
    """Plausibility of every length, count and scale of a robot profile."""
    where = str(robot.path or "robot profile")
    for key in ("length_m", "width_m", "height_m"):
        check_value(f"{where} [robot]", key, getattr(robot, key), f"robot.{key}")
    for i, m in enumerate(robot.markers):
        w = f"{where} [[marker]] #{i + 1}"
        for key in ("size_m", "x_m", "y_m", "z_m"):
            check_value(w, key, getattr(m, key), f"marker.{key}")
    columns: dict[str, str] = {}
    for i, wh in enumerate(robot.wheels):
        w = f"{where} [[wheel]] #{i + 1}"
        for key in ("x_m", "y_m", "radius_m", "ticks_per_rev", "gear_ratio"):
            check_value(w, key, getattr(wh, key), f"wheel.{key}")
        for col in (wh.column, wh.raw_a_column, wh.raw_b_column):
            if col is None:
                continue
            if col in columns and columns[col] != wh.name:
                raise InputError(f"{w}: wheels '{columns[col]}' and '{wh.name}' both read "
                                 f"column '{col}'; give each wheel its own log column")
            if col == robot.time_column:
                raise InputError(f"{w}: wheel '{wh.name}' reads the time column '{col}'; "
                                 "name the wheel's count column")
            columns[col] = wh.name
    if robot.imu is not None:
        if robot.imu.scale < 0:
            raise InputError(f"{where} [imu]: key 'scale' = {_fmt(robot.imu.scale)} is "
                             "negative; set sign = -1 for a heading that turns the other "
                             "way and keep scale near 1")
        check_value(f"{where} [imu]", "scale", robot.imu.scale, "imu.scale")
        if robot.imu.column in columns:
            raise InputError(f"{where} [imu]: column '{robot.imu.column}' is also read by "
                             f"wheel '{columns[robot.imu.column]}'; name the IMU heading "
                             "column")


def check_field(field) -> None:
    """Plausibility of the tile grid and floor markers; bounds the tile count."""
    where = f"{field.path or 'field profile'} [floor]"
    check_value(where, "tiles_x", field.tiles_x, "floor.tiles_x")
    check_value(where, "tiles_y", field.tiles_y, "floor.tiles_y")
    check_value(where, "tile_size_m", field.tile_size_m, "floor.tile_size_m")
    for key, n in (("tiles_x", field.tiles_x), ("tiles_y", field.tiles_y)):
        ext = n * field.tile_size_m
        lo, hi, _ = RANGES["floor.extent_m"]
        if not lo <= ext <= hi:
            raise InputError(f"{where}: {key} x tile_size_m = {_fmt(ext)} m is outside "
                             f"{_fmt(lo)} to {_fmt(hi)} m for a field; check both")
    for i, m in enumerate(field.floor_markers):
        check_value(f"{field.path or 'field profile'} [[floor_marker]] #{i + 1}", "size_m",
                    m.size_m, "floor_marker.size_m")


def check_camera(cam) -> None:
    """Plausibility of a camera profile: image size, principal point, readout, distortion."""
    where = f"{cam.path or 'camera profile'} [camera]"
    check_value(where, "width_px", cam.width_px, "camera.width_px")
    check_value(where, "height_px", cam.height_px, "camera.height_px")
    size = max(cam.width_px, cam.height_px)
    for key in ("fx_px", "fy_px"):
        v = getattr(cam, key)
        if not 0.05 * size <= v <= 50.0 * size:
            raise InputError(f"{where}: key '{key}' = {_fmt(v)} px is implausible for a "
                             f"{cam.width_px} x {cam.height_px} image (expected "
                             f"{_fmt(0.05 * size)} to {_fmt(50 * size)}); check the lens profile")
    for key, n in (("cx_px", cam.width_px), ("cy_px", cam.height_px)):
        v = getattr(cam, key)
        if not (math.isfinite(v) and -0.5 * n <= v <= 1.5 * n):
            raise InputError(f"{where}: key '{key}' = {_fmt(v)} px lies far outside the "
                             f"{cam.width_px} x {cam.height_px} image; check the lens profile")
    check_value(where, "readout_s", cam.readout_s, "camera.readout_s")
    for v in cam.distortion:
        check_value(where, "distortion", v, "camera.distortion")

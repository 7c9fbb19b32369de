"""Robot, field and camera profiles: the TOML files a team writes once.

Every value in a profile carries its unit in its key (``radius_m``, ``direction_deg``).
Angles are written in degrees for people and held in radians inside. Reading is done
with the standard library's ``tomllib``; :func:`dump_toml` writes the small subset of
TOML these profiles use.

Frames (see DEVELOPERS.md):

* floor frame: origin at the field corner of tile (0, 0), x along ``tiles_x``, y along
  ``tiles_y``, z up; heading counter-clockwise from +x.
* body frame: origin at the robot reference point on the floor, x forward, y left.
* a marker's own frame: x to the right of its printed image, y towards its printed
  top, z out of its face. Its corners in OpenCV's order (top-left, top-right,
  bottom-right, bottom-left) sit at ``(-s, s), (s, s), (s, -s), (-s, -s)`` with
  ``s = size_m / 2``; see :func:`marker_corners_local`.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = [
    "Wheel",
    "Imu",
    "PoseColumns",
    "Source",
    "Marker",
    "RobotProfile",
    "FloorMarker",
    "FieldProfile",
    "CameraProfile",
    "load_robot",
    "parse_start_tile",
    "load_field",
    "load_camera",
    "dump_toml",
    "marker_corners_local",
    "TIME_UNITS_S",
    "robot_to_dict",
    "field_to_dict",
    "camera_to_dict",
]

TIME_UNITS_S = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}
LENGTH_UNITS_M = {"m": 1.0, "mm": 1e-3, "cm": 1e-2, "in": 0.0254, "ft": 0.3048}
ANGLE_UNITS_RAD = {"rad": 1.0, "deg": math.pi / 180.0}


def marker_corners_local(size_m):
    """Corners of a square marker in its own frame, in OpenCV's detection order.

    Parameters
    ----------
    size_m : float
        Side of the marker's black square [m].

    Returns
    -------
    ndarray of shape (4, 2)
        Top-left, top-right, bottom-right, bottom-left [m].
    """
    s = size_m / 2.0
    return np.array([[-s, s], [s, s], [s, -s], [-s, -s]], dtype=float)


# --------------------------------------------------------------------------- robot
@dataclass(frozen=True)
class Wheel:
    """One encoder wheel, powered or not, in the single wheel model.

    The wheel reads the velocity of its contact point projected on its rolling
    direction, corrected for the angle of its free rollers (Lynch & Park, *Modern
    Robotics*, 2017, eq. 13.6 form): rim speed
    ``s = d . v_c + tan(roller) * d_perp . v_c``.
    """

    name: str
    """Name used in reports and source definitions."""
    column: str | None
    """Log column holding cumulative ticks (None when raw channels are logged)."""
    x_m: float
    """Contact point, body frame, forward [m]."""
    y_m: float
    """Contact point, body frame, left [m]."""
    direction_rad: float
    """Rolling direction in the body frame, counter-clockwise from body +x [rad]."""
    radius_m: float
    """Wheel radius [m]."""
    ticks_per_rev: float
    """Encoder counts per encoder-shaft revolution [ticks]."""
    roller_rad: float = 0.0
    """Free-roller angle: 0 for plain and omni wheels, +-pi/4 for mecanum [rad]."""
    gear_ratio: float = 1.0
    """Encoder-shaft revolutions per wheel revolution (encoder turns per wheel turn: 19.2
    for an encoder on the motor of a 19.2:1 gearbox; 1 for an encoder on the axle)."""
    sign: int = 1
    """+1 if counts rise when the wheel rolls along ``direction``; else -1."""
    counter_bits: int = 32
    """Width of the counter that wraps around (16 or 32); 0 for no wrap."""
    powered: bool = True
    """True for a driven wheel, False for an unpowered tracking wheel."""
    raw_a_column: str | None = None
    """Log column of raw channel A for home-built quadrature encoders."""
    raw_b_column: str | None = None
    """Log column of raw channel B."""
    raw_threshold: float | None = None
    """Reflectance threshold for raw channels (None: from the histogram)."""

    @property
    def metres_per_tick(self) -> float:
        """Rim travel per count [m]."""
        return 2.0 * math.pi * self.radius_m / (self.ticks_per_rev * self.gear_ratio)


@dataclass(frozen=True)
class Imu:
    """Heading from an IMU, as logged."""

    column: str
    unit: str = "deg"
    """Unit of the logged heading: 'deg' or 'rad'."""
    wrapped: bool = True
    """True if the logged heading wraps (to +-180 deg or 0..360 deg)."""
    scale: float = 1.0
    """Factor applied to the logged heading change (gyro scale)."""
    sign: int = 1
    """+1 if the logged heading rises counter-clockwise seen from above."""
    bias_radps: float = 0.0
    """Drift rate of the logged heading (gyro bias), subtracted after scale and sign:
    heading = sign * (h0 + scale * (h - h0)) - bias * (t - t0) [rad/s]. TOML key
    ``bias_radps`` or ``bias_dps`` [deg/s]; ``vidodo tune`` fits it."""


@dataclass(frozen=True)
class PoseColumns:
    """The robot's own pose estimate, when it logs one."""

    x_column: str
    y_column: str
    heading_column: str
    length_unit: str = "m"
    angle_unit: str = "deg"


@dataclass(frozen=True)
class Source:
    """One named odometry source: a group of wheels, optionally with IMU heading."""

    name: str
    wheels: tuple[str, ...]
    heading: str = "wheels"
    """'wheels': heading from the wheels; 'imu': heading rate from the IMU."""
    no_sideways: bool = False
    """Constrain sideways body velocity to zero (tank and differential drives)."""


@dataclass(frozen=True)
class Marker:
    """A fiducial marker on the robot (body frame)."""

    id: int
    family: str
    """cv2.aruco predefined dictionary name, e.g. 'DICT_4X4_50' or 'DICT_APRILTAG_36h11'."""
    size_m: float
    """Side of the black square [m]."""
    x_m: float = 0.0
    y_m: float = 0.0
    z_m: float = 0.0
    """Height of the marker face above the floor [m]."""
    yaw_rad: float = 0.0
    """Marker x axis relative to body +x [rad]."""


@dataclass(frozen=True)
class RobotProfile:
    """Everything vidodo needs to know about one robot and its log."""

    name: str
    length_m: float
    width_m: float
    height_m: float
    markers: tuple[Marker, ...]
    wheels: tuple[Wheel, ...]
    time_column: str
    time_unit: str = "s"
    imu: Imu | None = None
    pose: PoseColumns | None = None
    sources: tuple[Source, ...] = ()
    path: Path | None = field(default=None, compare=False)

    def wheel(self, name: str) -> Wheel:
        """The wheel called ``name``."""
        for w in self.wheels:
            if w.name == name:
                return w
        raise InputError(
            f"{self.path or 'robot profile'}: no wheel named {name!r}; "
            f"wheels are {[w.name for w in self.wheels]}"
        )

    def resolved_sources(self) -> tuple[Source, ...]:
        """The sources listed in the profile, or sensible defaults.

        Defaults: 'drive' (all powered wheels, no sideways motion if they are all
        parallel plain wheels), 'tracking' (all unpowered wheels) and
        'tracking+imu' when an IMU is present.
        """
        if self.sources:
            return self.sources
        out = []
        drive = [w for w in self.wheels if w.powered]
        pods = [w for w in self.wheels if not w.powered]
        if drive:
            plain = all(abs(w.roller_rad) < 1e-9 for w in drive)
            dirs = {round(math.sin(w.direction_rad), 9) for w in drive}
            out.append(Source("drive", tuple(w.name for w in drive), "wheels",
                              no_sideways=plain and len(dirs) == 1))
        if pods:
            out.append(Source("tracking", tuple(w.name for w in pods), "wheels"))
            if self.imu is not None:
                out.append(Source("tracking+imu", tuple(w.name for w in pods), "imu"))
        return tuple(out)


# --------------------------------------------------------------------------- field
@dataclass(frozen=True)
class FloorMarker:
    """A fiducial lying flat on the floor at a surveyed spot."""

    id: int
    family: str
    size_m: float
    x_m: float
    y_m: float
    yaw_rad: float = 0.0

    def corners_floor_m(self):
        """Floor coordinates of the corners, OpenCV order, ndarray of shape (4, 2) [m]."""
        loc = marker_corners_local(self.size_m)
        c, s = math.cos(self.yaw_rad), math.sin(self.yaw_rad)
        rot = np.array([[c, -s], [s, c]])
        return loc @ rot.T + np.array([self.x_m, self.y_m])


@dataclass(frozen=True)
class FieldProfile:
    """The floor: a grid of square tiles and optional floor fiducials."""

    tiles_x: int
    tiles_y: int
    tile_size_m: float
    origin_hint: str = "near-left"
    """Which field corner (as seen from the camera) is the floor origin, for the
    automatic tile grid: 'near-left', 'near-right', 'far-left' or 'far-right'."""
    floor_markers: tuple[FloorMarker, ...] = ()
    path: Path | None = field(default=None, compare=False)
    start_tile: tuple[int, int] | None = None
    """The tile the robot starts on, ``(i, j)`` counted from 0 along x and y (tile i
    spans ``i * tile_size_m`` to ``(i + 1) * tile_size_m``); fixes the field's place in
    the tile pattern when its origin is out of view."""

    @property
    def size_m(self) -> tuple[float, float]:
        """Field extent along x and y [m]."""
        return self.tiles_x * self.tile_size_m, self.tiles_y * self.tile_size_m

    def tile_corners_m(self):
        """Every tile corner of the field, ndarray of shape ((tx+1)*(ty+1), 2) [m]."""
        gx, gy = np.meshgrid(np.arange(self.tiles_x + 1), np.arange(self.tiles_y + 1))
        return np.column_stack([gx.ravel(), gy.ravel()]).astype(float) * self.tile_size_m


# -------------------------------------------------------------------------- camera
@dataclass(frozen=True)
class CameraProfile:
    """Lens intrinsics, distortion (OpenCV order) and rolling-shutter readout time."""

    width_px: int
    height_px: int
    fx_px: float
    fy_px: float
    cx_px: float
    cy_px: float
    distortion: tuple[float, ...] = (0.0, 0.0, 0.0, 0.0, 0.0)
    """k1, k2, p1, p2, k3 (OpenCV order)."""
    readout_s: float = 0.0
    """Time from reading the top sensor row to the bottom one [s]."""
    path: Path | None = field(default=None, compare=False)

    @property
    def matrix(self):
        """Camera matrix K, ndarray of shape (3, 3) [px]."""
        return np.array(
            [[self.fx_px, 0.0, self.cx_px], [0.0, self.fy_px, self.cy_px], [0.0, 0.0, 1.0]]
        )

    @property
    def dist_coeffs(self):
        """Distortion coefficients as OpenCV wants them, ndarray of shape (N,)."""
        return np.asarray(self.distortion, dtype=float)


# ------------------------------------------------------------------------- loading
class _Seen(dict):
    """A TOML table that remembers which keys the loader asked for."""

    def __init__(self, *args):
        super().__init__(*args)
        self.seen: set = set()

    def get(self, key, default=None):
        self.seen.add(key)
        return super().get(key, default)

    def __getitem__(self, key):
        self.seen.add(key)
        return super().__getitem__(key)


def _tracked(value):
    if isinstance(value, dict):
        return _Seen({k: _tracked(v) for k, v in value.items()})
    if isinstance(value, list):
        return [_tracked(v) for v in value]
    return value


ROBOT_TABLES = ("robot", "log", "marker", "wheel", "imu", "pose", "source")
FIELD_TABLES = ("floor", "floor_marker")
CAMERA_TABLES = ("camera",)


def reject_unknown_tables(data, where: str, known) -> None:
    """Refuse a top-level table the profile kind does not have, before reading any.

    Raises
    ------
    InputError
        Naming the table, with a "did you mean".
    """
    for key in data:
        if key not in known:
            close = difflib.get_close_matches(str(key), known, n=1, cutoff=0.6)
            hint = f"did you mean '{close[0]}'?" if close else \
                f"tables are {', '.join(known)}"
            raise InputError(f"{where}: unknown key '{key}'; {hint}")


def reject_unknown_keys(data, where: str, *, top: bool = True) -> None:
    """Refuse any key of a loaded profile that the loader never asked for.

    A misspelt key would otherwise be ignored and its default used (``gear_raito = 2``
    grading with gear ratio 1), so the message suggests the closest known key.

    Raises
    ------
    InputError
        Naming the file, the table and the unknown key, with a "did you mean".
    """
    if not isinstance(data, _Seen):
        return
    for key in data:
        if key not in data.seen:
            close = difflib.get_close_matches(str(key), sorted(map(str, data.seen)), n=1,
                                              cutoff=0.6)
            hint = f"did you mean '{close[0]}'?" if close else (
                f"known keys here: {', '.join(sorted(map(str, data.seen))) or 'none'}")
            raise InputError(f"{where}: unknown key '{key}'; {hint}")
        value = dict.get(data, key)
        if isinstance(value, dict):
            reject_unknown_keys(value, f"{where} [{key}]" if top else f"{where}.{key}",
                                top=False)
        elif isinstance(value, list):
            for i, item in enumerate(value):
                reject_unknown_keys(item, f"{where} [[{key}]] #{i + 1}" if top
                                    else f"{where}.{key}[{i}]", top=False)


class TomlTable:
    """Reads typed values out of one TOML table and names the key on error."""

    def __init__(self, data: dict, where: str):
        self.data = data if isinstance(data, dict) else {}
        self.where = where
        if not isinstance(data, dict):
            raise InputError(f"{where}: expected a table; check the profile's layout")

    def get(self, key, kind=float, default=...):
        self.data.get(key)  # marks the key as known (see reject_unknown_keys)
        if key not in self.data:
            if default is ...:
                close = difflib.get_close_matches(key, [str(k) for k in self.data], n=1)
                hint = f" ('{close[0]}' is there: a misspelling?)" if close else ""
                raise InputError(f"{self.where}: missing key '{key}'{hint}; add it to the "
                                 "profile")
            return default
        value = self.data[key]
        try:
            if kind is float:
                if isinstance(value, bool):
                    raise TypeError
                value = float(value)
                if not math.isfinite(value):
                    raise ValueError
            elif kind is int:
                if isinstance(value, bool) or float(value) != int(value):
                    raise TypeError
                value = int(value)
            elif kind is bool:
                if not isinstance(value, bool):
                    raise TypeError
            elif kind is str:
                if not isinstance(value, str):
                    raise TypeError
        except (TypeError, ValueError):
            raise InputError(
                f"{self.where}: key '{key}' = {value!r} is not a valid {kind.__name__}"
            ) from None
        return value

    def angle(self, key, default=...):
        """Read ``key`` given in degrees (key ends in _deg) and return radians."""
        value = self.get(key, float, default)
        return math.radians(value) if value is not None else None

    def choice(self, key, options, default=...):
        value = self.get(key, str, default)
        if value not in options:
            raise InputError(
                f"{self.where}: key '{key}' = {value!r}; use one of {sorted(options)}"
            )
        return value

    def positive(self, key, default=...):
        value = self.get(key, float, default)
        if value is not None and value <= 0:
            raise InputError(f"{self.where}: key '{key}' must be positive, got {value}")
        return value


def read_toml(path) -> tuple[dict, Path]:
    p = Path(path)
    try:
        with open(p, "rb") as fh:
            return _tracked(tomllib.load(fh)), p
    except FileNotFoundError:
        raise InputError(f"{p}: file not found; check the path") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{p}: not valid TOML ({exc}); fix the syntax") from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read ({exc.strerror})") from None


def _list_of_tables(data, key, where):
    items = data.get(key, [])
    if not isinstance(items, list):
        raise InputError(f"{where}: '{key}' must be an array of tables ([[{key}]])")
    return [TomlTable(it, f"{where} [[{key}]] #{i + 1}") for i, it in enumerate(items)]


def _marker(t: TomlTable, cls):
    kw = dict(
        id=t.get("id", int),
        family=t.get("family", str, "DICT_4X4_50"),
        size_m=t.positive("size_m"),
        x_m=t.get("x_m", float, 0.0),
        y_m=t.get("y_m", float, 0.0),
        yaw_rad=t.angle("yaw_deg", 0.0),
    )
    if cls is Marker:
        kw["z_m"] = t.get("z_m", float, 0.0)
    return cls(**kw)


def _wheel(t: TomlTable) -> Wheel:
    """One [[wheel]] table."""
    column = t.get("column", str, None)
    raw_a = t.get("raw_a_column", str, None)
    raw_b = t.get("raw_b_column", str, None)
    if column is None and (raw_a is None or raw_b is None):
        raise InputError(
            f"{t.where}: give 'column' (cumulative ticks) or both 'raw_a_column' "
            "and 'raw_b_column'"
        )
    sign = t.get("sign", int, 1)
    if sign not in (1, -1):
        raise InputError(f"{t.where}: key 'sign' must be 1 or -1, got {sign}")
    bits = t.get("counter_bits", int, 32)
    if bits not in (0, 8, 16, 24, 32, 64):
        raise InputError(f"{t.where}: key 'counter_bits' must be 0, 16 or 32, got {bits}")
    return Wheel(
        name=t.get("name", str),
        column=column,
        x_m=t.get("x_m"),
        y_m=t.get("y_m"),
        direction_rad=t.angle("direction_deg", 0.0),
        radius_m=t.positive("radius_m"),
        ticks_per_rev=t.positive("ticks_per_rev"),
        roller_rad=t.angle("roller_deg", 0.0),
        # encoder (shaft) turns per wheel turn, > 1 for an encoder on the motor
        # side of a reduction gearbox (metres per tick = 2 pi r / (ticks * ratio))
        gear_ratio=t.positive("gear_ratio", 1.0),
        sign=sign,
        counter_bits=bits,
        powered=t.get("powered", bool, True),
        raw_a_column=raw_a,
        raw_b_column=raw_b,
        raw_threshold=t.get("raw_threshold", float, None),
    )


def _load_profile(path, tables, build, check):
    """Read a profile (TOML): unknown tables refused, the profile made by
    ``build(data, path, where)``, unknown keys refused, the values checked by
    ``vidodo.plausible.<check>``."""
    data, p = read_toml(path)
    where = str(p)
    reject_unknown_tables(data, where, tables)
    prof = build(data, p, where)
    reject_unknown_keys(data, where)
    from . import plausible

    getattr(plausible, check)(prof)
    return prof


def load_robot(path) -> RobotProfile:
    """Read a robot profile (TOML): size, markers, wheels, IMU, odometry sources, log.

    Parameters
    ----------
    path : str or Path
        Tables [robot], [log], [[marker]], [[wheel]], optionally [imu] and [[source]];
        every key carries its unit (``radius_m``, ``direction_deg``).

    Returns
    -------
    RobotProfile
        Lengths in metres, angles in the file's ``_deg`` keys converted to radians.

    Raises
    ------
    InputError
        Naming the file, the table and the key that is missing or wrong; also for two
        wheels of one name, or a source naming a wheel or IMU the profile lacks.
    """
    return _load_profile(path, ROBOT_TABLES, _robot_from_toml, "check_robot")


def _robot_from_toml(data, p, where) -> RobotProfile:
    """:func:`load_robot` after reading: the tables of ``data`` into a RobotProfile."""
    robot = TomlTable(data.get("robot", {}), f"{where} [robot]")
    log = TomlTable(data.get("log", {}), f"{where} [log]")
    markers = tuple(_marker(t, Marker) for t in _list_of_tables(data, "marker", where))
    wheels = [_wheel(t) for t in _list_of_tables(data, "wheel", where)]
    names = [w.name for w in wheels]
    if len(set(names)) != len(names):
        raise InputError(f"{where}: wheel names must be unique, got {names}")
    imu = None
    if "imu" in data:
        t = TomlTable(data["imu"], f"{where} [imu]")
        sign = t.get("sign", int, 1)
        if sign not in (1, -1):
            raise InputError(f"{t.where}: key 'sign' must be 1 or -1, got {sign}")
        imu = Imu(
            column=t.get("column", str),
            unit=t.choice("unit", ANGLE_UNITS_RAD, "deg"),
            wrapped=t.get("wrapped", bool, True),
            scale=t.get("scale", float, 1.0),
            sign=sign,
            bias_radps=_imu_bias(t),
        )
    pose = None
    if "pose" in data:
        t = TomlTable(data["pose"], f"{where} [pose]")
        pose = PoseColumns(
            x_column=t.get("x_column", str),
            y_column=t.get("y_column", str),
            heading_column=t.get("heading_column", str),
            length_unit=t.choice("length_unit", LENGTH_UNITS_M, "m"),
            angle_unit=t.choice("angle_unit", ANGLE_UNITS_RAD, "deg"),
        )
    sources = []
    for t in _list_of_tables(data, "source", where):
        ws = t.data.get("wheels", [])
        if not isinstance(ws, list) or not all(isinstance(w, str) for w in ws):
            raise InputError(f"{t.where}: 'wheels' must be a list of wheel names")
        for w in ws:
            if w not in names:
                raise InputError(f"{t.where}: no wheel named {w!r}; wheels are {names}")
        sources.append(
            Source(
                name=t.get("name", str),
                wheels=tuple(ws),
                heading=t.choice("heading", {"wheels", "imu"}, "wheels"),
                no_sideways=t.get("no_sideways", bool, False),
            )
        )
        if sources[-1].heading == "imu" and imu is None:
            raise InputError(f"{t.where}: heading = 'imu' but the profile has no [imu] table")
    return RobotProfile(
        name=robot.get("name", str, p.stem),
        length_m=robot.positive("length_m", 0.45),
        width_m=robot.positive("width_m", 0.45),
        height_m=robot.positive("height_m", 0.3),
        markers=markers,
        wheels=tuple(wheels),
        time_column=log.get("time_column", str),
        time_unit=log.choice("time_unit", TIME_UNITS_S, "s"),
        imu=imu,
        pose=pose,
        sources=tuple(sources),
        path=p,
    )


def load_field(path) -> FieldProfile:
    """Read a field profile (TOML): the tiled floor and its fiducials.

    Parameters
    ----------
    path : str or Path
        Table [floor] (tile counts, ``tile_size_m``, origin hint, start tile), optionally
        [[floor_marker]] tables.

    Returns
    -------
    FieldProfile
        Tile size and fiducial positions in metres.

    Raises
    ------
    InputError
        Naming the file and the key that is missing or wrong, or a start tile outside
        the field.
    """
    return _load_profile(path, FIELD_TABLES, _field_from_toml, "check_field")


def _field_from_toml(data, p, where) -> FieldProfile:
    """:func:`load_field` after reading: [floor] and [[floor_marker]] of ``data``."""
    floor = TomlTable(data.get("floor", {}), f"{where} [floor]")
    tiles_x = floor.get("tiles_x", int)
    tiles_y = floor.get("tiles_y", int)
    if tiles_x < 1 or tiles_y < 1:
        raise InputError(f"{where} [floor]: tiles_x and tiles_y must be at least 1")
    markers = tuple(
        _marker(t, FloorMarker) for t in _list_of_tables(data, "floor_marker", where)
    )
    start = floor.data.get("start_tile")
    if start is not None:
        start = parse_start_tile(start, tiles_x, tiles_y, f"{where} [floor] start_tile")
    return FieldProfile(
        tiles_x=tiles_x,
        tiles_y=tiles_y,
        tile_size_m=floor.positive("tile_size_m"),
        origin_hint=floor.choice(
            "origin_hint", {"near-left", "near-right", "far-left", "far-right"}, "near-left"
        ),
        floor_markers=markers,
        path=p,
        start_tile=start,
    )


def parse_start_tile(value, tiles_x, tiles_y, where) -> tuple[int, int]:
    """A start tile ``[i, j]`` (or ``"i,j"``) checked against the field's tile counts.

    Raises
    ------
    InputError
        Not two whole numbers, or a tile outside the field.
    """
    if isinstance(value, str):
        value = value.split(",")
    try:
        i, j = (int(str(v).strip()) for v in value)
    except (TypeError, ValueError):
        raise InputError(f"{where}: give the start tile as two whole numbers i, j "
                         f"(got {value!r})") from None
    if not (0 <= i < tiles_x and 0 <= j < tiles_y):
        raise InputError(f"{where}: tile ({i}, {j}) is outside the field's {tiles_x} x "
                         f"{tiles_y} tiles (counted from 0)")
    return i, j


def load_camera(path) -> CameraProfile:
    """Read a camera profile (TOML), as ``vidodo lens`` writes it.

    Parameters
    ----------
    path : str or Path
        Table [camera]: image size and intrinsics in pixels (``fx_px``...), OpenCV
        ``distortion`` terms, rolling-shutter ``readout_s``.

    Returns
    -------
    CameraProfile
        Focal lengths and principal point in pixels, readout time in seconds.

    Raises
    ------
    InputError
        Naming the file and the key that is missing or wrong.
    """
    return _load_profile(path, CAMERA_TABLES, _camera_from_toml, "check_camera")


def _camera_from_toml(data, p, where) -> CameraProfile:
    """:func:`load_camera` after reading: [camera] of ``data``."""
    t = TomlTable(data.get("camera", {}), f"{where} [camera]")
    dist = t.data.get("distortion", [0.0, 0.0, 0.0, 0.0, 0.0])
    if not isinstance(dist, list) or not all(
        isinstance(v, int | float) and not isinstance(v, bool) for v in dist
    ) or len(dist) not in (4, 5, 8, 12, 14):
        raise InputError(
            f"{where} [camera]: 'distortion' must be a list of 4, 5, 8, 12 or 14 numbers "
            "(k1, k2, p1, p2[, k3, ...], OpenCV order)"
        )
    return CameraProfile(
        width_px=t.get("width_px", int),
        height_px=t.get("height_px", int),
        fx_px=t.positive("fx_px"),
        fy_px=t.positive("fy_px"),
        cx_px=t.get("cx_px"),
        cy_px=t.get("cy_px"),
        distortion=tuple(float(v) for v in dist),
        readout_s=t.get("readout_s", float, 0.0),
        path=p,
    )


# ------------------------------------------------------------------------- writing
def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"cannot write non-finite number {v} to TOML")
        return repr(float(v))
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, np.generic):
        return _toml_value(v.item())
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def dump_toml(data: dict, header: str = "") -> str:
    """Write nested dicts as TOML text.

    Top-level keys map to scalars, tables (dict) or arrays of tables (list of dict).
    ``None`` values are left out.
    """
    lines = [f"# {ln}" if ln else "#" for ln in header.splitlines()]
    scalars = {k: v for k, v in data.items() if not isinstance(v, dict | list) or (
        isinstance(v, list) and not (v and isinstance(v[0], dict)))}
    for k, v in scalars.items():
        if v is not None:
            lines.append(f"{k} = {_toml_value(v)}")
    for k, v in data.items():
        if isinstance(v, dict):
            lines.append(f"\n[{k}]")
            lines += [f"{kk} = {_toml_value(vv)}" for kk, vv in v.items() if vv is not None]
        elif isinstance(v, list) and v and isinstance(v[0], dict):
            for item in v:
                lines.append(f"\n[[{k}]]")
                lines += [f"{kk} = {_toml_value(vv)}" for kk, vv in item.items() if vv is not None]
    return "\n".join(lines).lstrip("\n") + "\n"


def _imu_bias(t) -> float:
    """The [imu] drift rate from ``bias_radps`` or ``bias_dps`` (not both) [rad/s]."""
    if "bias_radps" in t.data and "bias_dps" in t.data:
        raise InputError(f"{t.where}: give the IMU bias once, as bias_radps or bias_dps")
    if "bias_dps" in t.data:
        return math.radians(t.get("bias_dps", float, 0.0))
    return t.get("bias_radps", float, 0.0)


def robot_to_dict(robot: RobotProfile) -> dict:
    """The TOML layout of a robot profile (inverse of :func:`load_robot`)."""
    d: dict = {
        "robot": {"name": robot.name, "length_m": robot.length_m, "width_m": robot.width_m,
                  "height_m": robot.height_m},
        "log": {"time_column": robot.time_column, "time_unit": robot.time_unit},
        "marker": [
            {"id": m.id, "family": m.family, "size_m": m.size_m, "x_m": m.x_m, "y_m": m.y_m,
             "z_m": m.z_m, "yaw_deg": math.degrees(m.yaw_rad)}
            for m in robot.markers
        ],
        "wheel": [
            {f.name.removesuffix("_rad") + "_deg" if f.name.endswith("_rad") else f.name:
             (math.degrees(getattr(w, f.name)) if f.name.endswith("_rad")
              else getattr(w, f.name))
             for f in fields(Wheel)}
            for w in robot.wheels
        ],
    }
    if robot.imu is not None:
        d["imu"] = {f.name: getattr(robot.imu, f.name) for f in fields(Imu)}
    if robot.pose is not None:
        d["pose"] = {f.name: getattr(robot.pose, f.name) for f in fields(PoseColumns)}
    if robot.sources:
        d["source"] = [
            {"name": s.name, "wheels": list(s.wheels), "heading": s.heading,
             "no_sideways": s.no_sideways}
            for s in robot.sources
        ]
    return d


def field_to_dict(fp: FieldProfile) -> dict:
    """The TOML layout of a field profile (inverse of :func:`load_field`)."""
    d: dict = {"floor": {"tiles_x": fp.tiles_x, "tiles_y": fp.tiles_y,
                         "tile_size_m": fp.tile_size_m, "origin_hint": fp.origin_hint}}
    if fp.floor_markers:
        d["floor_marker"] = [
            {"id": m.id, "family": m.family, "size_m": m.size_m, "x_m": m.x_m, "y_m": m.y_m,
             "yaw_deg": math.degrees(m.yaw_rad)}
            for m in fp.floor_markers
        ]
    return d


def camera_to_dict(cam: CameraProfile) -> dict:
    """The TOML layout of a camera profile (inverse of :func:`load_camera`)."""
    return {"camera": {"width_px": cam.width_px, "height_px": cam.height_px,
                       "fx_px": cam.fx_px, "fy_px": cam.fy_px, "cx_px": cam.cx_px,
                       "cy_px": cam.cy_px, "distortion": list(cam.distortion),
                       "readout_s": cam.readout_s}}

"""Scenario files: what the renderer films, how the robot drives, what goes wrong.

A scenario is a TOML file of our own with one level of tables (so it can be written
back with :func:`vidodo.profiles.dump_toml`). Every key carries its unit; angles are
given in degrees and held in radians inside. Built-in scenarios live in
``vidodo/synth/scenarios/`` and are loaded by name (``load_scenario("default")``).

Layout (defaults in brackets)::

    name = "default"                  # also a free "description" string
    [video]
    width_px, height_px [1280, 720]   # image size
    fps [30.0]                        # nominal frame rate
    codec ["h264"]                    # h264 | hevc | mpeg4
    crf [18]                          # encoder quality (lower is better)
    variable_timing [false]           # true: per-frame time jitter and dropped frames
    timing_jitter_s [0.0]             # 1-sigma of each frame's time shift (clipped)
    drop_probability [0.0]            # chance that a frame slot is skipped
    exposure_s [0.006]                # shutter time (motion blur)
    noise [2.0]                       # sensor noise, 1-sigma [grey levels]
    lead_in_s [1.0], tail_s [1.0]     # still time before and after the path
    max_duration_s [none]             # cut the run short (tests)
    [camera]
    mount ["tripod"]                  # tripod | handheld (slow sway)
    x_m, y_m, z_m                     # lens centre, floor frame; z 1.2-2.5 m
    look_at_x_m, look_at_y_m, look_at_z_m   # the point on the optical axis
    hfov_deg [68] or focal_px         # horizontal field of view, or focal length
    distortion [0,0,0,0,0]            # k1, k2, p1, p2, k3 (OpenCV order)
    readout_s [0.0]                   # rolling-shutter top-to-bottom readout
    roll_deg [0.0]                    # turn about the optical axis (180: upside down)
    sway_deg [0.4], sway_m [0.01], sway_period_s [5.0]   # handheld only
    [field]
    tiles_x, tiles_y [6, 6]; tile_size_m [0.6096]  (24 in foam tiles, common practice)
    origin_hint ["near-left"]; texture_seed [0]
    [[floor_marker]]                  # optional fiducials lying flat, surveyed
    family, id, size_m, x_m, y_m, yaw_deg
    [robot]
    name, length_m, width_m, height_m # the box
    start_x_m, start_y_m, start_heading_deg
    [[marker]]                        # one or more, on the robot
    family ["DICT_4X4_50"], id, size_m, x_m, y_m, z_m (height), yaw_deg
    [drivetrain]
    kind ["tank"]                     # tank | mecanum
    track_m                           # left-right wheel spacing
    wheelbase_m                       # front-rear spacing (mecanum)
    wheel_radius_m, ticks_per_rev, gear_ratio [1.0], counter_bits [32]
    signs [all 1]                     # per wheel: left, right | fl, fr, rl, rr
    [tracking]
    layout ["none"]                   # three | two+imu | none
    radius_m, ticks_per_rev, counter_bits [32], signs [all 1]
    parallel_x_m [0.0]                # forward offset of the parallel wheel(s)
    left_y_m, right_y_m               # lateral offsets of the parallel wheels
    perpendicular_x_m, perpendicular_y_m [0.0]   # the sideways wheel
    [imu]
    enabled [false]
    bias_dps [0.0]                    # initial gyro bias
    bias_walk_dps_per_sqrt_s [0.0]    # bias random walk
    noise_deg [0.0]                   # white noise on each heading reading
    scale_error [0.0]                 # fraction, e.g. 0.003 reads 0.3 % too much turn
    [log]
    rate_hz [100]; jitter_s [0.0]     # sample period jitter, 1-sigma (clipped)
    clock_offset_s [0.0]              # t_video = t_log / (1 + rate_error) + offset
    clock_rate_error [0.0]            # t_log = (t_video - offset) * (1 + rate_error)
    time_unit ["s"], time_column ["t"]
    logs_pose [false]; pose_source ["tracking+imu"]; pose_length_unit ["m"]
    pose_angle_unit ["deg"]
    [path]
    max_speed_mps, max_accel_mps2, max_turn_rate_dps, max_turn_accel_dps2
    [[segment]]                       # in order, each from where the last one ended
    kind = "drive"   x_m, y_m         # turn to face the point, then drive to it
    kind = "turn"    heading_deg      # turn in place to a floor heading
    kind = "strafe"  x_m, y_m         # mecanum: slide to the point, heading kept
    kind = "arc"     radius_m, angle_deg   # forward arc, + turns left
    kind = "wait"    duration_s
    [[profile_error]]                 # optional: the written robot.toml is wrong here
    part, key, value                  # part: a wheel name or "imu"; key: a wheel field
                                      # (x_m, y_m, direction_deg, radius_m, ticks_per_rev,
                                      # gear_ratio, sign) or the IMU's "scale"
    [[fault]]                         # when: segment (0-based) + at_s, or t_s (video)
    kind = "impact"   duration_s, decel_mps2 [15], recover_s [0.15]
        the body stalls against an obstacle while the drive wheels keep turning
    kind = "shove"    duration_s, dx_m, dy_m, dheading_deg (body frame)
        the body is pushed while the drive wheels are still (place it in a wait)
    kind = "pod_lift" wheel, duration_s
        one tracking wheel stops reading while the body moves
    kind = "imu_jump" magnitude_deg
        the IMU heading steps by magnitude_deg and stays offset

The sensors always follow the true robot; ``truth/odometry_ideal.csv`` integrates the
log with the true geometry, while ``robot.toml`` carries the ``[profile_error]`` values
(both written and true values go to ``truth/meta.json``).

Truth events (``truth/events.csv``) carry a magnitude per kind: ``impact`` the drive
wheel travel the body did not make [m]; ``shove`` the body displacement [m];
``pod_lift`` the rim travel the lifted wheel missed [m]; ``heading_jump`` the jump
[rad].
"""

from __future__ import annotations

import copy
import math
import tomllib
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

from ..errors import InputError
from ..profiles import (
    CameraProfile,
    FieldProfile,
    FloorMarker,
    Imu,
    Marker,
    PoseColumns,
    RobotProfile,
    Source,
    TomlTable,
    Wheel,
    read_toml,
)

__all__ = [
    "VideoSpec",
    "CameraSpec",
    "DrivetrainSpec",
    "TrackingSpec",
    "ImuSpec",
    "LogSpec",
    "PathLimits",
    "Segment",
    "Fault",
    "Scenario",
    "load_scenario",
    "scenario_names",
    "scenario_text",
    "apply_overrides",
    "FAULT_KINDS",
    "SEGMENT_KINDS",
]

SEGMENT_KINDS = ("drive", "turn", "strafe", "arc", "wait")
FAULT_KINDS = ("impact", "shove", "pod_lift", "imu_jump")
_TABLES = ("video", "camera", "field", "robot", "drivetrain", "tracking", "imu", "log",
           "path")
_ARRAYS = ("marker", "floor_marker", "segment", "fault", "profile_error")


@dataclass(frozen=True)
class VideoSpec:
    """Footage settings."""

    width_px: int
    height_px: int
    fps: float
    """Nominal frame rate [1/s]."""
    codec: str
    crf: int
    variable_timing: bool
    timing_jitter_s: float
    """1-sigma shift of each frame time when ``variable_timing`` [s]."""
    drop_probability: float
    exposure_s: float
    """Shutter time [s]."""
    noise_sigma: float
    """Sensor noise, 1-sigma [grey levels]."""
    lead_in_s: float
    """Still time before the path starts [s]."""
    tail_s: float
    """Still time after the path ends [s]."""
    max_duration_s: float | None
    """Cut the run at this video time [s] (None: the whole path)."""


@dataclass(frozen=True)
class CameraSpec:
    """Where the camera stands and how it sways."""

    mount: str
    """'tripod' or 'handheld'."""
    position_m: tuple[float, float, float]
    """Lens centre in the floor frame [m]."""
    look_at_m: tuple[float, float, float]
    """A point on the optical axis [m]."""
    focal_px: float
    """Focal length at the scenario's image width [px]."""
    distortion: tuple[float, ...]
    readout_s: float
    sway_rad: float
    """Handheld: amplitude of the angular sway [rad]."""
    sway_m: float
    """Handheld: amplitude of the positional sway [m]."""
    sway_period_s: float
    roll_rad: float = 0.0
    """Turn of the camera about its optical axis [rad] (0: image x level)."""


@dataclass(frozen=True)
class DrivetrainSpec:
    """Powered wheels."""

    kind: str
    """'tank' or 'mecanum'."""
    track_m: float
    wheelbase_m: float
    wheel_radius_m: float
    ticks_per_rev: float
    gear_ratio: float
    counter_bits: int
    signs: tuple[int, ...]


@dataclass(frozen=True)
class TrackingSpec:
    """Unpowered tracking wheels."""

    layout: str
    """'three', 'two+imu' or 'none'."""
    radius_m: float
    ticks_per_rev: float
    counter_bits: int
    signs: tuple[int, ...]
    parallel_x_m: float
    left_y_m: float
    right_y_m: float
    perpendicular_x_m: float
    perpendicular_y_m: float


@dataclass(frozen=True)
class ImuSpec:
    """Heading sensor errors."""

    enabled: bool
    bias_radps: float
    """Initial gyro bias [rad/s]."""
    bias_walk_radps_per_sqrt_s: float
    """Random walk of the bias [rad/s/sqrt(s)]."""
    noise_rad: float
    """White noise on each reading, 1-sigma [rad]."""
    scale_error: float
    """Relative gyro scale error (0.003: reads 0.3 % too much turn)."""


@dataclass(frozen=True)
class LogSpec:
    """The robot's log and its clock."""

    rate_hz: float
    jitter_s: float
    clock_offset_s: float
    """``t_video = t_log / (1 + rate_error) + offset`` [s]."""
    clock_rate_error: float
    time_unit: str
    time_column: str
    logs_pose: bool
    pose_source: str
    pose_length_unit: str
    pose_angle_unit: str


@dataclass(frozen=True)
class PathLimits:
    """Speed, acceleration and turn-rate limits of the planner."""

    max_speed_mps: float
    max_accel_mps2: float
    max_turn_rate_radps: float
    max_turn_accel_radps2: float


@dataclass(frozen=True)
class Segment:
    """One path segment; unused fields are NaN."""

    kind: str
    x_m: float = math.nan
    y_m: float = math.nan
    heading_rad: float = math.nan
    radius_m: float = math.nan
    angle_rad: float = math.nan
    duration_s: float = math.nan


@dataclass(frozen=True)
class Fault:
    """One injected fault."""

    kind: str
    segment: int | None
    """Index of the segment it happens in (None: ``at_s`` is a video time)."""
    at_s: float
    """Start, seconds after the segment starts (or video time) [s]."""
    duration_s: float = 0.0
    decel_mps2: float = 15.0
    recover_s: float = 0.15
    dx_m: float = 0.0
    dy_m: float = 0.0
    dheading_rad: float = 0.0
    wheel: str = ""
    magnitude_rad: float = 0.0


@dataclass(frozen=True)
class Scenario:
    """A complete scenario (see the module docstring for the file layout)."""

    name: str
    video: VideoSpec
    camera: CameraSpec
    field: FieldProfile
    texture_seed: int
    robot: RobotProfile
    start_pose: tuple[float, float, float]
    """Robot start ``(x_m, y_m, heading_rad)``."""
    drivetrain: DrivetrainSpec
    tracking: TrackingSpec
    imu: ImuSpec
    log: LogSpec
    limits: PathLimits
    segments: tuple[Segment, ...]
    faults: tuple[Fault, ...]
    written_robot: RobotProfile
    """The robot profile written to the run (``robot`` with ``[profile_error]`` applied)."""
    profile_errors: tuple[tuple[str, float, float], ...]
    """``(part.key, true value, written value)`` for every ``[[profile_error]]``."""
    data: dict
    """The TOML content after overrides (written as the run's scenario.toml)."""
    where: str
    """File the scenario came from (for messages)."""

    def camera_profile(self) -> CameraProfile:
        """The true lens as a camera profile (principal point at the image centre)."""
        v = self.video
        return CameraProfile(
            width_px=v.width_px, height_px=v.height_px,
            fx_px=self.camera.focal_px, fy_px=self.camera.focal_px,
            cx_px=(v.width_px - 1) / 2.0, cy_px=(v.height_px - 1) / 2.0,
            distortion=self.camera.distortion, readout_s=self.camera.readout_s,
        )

    def to_toml(self) -> str:
        """The scenario as TOML text (after overrides)."""
        from ..profiles import dump_toml

        return dump_toml(self.data, header=f"vidodo scenario '{self.name}'")


def scenario_text(sc: Scenario) -> str:
    """Canonical TOML text of a scenario after overrides (stable for cache keys)."""
    return sc.to_toml()


# ----------------------------------------------------------------------- loading
def scenario_names() -> list[str]:
    """Names of the built-in scenarios."""
    root = resources.files("vidodo.synth") / "scenarios"
    return sorted(p.name[:-5] for p in root.iterdir() if p.name.endswith(".toml"))


def _locate(path_or_name) -> Path:
    p = Path(path_or_name)
    if p.suffix == ".toml" or p.exists() or len(p.parts) > 1:
        return p
    res = resources.files("vidodo.synth") / "scenarios" / f"{p.name}.toml"
    if not res.is_file():
        raise InputError(
            f"scenario {str(path_or_name)!r}: no such file or built-in scenario; "
            f"built-ins are {scenario_names()}"
        )
    return Path(str(res))


def _parse_value(text):
    """A command-line override value: TOML syntax if it parses, else a plain string."""
    if not isinstance(text, str):
        return text
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def apply_overrides(data: dict, overrides: dict, where: str = "scenario") -> dict:
    """Return a copy of ``data`` with dotted keys replaced.

    Keys are ``"table.key"`` or ``"table__key"`` (``video__width_px=640``), or a
    top-level key; for arrays of tables use the index: ``"fault.0.at_s"``. A value
    of None removes the key.
    """
    out = copy.deepcopy(data)
    for key, value in overrides.items():
        parts = key.replace("__", ".").split(".")
        node = out
        for i, part in enumerate(parts[:-1]):
            if isinstance(node, list):
                try:
                    node = node[int(part)]
                    continue
                except (ValueError, IndexError):
                    raise InputError(
                        f"{where}: override {key!r}: no item {part!r} in "
                        f"'{'.'.join(parts[:i])}'"
                    ) from None
            node = node.setdefault(part, {})
            if not isinstance(node, dict | list):
                raise InputError(f"{where}: override {key!r}: '{part}' is not a table")
        last = parts[-1]
        if isinstance(node, list):
            raise InputError(f"{where}: override {key!r}: give a key after the item index")
        if value is None:
            node.pop(last, None)
        else:
            node[last] = _parse_value(value)
    return out


def load_scenario(path_or_name, **overrides) -> Scenario:
    """Read a scenario file or a built-in scenario by name.

    Parameters
    ----------
    path_or_name : str or Path
        A ``.toml`` path, or the name of a built-in scenario (``"default"``).
    **overrides
        Dotted or double-underscore keys replacing values, e.g.
        ``video__width_px=640`` or ``**{"video.fps": 60}``.

    Returns
    -------
    Scenario

    Raises
    ------
    InputError
        Naming the file, the table and the key that is missing or wrong.
    """
    p = _locate(path_or_name)
    data, p = read_toml(p)
    data = apply_overrides(data, overrides, str(p))
    return scenario_from_dict(data, str(p))


def _signs(t: TomlTable, n: int) -> tuple[int, ...]:
    signs = t.data.get("signs", [1] * n)
    if (not isinstance(signs, list) or len(signs) != n
            or any(s not in (1, -1) or isinstance(s, bool) for s in signs)):
        raise InputError(f"{t.where}: 'signs' must be a list of {n} values, each 1 or -1")
    return tuple(int(s) for s in signs)


def _bits(t: TomlTable) -> int:
    bits = t.get("counter_bits", int, 32)
    if bits not in (16, 32):
        raise InputError(f"{t.where}: 'counter_bits' must be 16 or 32, got {bits}")
    return bits


def _tables(data, key, where):
    items = data.get(key, [])
    if not isinstance(items, list):
        raise InputError(f"{where}: '{key}' must be an array of tables ([[{key}]])")
    return [TomlTable(it, f"{where} [[{key}]] #{i + 1}") for i, it in enumerate(items)]


def scenario_from_dict(data: dict, where: str = "scenario") -> Scenario:
    """Build a :class:`Scenario` from parsed TOML (see :func:`load_scenario`)."""
    for k, v in data.items():
        if k in _TABLES and not isinstance(v, dict):
            raise InputError(f"{where}: '{k}' must be a table ([{k}])")
        if k not in _TABLES + _ARRAYS + ("name", "description"):
            raise InputError(
                f"{where}: unknown key or table '{k}'; known: {sorted(_TABLES + _ARRAYS)}"
            )
    tab = {k: TomlTable(data.get(k, {}), f"{where} [{k}]") for k in _TABLES}
    video = _video(tab["video"])
    camera = _camera(tab["camera"], video)
    f = tab["field"]
    floor_markers = tuple(
        FloorMarker(id=t.get("id", int), family=t.get("family", str, "DICT_4X4_50"),
                    size_m=t.positive("size_m"), x_m=t.get("x_m"), y_m=t.get("y_m"),
                    yaw_rad=t.angle("yaw_deg", 0.0))
        for t in _tables(data, "floor_marker", where)
    )
    tiles_x, tiles_y = f.get("tiles_x", int, 6), f.get("tiles_y", int, 6)
    if tiles_x < 1 or tiles_y < 1:
        raise InputError(f"{f.where}: tiles_x and tiles_y must be at least 1")
    field_profile = FieldProfile(
        tiles_x=tiles_x, tiles_y=tiles_y, tile_size_m=f.positive("tile_size_m", 0.6096),
        origin_hint=f.choice("origin_hint",
                             {"near-left", "near-right", "far-left", "far-right"},
                             "near-left"),
        floor_markers=floor_markers,
    )
    drivetrain = _drivetrain(tab["drivetrain"])
    tracking = _tracking(tab["tracking"])
    imu = _imu(tab["imu"])
    log = _log(tab["log"])
    if tracking.layout == "two+imu" and not imu.enabled:
        raise InputError(f"{where} [tracking]: layout 'two+imu' needs [imu] enabled = true")
    r = tab["robot"]
    markers = tuple(
        Marker(id=t.get("id", int), family=t.get("family", str, "DICT_4X4_50"),
               size_m=t.positive("size_m"), x_m=t.get("x_m", float, 0.0),
               y_m=t.get("y_m", float, 0.0), z_m=t.get("z_m", float, 0.0),
               yaw_rad=t.angle("yaw_deg", 0.0))
        for t in _tables(data, "marker", where)
    )
    if not markers:
        raise InputError(f"{where}: the robot needs at least one [[marker]]")
    robot = _robot_profile(r, markers, drivetrain, tracking, imu, log, where)
    start = (r.get("start_x_m"), r.get("start_y_m"), r.angle("start_heading_deg", 0.0))
    p = tab["path"]
    limits = PathLimits(
        max_speed_mps=p.positive("max_speed_mps", 0.8),
        max_accel_mps2=p.positive("max_accel_mps2", 1.5),
        max_turn_rate_radps=math.radians(p.positive("max_turn_rate_dps", 180.0)),
        max_turn_accel_radps2=math.radians(p.positive("max_turn_accel_dps2", 540.0)),
    )
    segments = tuple(_segment(t, drivetrain) for t in _tables(data, "segment", where))
    if not segments:
        raise InputError(f"{where}: the path needs at least one [[segment]]")
    faults = tuple(_fault(t, len(segments), robot, imu) for t in _tables(data, "fault", where))
    written, errors = _profile_errors(_tables(data, "profile_error", where), robot)
    return Scenario(
        name=str(data.get("name", Path(where).stem)), video=video, camera=camera,
        field=field_profile, texture_seed=f.get("texture_seed", int, 0), robot=robot,
        start_pose=start, drivetrain=drivetrain, tracking=tracking, imu=imu, log=log,
        limits=limits, segments=segments, faults=faults, written_robot=written,
        profile_errors=errors, data=data, where=where,
    )


_WHEEL_ERROR_FIELDS = ("x_m", "y_m", "direction_deg", "radius_m", "ticks_per_rev",
                       "gear_ratio", "sign")


def _profile_errors(tables, robot: RobotProfile):
    """Apply ``[[profile_error]]`` entries to a copy of the robot profile."""
    from dataclasses import replace

    wheels = {w.name: w for w in robot.wheels}
    imu = robot.imu
    errors = []
    for t in tables:
        part, key = t.get("part", str), t.get("key", str)
        label = f"{part}.{key}"
        if part == "imu":
            if imu is None or key != "scale":
                raise InputError(f"{t.where}: part 'imu' takes key 'scale' and needs an IMU")
            value = t.get("value")
            errors.append((label, imu.scale, value))
            imu = replace(imu, scale=value)
            continue
        if part not in wheels or key not in _WHEEL_ERROR_FIELDS:
            raise InputError(
                f"{t.where}: part {part!r} key {key!r}: part must be 'imu' or a wheel in "
                f"{sorted(wheels)}, key one of {list(_WHEEL_ERROR_FIELDS)}"
            )
        w = wheels[part]
        if key == "sign":
            value = t.get("value", int)
            if value not in (1, -1):
                raise InputError(f"{t.where}: a sign must be 1 or -1, got {value}")
            errors.append((label, float(w.sign), float(value)))
            wheels[part] = replace(w, sign=value)
        elif key == "direction_deg":
            value = t.angle("value")
            errors.append((label, math.degrees(w.direction_rad), math.degrees(value)))
            wheels[part] = replace(w, direction_rad=value)
        else:
            value = t.positive("value") if key in ("radius_m", "ticks_per_rev", "gear_ratio") \
                else t.get("value")
            errors.append((label, float(getattr(w, key)), value))
            wheels[part] = replace(w, **{key: value})
    written = replace(robot, wheels=tuple(wheels[w.name] for w in robot.wheels), imu=imu)
    return written, tuple(errors)


def _video(t: TomlTable) -> VideoSpec:
    w, h = t.get("width_px", int, 1280), t.get("height_px", int, 720)
    if w < 16 or h < 16 or w % 2 or h % 2:
        raise InputError(f"{t.where}: width_px and height_px must be even and >= 16")
    jitter = t.get("timing_jitter_s", float, 0.0)
    drop = t.get("drop_probability", float, 0.0)
    if jitter < 0 or not 0 <= drop < 0.5:
        raise InputError(f"{t.where}: timing_jitter_s >= 0 and 0 <= drop_probability < 0.5")
    return VideoSpec(
        width_px=w, height_px=h, fps=t.positive("fps", 30.0),
        codec=t.choice("codec", {"h264", "hevc", "mpeg4"}, "h264"),
        crf=t.get("crf", int, 18), variable_timing=t.get("variable_timing", bool, False),
        timing_jitter_s=jitter, drop_probability=drop,
        exposure_s=t.get("exposure_s", float, 0.006), noise_sigma=t.get("noise", float, 2.0),
        lead_in_s=t.get("lead_in_s", float, 1.0), tail_s=t.get("tail_s", float, 1.0),
        max_duration_s=t.positive("max_duration_s", None),
    )


def _camera(t: TomlTable, video: VideoSpec) -> CameraSpec:
    pos = (t.get("x_m"), t.get("y_m"), t.get("z_m"))
    look = (t.get("look_at_x_m"), t.get("look_at_y_m"), t.get("look_at_z_m", float, 0.0))
    if "focal_px" in t.data:
        focal = t.positive("focal_px")
    else:
        hfov = t.get("hfov_deg", float, 68.0)
        if not 10.0 < hfov < 170.0:
            raise InputError(f"{t.where}: hfov_deg must be between 10 and 170, got {hfov}")
        focal = (video.width_px / 2.0) / math.tan(math.radians(hfov) / 2.0)
    dist = t.data.get("distortion", [0.0] * 5)
    if not isinstance(dist, list) or len(dist) != 5 or not all(
            isinstance(v, int | float) and not isinstance(v, bool) for v in dist):
        raise InputError(f"{t.where}: 'distortion' must be 5 numbers k1, k2, p1, p2, k3")
    if not 0.3 <= pos[2] <= 6.0:
        raise InputError(f"{t.where}: z_m = {pos[2]} puts the lens below 0.3 m or above 6 m; "
                         "a camera at a field edge is typically 1.2-2.5 m high")
    if look[2] >= pos[2]:
        raise InputError(f"{t.where}: the look-at point must be below the camera")
    if math.dist(pos, look) < 0.1:
        raise InputError(f"{t.where}: the look-at point must differ from the camera position")
    return CameraSpec(
        mount=t.choice("mount", {"tripod", "handheld"}, "tripod"), position_m=pos,
        look_at_m=look, focal_px=focal, distortion=tuple(float(v) for v in dist),
        readout_s=t.get("readout_s", float, 0.0),
        sway_rad=math.radians(t.get("sway_deg", float, 0.4)),
        sway_m=t.get("sway_m", float, 0.01), sway_period_s=t.positive("sway_period_s", 5.0),
        roll_rad=math.radians(t.get("roll_deg", float, 0.0)),
    )


def _drivetrain(t: TomlTable) -> DrivetrainSpec:
    kind = t.choice("kind", {"tank", "mecanum"}, "tank")
    return DrivetrainSpec(
        kind=kind, track_m=t.positive("track_m", 0.38),
        wheelbase_m=t.positive("wheelbase_m", 0.30),
        wheel_radius_m=t.positive("wheel_radius_m", 0.048),
        ticks_per_rev=t.positive("ticks_per_rev", 537.6), gear_ratio=t.positive("gear_ratio", 1.0),
        counter_bits=_bits(t), signs=_signs(t, 2 if kind == "tank" else 4),
    )


def _tracking(t: TomlTable) -> TrackingSpec:
    layout = t.choice("layout", {"three", "two+imu", "none"}, "none")
    n = {"three": 3, "two+imu": 2, "none": 0}[layout]
    return TrackingSpec(
        layout=layout, radius_m=t.positive("radius_m", 0.024),
        ticks_per_rev=t.positive("ticks_per_rev", 8192), counter_bits=_bits(t),
        signs=_signs(t, n), parallel_x_m=t.get("parallel_x_m", float, 0.0),
        left_y_m=t.get("left_y_m", float, 0.17), right_y_m=t.get("right_y_m", float, -0.17),
        perpendicular_x_m=t.get("perpendicular_x_m", float, -0.12),
        perpendicular_y_m=t.get("perpendicular_y_m", float, 0.0),
    )


def _imu(t: TomlTable) -> ImuSpec:
    return ImuSpec(
        enabled=t.get("enabled", bool, False),
        bias_radps=math.radians(t.get("bias_dps", float, 0.0)),
        bias_walk_radps_per_sqrt_s=math.radians(t.get("bias_walk_dps_per_sqrt_s", float, 0.0)),
        noise_rad=math.radians(t.get("noise_deg", float, 0.0)),
        scale_error=t.get("scale_error", float, 0.0),
    )


def _log(t: TomlTable) -> LogSpec:
    from ..profiles import ANGLE_UNITS_RAD, LENGTH_UNITS_M, TIME_UNITS_S

    rate_err = t.get("clock_rate_error", float, 0.0)
    if abs(rate_err) > 0.01:
        raise InputError(f"{t.where}: clock_rate_error must be small (|e| <= 0.01)")
    rate = t.positive("rate_hz", 100.0)
    jitter = t.get("jitter_s", float, 0.0)
    if not 0 <= jitter < 0.5 / rate:
        raise InputError(f"{t.where}: jitter_s must be >= 0 and below half the sample period")
    return LogSpec(
        rate_hz=rate, jitter_s=jitter, clock_offset_s=t.get("clock_offset_s", float, 0.0),
        clock_rate_error=rate_err, time_unit=t.choice("time_unit", TIME_UNITS_S, "s"),
        time_column=t.get("time_column", str, "t"), logs_pose=t.get("logs_pose", bool, False),
        pose_source=t.get("pose_source", str, "tracking+imu"),
        pose_length_unit=t.choice("pose_length_unit", LENGTH_UNITS_M, "m"),
        pose_angle_unit=t.choice("pose_angle_unit", ANGLE_UNITS_RAD, "deg"),
    )


def _segment(t: TomlTable, dt: DrivetrainSpec) -> Segment:
    kind = t.choice("kind", set(SEGMENT_KINDS))
    if kind in ("drive", "strafe"):
        if kind == "strafe" and dt.kind != "mecanum":
            raise InputError(f"{t.where}: 'strafe' needs a mecanum drivetrain")
        return Segment(kind, x_m=t.get("x_m"), y_m=t.get("y_m"))
    if kind == "turn":
        return Segment(kind, heading_rad=t.angle("heading_deg"))
    if kind == "arc":
        return Segment(kind, radius_m=t.positive("radius_m"), angle_rad=t.angle("angle_deg"))
    return Segment(kind, duration_s=t.positive("duration_s"))


def _fault(t: TomlTable, n_segments, robot: RobotProfile, imu: ImuSpec) -> Fault:
    kind = t.choice("kind", set(FAULT_KINDS))
    seg = t.get("segment", int, None)
    if seg is None and "t_s" not in t.data:
        raise InputError(f"{t.where}: give 'segment' and 'at_s', or 't_s' (video time)")
    if seg is not None and not 0 <= seg < n_segments:
        raise InputError(f"{t.where}: 'segment' must be 0..{n_segments - 1}, got {seg}")
    at = t.get("at_s", float, 0.0) if seg is not None else t.get("t_s")
    kw = dict(kind=kind, segment=seg, at_s=at)
    if kind != "imu_jump":
        kw["duration_s"] = t.positive("duration_s")
    if kind == "impact":
        kw["decel_mps2"] = t.positive("decel_mps2", 15.0)
        kw["recover_s"] = t.positive("recover_s", 0.15)
    elif kind == "shove":
        kw.update(dx_m=t.get("dx_m", float, 0.0), dy_m=t.get("dy_m", float, 0.0),
                  dheading_rad=t.angle("dheading_deg", 0.0))
    elif kind == "pod_lift":
        name = t.get("wheel", str)
        pods = [w.name for w in robot.wheels if not w.powered]
        if name not in pods:
            raise InputError(f"{t.where}: 'wheel' = {name!r} is not a tracking wheel; "
                             f"tracking wheels are {pods}")
        kw["wheel"] = name
    else:
        if not imu.enabled:
            raise InputError(f"{t.where}: 'imu_jump' needs [imu] enabled = true")
        kw["magnitude_rad"] = t.angle("magnitude_deg")
    return Fault(**kw)


def _robot_profile(r: TomlTable, markers, dt: DrivetrainSpec, tr: TrackingSpec, imu: ImuSpec,
                   log: LogSpec, where: str) -> RobotProfile:
    """The robot profile a team would write for this robot (exact geometry)."""
    wheels = []
    common = dict(radius_m=dt.wheel_radius_m, ticks_per_rev=dt.ticks_per_rev,
                  gear_ratio=dt.gear_ratio, counter_bits=dt.counter_bits, powered=True)
    if dt.kind == "tank":
        for name, y, sign in (("left", dt.track_m / 2, dt.signs[0]),
                              ("right", -dt.track_m / 2, dt.signs[1])):
            wheels.append(Wheel(name, f"{name}_ticks", x_m=0.0, y_m=y, direction_rad=0.0,
                                sign=sign, **common))
    else:
        lx, ly = dt.wheelbase_m / 2, dt.track_m / 2
        # X layout seen from above (Lynch & Park 2017, fig. 13.5): front-left rollers at -45.
        layout = (("front_left", lx, ly, -45.0), ("front_right", lx, -ly, 45.0),
                  ("rear_left", -lx, ly, 45.0), ("rear_right", -lx, -ly, -45.0))
        for (name, x, y, roller), sign in zip(layout, dt.signs, strict=True):
            wheels.append(Wheel(name, f"{name}_ticks", x_m=x, y_m=y, direction_rad=0.0,
                                roller_rad=math.radians(roller), sign=sign, **common))
    pod = dict(radius_m=tr.radius_m, ticks_per_rev=tr.ticks_per_rev,
               counter_bits=tr.counter_bits, powered=False)
    pods = []
    if tr.layout == "three":
        pods = [("pod_left", tr.parallel_x_m, tr.left_y_m, 0.0),
                ("pod_right", tr.parallel_x_m, tr.right_y_m, 0.0)]
        if tr.left_y_m <= tr.right_y_m:
            raise InputError(f"{where} [tracking]: left_y_m must be greater than right_y_m")
    elif tr.layout == "two+imu":
        pods = [("pod_parallel", tr.parallel_x_m, tr.left_y_m, 0.0)]
    if tr.layout != "none":
        pods.append(("pod_perpendicular", tr.perpendicular_x_m, tr.perpendicular_y_m, 90.0))
    for (name, x, y, direction), sign in zip(pods, tr.signs, strict=True):
        wheels.append(Wheel(name, f"{name}_ticks", x_m=x, y_m=y,
                            direction_rad=math.radians(direction), sign=sign, **pod))
    drive_names = tuple(w.name for w in wheels if w.powered)
    pod_names = tuple(w.name for w in wheels if not w.powered)
    sources = [Source("drive", drive_names, "wheels", no_sideways=dt.kind == "tank")]
    if tr.layout == "three":
        sources.append(Source("tracking", pod_names, "wheels"))
    if tr.layout != "none" and imu.enabled:
        sources.append(Source("tracking+imu", pod_names, "imu"))
    imu_p = Imu(column="imu_heading_deg", unit="deg", wrapped=True) if imu.enabled else None
    pose = None
    if log.logs_pose:
        if log.pose_source not in [s.name for s in sources]:
            raise InputError(f"{where} [log]: pose_source {log.pose_source!r} is not one of "
                             f"{[s.name for s in sources]}")
        lu, au = log.pose_length_unit, log.pose_angle_unit
        pose = PoseColumns(f"pose_x_{lu}", f"pose_y_{lu}", f"pose_heading_{au}", lu, au)
    return RobotProfile(
        name=r.get("name", str, "robot"), length_m=r.positive("length_m", 0.42),
        width_m=r.positive("width_m", 0.40), height_m=r.positive("height_m", 0.25),
        markers=markers, wheels=tuple(wheels), time_column=log.time_column,
        time_unit=log.time_unit, imu=imu_p, pose=pose, sources=tuple(sources),
    )

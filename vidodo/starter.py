"""A starter robot profile from a few questions (two-wheel differential, four-wheel skid,
mecanum; none, two or three tracking wheels; with or without an IMU).

:data:`QUESTIONS` lists what is asked; :func:`next_question` gives the next one for the
answers so far (later questions depend on the drivetrain), :func:`parse_answer` checks
one answer and :func:`profile_text` writes the commented ``robot.toml``. The terminal
prompts live in the verb (``vidodo new-robot``); answers can also come from a TOML file
with the same keys.

Conventions follow the robot profile (DEVELOPERS.md): body x forward, y left; mecanum
wheels in the X layout seen from above with the front-left rollers at -45 deg (Lynch &
Park, *Modern Robotics*, 2017, fig. 13.5); wheels are named and their log columns are
``<name>_ticks`` unless the answers say otherwise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import InputError

__all__ = ["Question", "QUESTIONS", "next_question", "parse_answer", "profile_text",
           "DRIVETRAINS", "complete_answers"]

DRIVETRAINS = {"diff": "two-wheel differential", "skid": "four-wheel skid steer",
               "mecanum": "four mecanum wheels"}


@dataclass(frozen=True)
class Question:
    """One question: its answer key, the prompt, the kind of answer and the default."""

    key: str
    text: str
    kind: str
    """'str', 'choice', 'int', 'mm' or 'positive' (a positive number), 'signed_mm',
    'bool'."""
    default: object
    choices: tuple = ()
    needs: str = ""
    """Asked only when this condition holds: 'mecanum', 'four', 'pods', 'three', 'imu'."""


QUESTIONS = (
    Question("name", "Robot name", "str", "my-robot"),
    Question("drivetrain", "Drivetrain: diff (two-wheel differential), skid (four-wheel "
             "skid steer) or mecanum", "choice", "diff", tuple(DRIVETRAINS)),
    Question("length_mm", "Robot length, front to back [mm]", "mm", 450.0),
    Question("width_mm", "Robot width, left to right [mm]", "mm", 450.0),
    Question("height_mm", "Robot height [mm]", "mm", 300.0),
    Question("track_mm", "Distance between the left and right wheels' centres [mm]", "mm",
             380.0),
    Question("wheelbase_mm", "Distance between the front and rear wheels' centres [mm]",
             "mm", 300.0, needs="four"),
    Question("drive_diameter_mm", "Drive wheel diameter [mm]", "mm", 96.0),
    Question("drive_ticks_per_rev", "Drive encoder counts per motor-shaft revolution",
             "int", 28),
    Question("drive_gear_ratio", "Motor revolutions per wheel revolution (gearbox ratio)",
             "positive", 19.2),
    Question("drive_counter_bits", "Width of the drive encoder counters in bits (16, 32; "
             "0 if they never wrap)", "int", 32),
    Question("pods", "Unpowered tracking wheels: 0, 2 (one along, one across) or 3 (two "
             "along, one across)", "choice", "0", ("0", "2", "3")),
    Question("pod_diameter_mm", "Tracking wheel diameter [mm]", "mm", 48.0, needs="pods"),
    Question("pod_ticks_per_rev", "Tracking wheel counts per revolution", "int", 8192,
             needs="pods"),
    Question("pod_left_y_mm", "Left (or only) forward-rolling tracking wheel: distance "
             "left of the robot's centre [mm] (negative: right)", "signed_mm", 170.0,
             needs="pods"),
    Question("pod_right_y_mm", "Right forward-rolling tracking wheel: distance left of the "
             "centre [mm] (negative: right)", "signed_mm", -170.0, needs="three"),
    Question("pod_parallel_x_mm", "Forward-rolling tracking wheels: distance ahead of the "
             "centre [mm] (negative: behind)", "signed_mm", 0.0, needs="pods"),
    Question("pod_perp_x_mm", "Sideways-rolling tracking wheel: distance ahead of the "
             "centre [mm] (negative: behind)", "signed_mm", -120.0, needs="pods"),
    Question("imu", "Does the log hold an IMU heading? (yes/no)", "bool", True),
    Question("imu_column", "IMU heading column in the log", "str", "imu_heading_deg",
             needs="imu"),
    Question("imu_unit", "IMU heading unit: deg or rad", "choice", "deg", ("deg", "rad"),
             needs="imu"),
    Question("time_column", "Time column in the log", "str", "time_ms"),
    Question("time_unit", "Time unit of that column: s, ms, us or ns", "choice", "ms",
             ("s", "ms", "us", "ns")),
    Question("marker_family", "Marker dictionary (OpenCV name)", "str", "DICT_4X4_50"),
    Question("marker_id", "Marker id", "int", 0),
    Question("marker_size_mm", "Marker black-square side [mm]", "mm", 150.0),
    Question("marker_height_mm", "Marker face height above the floor [mm]", "mm", 300.0),
)
_BY_KEY = {q.key: q for q in QUESTIONS}


def _applies(q: Question, answers: dict) -> bool:
    if q.needs == "four":
        return answers.get("drivetrain") in ("skid", "mecanum")
    if q.needs == "pods":
        return answers.get("pods", "0") != "0"
    if q.needs == "three":
        return answers.get("pods") == "3"
    if q.needs == "imu":
        return bool(answers.get("imu"))
    return True


def next_question(answers: dict) -> Question | None:
    """The next question to ask, or None when every applicable one is answered."""
    return next((q for q in QUESTIONS if q.key not in answers and _applies(q, answers)),
                None)


def parse_answer(q: Question, text, where: str = "answer"):
    """Check one answer (text typed, or a value from an answers file).

    Raises
    ------
    InputError
        Naming the question and what is wanted.
    """
    if isinstance(text, str):
        text = text.strip()
        if text == "":
            return q.default
    bad = f"{where} '{q.key}' = {text!r}: "
    if q.kind == "str":
        if not isinstance(text, str) or not text or '"' in text or "\\" in text:
            raise InputError(bad + "give a plain name without quotes or backslashes")
        return text
    if q.kind == "choice":
        if str(text) not in q.choices:
            raise InputError(bad + f"use one of {list(q.choices)}")
        return str(text)
    if q.kind == "bool":
        if isinstance(text, bool):
            return text
        if str(text).lower() in ("y", "yes", "true", "1"):
            return True
        if str(text).lower() in ("n", "no", "false", "0"):
            return False
        raise InputError(bad + "answer yes or no")
    try:
        value = float(text)
    except (TypeError, ValueError):
        raise InputError(bad + "give a number") from None
    if q.kind == "int":
        if value != int(value) or value < 0:
            raise InputError(bad + "give a whole number, 0 or more")
        return int(value)
    if not math.isfinite(value) or (q.kind in ("mm", "positive") and value <= 0):
        raise InputError(bad + ("give a positive number" if q.kind != "signed_mm" else
                                "give a number"))
    return value


def complete_answers(given: dict, where: str = "answers") -> dict:
    """Every applicable answer: the given ones checked, defaults for the rest.

    Raises
    ------
    InputError
        For an unknown key or a bad value.
    """
    unknown = sorted(set(given) - set(_BY_KEY))
    if unknown:
        raise InputError(f"{where}: unknown key(s) {unknown}; the questions are "
                         f"{list(_BY_KEY)}")
    answers: dict = {}
    while (q := next_question(answers)) is not None:
        answers[q.key] = parse_answer(q, given[q.key], where) if q.key in given else q.default
    return answers


def _m(mm) -> str:
    return repr(round(float(mm) / 1000.0, 6))


def _wheel(name, x_mm, y_mm, *, direction=0.0, roller=0.0, diameter_mm, ticks, gear=1.0,
           bits=32, powered=True, comment=""):
    lines = [f"\n[[wheel]]{'  # ' + comment if comment else ''}",
             f'name = "{name}"', f'column = "{name}_ticks"   # log column with its counts',
             f"x_m = {_m(x_mm)}   # contact point: ahead of the reference point",
             f"y_m = {_m(y_mm)}   # contact point: left of the reference point",
             f"direction_deg = {direction:g}   # rolling direction: 0 forward, 90 left",
             f"roller_deg = {roller:g}   # 0 plain or omni wheel, +-45 mecanum",
             f"radius_m = {_m(diameter_mm / 2)}", f"ticks_per_rev = {ticks}",
             f"gear_ratio = {gear:g}   # encoder-shaft revolutions per wheel revolution",
             "sign = 1   # -1 if the counts fall when the wheel rolls along direction_deg;"
             " check with `vidodo preflight`",
             f"counter_bits = {bits}   # 16 or 32 (wraps), 0 never wraps",
             f"powered = {'true' if powered else 'false'}"]
    return lines


def _drive_wheels(a) -> tuple[list[str], list[str]]:
    d = dict(diameter_mm=a["drive_diameter_mm"], ticks=a["drive_ticks_per_rev"],
             gear=a["drive_gear_ratio"], bits=a["drive_counter_bits"])
    ty = a["track_mm"] / 2
    if a["drivetrain"] == "diff":
        layout = (("left", 0.0, ty, 0.0), ("right", 0.0, -ty, 0.0))
    else:
        lx = a["wheelbase_mm"] / 2
        mec = a["drivetrain"] == "mecanum"
        layout = (("front_left", lx, ty, -45.0 if mec else 0.0),
                  ("front_right", lx, -ty, 45.0 if mec else 0.0),
                  ("rear_left", -lx, ty, 45.0 if mec else 0.0),
                  ("rear_right", -lx, -ty, -45.0 if mec else 0.0))
    lines = []
    for name, x, y, roller in layout:
        lines += _wheel(name, x, y, roller=roller, comment="drive wheel", **d)
    return lines, [n for n, *_ in layout]


def _pod_wheels(a) -> tuple[list[str], list[str]]:
    if a["pods"] == "0":
        return [], []
    d = dict(diameter_mm=a["pod_diameter_mm"], ticks=a["pod_ticks_per_rev"], powered=False)
    px = a["pod_parallel_x_mm"]
    if a["pods"] == "3":
        layout = [("pod_left", px, a["pod_left_y_mm"], 0.0),
                  ("pod_right", px, a["pod_right_y_mm"], 0.0)]
    else:
        layout = [("pod_parallel", px, a["pod_left_y_mm"], 0.0)]
    layout.append(("pod_perpendicular", a["pod_perp_x_mm"], 0.0, 90.0))
    lines = []
    for name, x, y, direction in layout:
        lines += _wheel(name, x, y, direction=direction, comment="tracking wheel", **d)
    return lines, [n for n, *_ in layout]


def _sources(a, drive, pods) -> list[str]:
    src = [("drive", drive, "wheels", a["drivetrain"] != "mecanum")]
    if a["pods"] == "3":
        src.append(("tracking", pods, "wheels", False))
    if pods and a["imu"]:
        src.append(("tracking+imu", pods, "imu", False))
    lines = []
    for name, wheels, heading, no_side in src:
        lines += ["\n[[source]]", f'name = "{name}"',
                  "wheels = [" + ", ".join(f'"{w}"' for w in wheels) + "]",
                  f'heading = "{heading}"   # wheels: heading from the wheels; imu: from '
                  "the IMU", f"no_sideways = {'true' if no_side else 'false'}"]
    return lines


def profile_text(answers: dict) -> str:
    """The commented robot.toml for complete answers (:func:`complete_answers`)."""
    a = answers
    lines = [f"# robot profile written by `vidodo new-robot`: {DRIVETRAINS[a['drivetrain']]}"
             f", {a['pods']} tracking wheel(s), {'with' if a['imu'] else 'no'} IMU.",
             "# Every key carries its unit. Check each number against the robot, then run",
             "# `vidodo picture robot.toml` (a top view) and `vidodo preflight` on a log.",
             "", "[robot]", f'name = "{a["name"]}"',
             f"length_m = {_m(a['length_mm'])}   # box used to mask the robot in the video",
             f"width_m = {_m(a['width_mm'])}", f"height_m = {_m(a['height_mm'])}",
             "", "[log]", f'time_column = "{a["time_column"]}"',
             f'time_unit = "{a["time_unit"]}"   # s, ms, us or ns',
             "", "[[marker]]", f"id = {a['marker_id']}", f'family = "{a["marker_family"]}"',
             f"size_m = {_m(a['marker_size_mm'])}   # side of the black square as printed",
             "x_m = 0.0   # marker centre ahead of the reference point",
             "y_m = 0.0   # marker centre left of the reference point",
             f"z_m = {_m(a['marker_height_mm'])}   # marker face above the floor",
             "yaw_deg = -90.0   # marker x axis from the robot's front; -90: its printed "
             "top faces forward"]
    drive_lines, drive = _drive_wheels(a)
    pod_lines, pods = _pod_wheels(a)
    lines += drive_lines + pod_lines
    if a["imu"]:
        lines += ["\n[imu]", f'column = "{a["imu_column"]}"',
                  f'unit = "{a["imu_unit"]}"', "wrapped = true   # heading wraps at +-180 deg",
                  "scale = 1.0", "sign = 1   # +1 if the heading rises turning left "
                  "(counter-clockwise from above)"]
    lines += _sources(a, drive, pods)
    return "\n".join(lines) + "\n"

"""Bad-input corpus (issue 14): what a careless or hostile user does, as tests.

The corpus is generated at test time from one rendered run without video (cached by
``conftest``), graded from a stand-in truth track so no case needs tracking. Every case
asserts the exit code, the first line of the message and that the input and output
folders hold exactly what they held before (SHA-256 of every file, hidden ones
included), or, for a case that succeeds, exactly the new set. No case may end in exit 1
(an internal error) or pass silently.

Exit codes and the one-line rule are the README's ("Exit codes"); the CSV rule is the
OWASP guidance on CSV injection (cells starting with = + - @ are neutralised).
"""

from __future__ import annotations

import csv
import errno
import hashlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from test_pipeline import standin_truth  # sibling test module

from vidodo import outputs
from vidodo.cli_main import main
from vidodo.outputs import MANIFEST

pytestmark = pytest.mark.filterwarnings("error::RuntimeWarning")

GRADE_SET = {"drift.csv", "events.csv", "summary.json", "track.csv", MANIFEST}


# ------------------------------------------------------------------ corpus helpers
@pytest.fixture(scope="module")
def base_run(rendered_run, tmp_path_factory):
    """A run folder: log, profiles, a stand-in truth track and a dummy video file."""
    src = rendered_run("default", 0, video=False)
    d = tmp_path_factory.mktemp("base") / "run"
    d.mkdir()
    for f in ("log.csv", "robot.toml", "field.toml", "camera.toml"):
        shutil.copy(src / f, d / f)
    standin_truth(src).to_csv(d / "track.csv", index=False)
    (d / "video.mp4").write_bytes(b"not really a video")
    return d


@pytest.fixture
def run(base_run, tmp_path):
    """A fresh copy of the run for one case."""
    d = tmp_path / "run"
    shutil.copytree(base_run, d)
    return d


def snapshot(*folders) -> dict:
    """Every file below the folders (hidden ones too) -> SHA-256; folders -> 'dir'."""
    out = {}
    for f in folders:
        if not f.exists():
            out[str(f)] = None
            continue
        if f.is_file():
            out[str(f)] = hashlib.sha256(f.read_bytes()).hexdigest()
            continue
        for root, dirs, files in os.walk(f):
            for name in dirs:
                out[os.path.join(root, name)] = "dir"
            for name in files:
                p = os.path.join(root, name)
                with open(p, "rb") as fh:
                    out[p] = hashlib.sha256(fh.read()).hexdigest()
    return out


def grade_argv(run, out, *extra, video=None, log=None, robot=None, field=None,
               report=False):
    argv = ["grade", str(video or run / "video.mp4"), str(log or run / "log.csv"),
            "--robot", str(robot or run / "robot.toml"), "--field",
            str(field or run / "field.toml"), "--track", str(run / "track.csv"),
            "--out", str(out), "--quiet"]
    if not report:
        argv.append("--no-report")
    else:
        argv.append("--no-replay")
    return argv + list(extra)


def check(capsys, argv, code, first_line, *watch):
    """Run the command; assert exit code, first message line, watched folders unchanged."""
    before = snapshot(*watch)
    got = main([str(a) for a in argv])
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert got == code, err
    assert got != 1, err
    if first_line is not None:
        assert lines, "no message"
        assert re.search(first_line, lines[0]), lines[0]
    if code not in (0, 4):
        assert len(lines) == 1, err  # one line, nothing before it
    assert snapshot(*watch) == before
    for w in watch:  # nothing half-written beside the watched folders
        parent = w.parent
        assert not [p for p in parent.iterdir() if ".partial-" in p.name
                    or p.name.endswith(".vidodo-lock")]
    return lines


def edit(path, old, new, count=1):
    text = path.read_text()
    assert old in text, old
    path.write_text(text.replace(old, new, count))


# ------------------------------------------------------------------ data loss
@pytest.mark.parametrize("kind,name", [("video", "replay.mp4"), ("log", "events.csv")])
def test_input_named_like_an_output_in_out_is_refused(run, tmp_path, capsys, kind, name):
    """`cp run/video.mp4 x/replay.mp4 && grade x/replay.mp4 ... --out x` (and a log
    named events.csv): exit 2, nothing touched."""
    x = tmp_path / "x"
    x.mkdir()
    shutil.copy(run / ("video.mp4" if kind == "video" else "log.csv"), x / name)
    check(capsys, grade_argv(run, x, **{kind: x / name}), 2,
          rf"x: holds an input of this run .*{re.escape(name)}", x, run)


def test_users_own_summary_in_out_is_refused(run, tmp_path, capsys):
    x = tmp_path / "x"
    x.mkdir()
    (x / "summary.json").write_text('{"mine": true}\n')
    check(capsys, grade_argv(run, x), 2, r"x: holds files vidodo did not write "
          r"\(e\.g\. summary\.json\)", x, run)


def test_force_never_touches_an_input(run, tmp_path, capsys):
    """--force writes beside the user's files, but an input named like an output stays."""
    x = tmp_path / "x"
    x.mkdir()
    shutil.copy(run / "log.csv", x / "summary.json")  # the log, named like an output
    check(capsys, grade_argv(run, x, "--force", log=x / "summary.json"), 2,
          r"summary\.json: is an input of this run and would be replaced", x, run)
    shutil.copy(run / "log.csv", x / "mylog.csv")
    (x / "notes.txt").write_text("mine\n")
    before = snapshot(x / "mylog.csv", x / "notes.txt", run)
    assert main(grade_argv(run, x, "--force", log=x / "mylog.csv")) == 0
    assert snapshot(x / "mylog.csv", x / "notes.txt", run) == before
    assert GRADE_SET <= {p.name for p in x.iterdir()}


def test_render_over_a_real_run_folder_is_refused(run, capsys):
    """The README's example-profile command pointed at an existing run: exit 2."""
    check(capsys, ["render", "default", "--no-video", "--out", run], 2,
          r"run: holds files vidodo did not write", run)


def test_tune_over_the_folder_of_its_input_profile_is_refused(run, tmp_path, capsys):
    graded = tmp_path / "graded"
    assert main(grade_argv(run, graded)) == 0
    capsys.readouterr()
    check(capsys, ["tune", graded, "--robot", run / "robot.toml", "--out", run, "--quiet"],
          2, r"run: holds an input of this run", run, graded)


def test_track_out_over_a_users_file_is_refused(run, capsys):
    check(capsys, ["track", run / "video.mp4", "--robot", run / "robot.toml", "--field",
                   run / "field.toml", "--out", run / "robot.toml"], 2,
          r"robot\.toml: is an input of this command", run)
    (run / "notes.csv").write_text("a,b\n")
    check(capsys, ["odometry", run / "log.csv", "--robot", run / "robot.toml", "--out",
                   run / "notes.csv"], 2, r"notes\.csv: exists and was not written by "
          "vidodo", run)


# ------------------------------------------------------------------ stale and half-written
def test_regrade_replaces_the_whole_set(run, tmp_path, capsys):
    """A full grade with pictures, then --no-report: no old report beside new figures."""
    out = tmp_path / "graded"
    assert main(grade_argv(run, out, report=True)) == 0
    assert {"report.html", "field_map.png"} <= {p.name for p in out.iterdir()}
    assert main(grade_argv(run, out)) == 0
    assert {p.name for p in out.iterdir()} == GRADE_SET
    capsys.readouterr()


def test_interrupt_while_plotting_leaves_the_old_set(run, tmp_path, capsys, monkeypatch):
    out = tmp_path / "graded"
    assert main(grade_argv(run, out)) == 0
    capsys.readouterr()
    import vidodo.report.build

    def stop(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(vidodo.report.build, "write_report", stop)
    check(capsys, grade_argv(run, out, report=True), 130, r"interrupted", out, run)


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP])
def test_sigterm_and_sighup_remove_the_staged_set(run, tmp_path, capsys, monkeypatch, sig):
    import vidodo.report.grade_files

    real = vidodo.report.grade_files.write_outputs

    def killed(*a, **k):
        real(*a, **k)
        os.kill(os.getpid(), sig)

    monkeypatch.setattr(vidodo.report.grade_files, "write_outputs", killed)
    out = tmp_path / "graded"
    check(capsys, grade_argv(run, out), 130, rf"interrupted by {sig.name}", out, run)


def test_out_is_an_existing_file(run, capsys):
    check(capsys, grade_argv(run, run / "log.csv"), 2,
          r"log\.csv: exists and is not a folder", run)


def test_final_move_across_filesystems_is_exit_2(run, tmp_path, capsys, monkeypatch):
    def exdev(a, b):
        raise OSError(errno.EXDEV, os.strerror(errno.EXDEV))

    monkeypatch.setattr(outputs.os, "rename", exdev)
    out = tmp_path / "usb"
    check(capsys, grade_argv(run, out), 2, r"usb: cannot write the outputs there \(it is "
          "on another filesystem", out, run)


def test_unwritable_parent_is_exit_2(run, tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(outputs.os, "access", lambda p, mode: False)
    check(capsys, grade_argv(run, tmp_path / "ro" / "out"), 2,
          r"out: cannot write in .* \(permission denied\)", run)


def test_second_grade_into_the_same_out_is_refused(run, tmp_path, capsys):
    out = tmp_path / "graded"
    lock = outputs._Lock(out).acquire()  # a first grade, still running
    try:
        before = snapshot(out, run)
        assert main(grade_argv(run, out)) == 2
        assert "another vidodo command is writing there now" in capsys.readouterr().err
        assert snapshot(out, run) == before
    finally:
        lock.release()


# ------------------------------------------------------------------ crashes
@pytest.mark.parametrize("offset", ["3.25", "5", "10"])
def test_wrong_clock_offset_is_not_a_crash(run, tmp_path, capsys, offset):
    """The true offset is -3.25 s; a wrong one is refused (3) or graded with a warning."""
    out = tmp_path / "graded"
    code = main(grade_argv(run, out, "--clock-offset", offset))
    err = capsys.readouterr().err
    assert code in (0, 3), err
    if code == 0:
        assert "differs from the one the motion gives" in err
    else:
        assert not out.exists()


def test_clock_offset_nan(run, tmp_path, capsys):
    check(capsys, grade_argv(run, tmp_path / "o", "--clock-offset", "nan"), 2,
          r"--clock-offset-s nan: must be a finite number", run)


def test_math_text_in_a_source_name_is_drawn_literally(run, tmp_path, capsys):
    edit(run / "robot.toml", 'name = "drive"', 'name = "$\\\\frac{a$"')
    out = tmp_path / "graded"
    assert main(grade_argv(run, out, report=True)) == 0, capsys.readouterr().err
    assert (out / "field_map.png").is_file() and (out / "report.html").is_file()
    assert "$\\frac{a$" in json.loads((out / "summary.json").read_text())["sources"]


# ------------------------------------------------------------------ strict profiles
@pytest.mark.parametrize("old,new,message", [
    ("gear_ratio = 19.2", "gear_raito = 2", r"\[\[wheel\]\] #1: unknown key 'gear_raito'; "
     r"did you mean 'gear_ratio'\?"),
    ('time_unit = "ms"', 'time_units = "ms"', r"\[log\]: unknown key 'time_units'; did you "
     r"mean 'time_unit'\?"),
    ("counter_bits = 32", "counter_bit = 16", r"unknown key 'counter_bit'; did you mean "
     r"'counter_bits'\?"),
    ("z_m = 0.26", "z_mm = 260", r"\[\[marker\]\] #1: unknown key 'z_mm'; did you mean "
     r"'z_m'\?"),
    ("[imu]", "[imu_]", r": unknown key 'imu_'; did you mean 'imu'\?"),
    ("radius_m = 0.048", "radius_m = 48", r"key 'radius_m' = 48 m looks like millimetres: "
     r"0\.048"),
    ("ticks_per_rev = 28.0", "ticks_per_rev = 1e308", r"key 'ticks_per_rev' = 1e\+308 "
     "counts is outside the plausible range"),
    ("scale = 1.0", "scale = 0.0", r"\[imu\]: key 'scale' = 0 is outside the plausible"),
    ('column = "right_ticks"', 'column = "left_ticks"', r"wheels 'left' and 'right' both "
     r"read column 'left_ticks'"),
    ("size_m = 0.2", "size_m = nan", r"key 'size_m' = nan is not a valid float"),
    ("length_m = 0.42", "length_m = 42", r"key 'length_m' = 42 m looks like millimetres: "
     r"0\.042, or centimetres: 0\.42, or inches: 1\.0668; write it in metres"),
])
def test_robot_profile_mistakes(run, tmp_path, capsys, old, new, message):
    edit(run / "robot.toml", old, new)
    out = tmp_path / "graded"
    check(capsys, grade_argv(run, out), 2, r"robot\.toml.*" + message, out, run)


@pytest.mark.parametrize("old,new,message", [
    ('origin_hint = "near-left"', 'origin_hnt = "near-left"', r"\[floor\]: unknown key "
     r"'origin_hnt'; did you mean 'origin_hint'\?"),
    ("tiles_x = 6\ntiles_y = 6", "tiles_x = 1000000\ntiles_y = 1000000",
     r"key 'tiles_x' = 1e\+06 tiles is outside the plausible range"),
    ("tile_size_m = 0.6096", "tile_size_m = 609.6", r"key 'tile_size_m' = 609\.6 m looks "
     r"like millimetres: 0\.6096"),
    ("tiles_x = 6", "tile_x = 6", r"missing key 'tiles_x' \('tile_x' is there"),
])
def test_field_profile_mistakes(run, tmp_path, capsys, old, new, message):
    edit(run / "field.toml", old, new)
    out = tmp_path / "graded"
    check(capsys, grade_argv(run, out), 2, r"field\.toml.*" + message, out, run)


@pytest.mark.parametrize("opt", ["--tol-pos-m", "--tol-heading-deg"])
@pytest.mark.parametrize("value", ["nan", "inf", "-1", "0"])
def test_bad_tolerances(run, tmp_path, capsys, opt, value):
    check(capsys, grade_argv(run, tmp_path / "o", opt, value), 2,
          rf"{opt} {value}\S*: must be a positive number", run)


def test_camera_profile_for_another_resolution_is_refused_before_tracking(run, tmp_path,
                                                                          capsys):
    import cv2

    video = tmp_path / "clip.mp4"
    w = cv2.VideoWriter(str(video), cv2.VideoWriter_fourcc(*"mp4v"), 10.0, (320, 240))
    for i in range(5):
        w.write(np.full((240, 320, 3), 40 * i, np.uint8))
    w.release()
    argv = ["grade", video, run / "log.csv", "--robot", run / "robot.toml", "--field",
            run / "field.toml", "--camera", run / "camera.toml", "--out", tmp_path / "o"]
    check(capsys, argv, 2, r"camera\.toml: made for 640 x 360 px images but .*clip\.mp4 "
          r"is 320 x 240 px", run, tmp_path / "o")


# ------------------------------------------------------------------ log checks
def _log(run):
    return pd.read_csv(run / "log.csv")


def test_milliseconds_under_time_unit_s(run, tmp_path, capsys):
    edit(run / "robot.toml", 'time_unit = "ms"', 'time_unit = "s"')
    check(capsys, grade_argv(run, tmp_path / "o"), 2, r"log\.csv: column 'time_ms' read as "
          r"'s' .* the data fit time_unit = 'ms'", run)


def test_microseconds_under_time_unit_ms(run, tmp_path, capsys):
    df = _log(run)
    df["time_ms"] = df["time_ms"] * 1000
    df.to_csv(run / "log.csv", index=False)
    check(capsys, grade_argv(run, tmp_path / "o"), 2, r"log\.csv: column 'time_ms' read as "
          r"'ms' .* the data fit time_unit = 'us'", run)


def test_counter_wrapping_at_16_bits_under_counter_bits_32(run, tmp_path, capsys):
    df = _log(run)
    v = df["pod_left_ticks"].to_numpy(np.int64)
    assert np.abs(v).max() > 40000  # the run does wrap a 16-bit counter
    df["pod_left_ticks"] = ((v + 32768) % 65536) - 32768
    df.to_csv(run / "log.csv", index=False)
    check(capsys, grade_argv(run, tmp_path / "o"), 2, r"log\.csv: line \d+, column "
          r"'pod_left_ticks' jumps by [+-]\d+ \(near [+-]2\^16\): the counter wraps at 16 "
          "bits", run)


def test_counter_wrapping_at_32_bits_declared_as_not_wrapping(run, tmp_path, capsys):
    df = _log(run)
    v = df["left_ticks"].to_numpy(np.int64)
    df["left_ticks"] = (v + 2**32 - 500) % 2**32  # an unsigned 32-bit counter
    df.to_csv(run / "log.csv", index=False)
    edit(run / "robot.toml", "counter_bits = 32", "counter_bits = 0")
    check(capsys, grade_argv(run, tmp_path / "o"), 2, r"column 'left_ticks' jumps by .*2\^32",
          run)


def test_infinite_imu_cell_is_refused_with_its_line(run, tmp_path, capsys):
    lines = (run / "log.csv").read_text().splitlines()
    cells = lines[500].split(",")
    cells[6] = "inf"  # imu_heading_deg
    lines[500] = ",".join(cells)
    (run / "log.csv").write_text("\n".join(lines) + "\n")
    check(capsys, grade_argv(run, tmp_path / "o"), 2, r"log\.csv: line 501, column "
          r"'imu_heading_deg': inf is not a finite number", run)


def test_duplicate_time_message_has_no_numpy_repr(run, tmp_path, capsys):
    lines = (run / "log.csv").read_text().splitlines()
    a = lines[400].split(",")
    b = lines[401].split(",")
    b[0] = a[0]
    lines[401] = ",".join(b)
    (run / "log.csv").write_text("\n".join(lines) + "\n")
    got = check(capsys, grade_argv(run, tmp_path / "o"), 2, r"log\.csv: lines 401 and 402 "
                r"have the same time", run)
    assert "np." not in got[0]


# ------------------------------------------------------------------ messages
def test_batch_dir_out_dir(run, tmp_path, capsys):
    root = tmp_path / "season"
    shutil.copytree(run, root / "r1")
    check(capsys, ["batch", root, "--out", root], 2, r"season: is \(or holds\) the folder of "
          "runs", root)


def test_bad_video_gives_one_line_and_no_decoder_noise(run, tmp_path):
    """Native decoder chatter goes to file descriptor 2: check it in a child process."""
    out = tmp_path / "o"
    argv = [sys.executable, "-m", "vidodo.cli_main", "grade", str(run / "video.mp4"),
            str(run / "log.csv"), "--robot", str(run / "robot.toml"), "--field",
            str(run / "field.toml"), "--out", str(out)]
    p = subprocess.run(argv, capture_output=True, text=True, timeout=120)
    assert p.returncode == 2, p.stderr
    lines = [ln for ln in p.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, p.stderr
    assert re.match(r"vidodo grade: error: .*video\.mp4: cannot open as video", lines[0])
    assert not out.exists()


def test_text_cells_that_look_like_formulas_are_neutralised(run, tmp_path, capsys):
    """OWASP CSV injection guidance: = + - @ at the start of a text cell."""
    edit(run / "robot.toml", 'name = "drive"', 'name = "=HYPERLINK(1)"')
    edit(run / "robot.toml", 'name = "tracking"', 'name = "@tracking"')
    out = tmp_path / "graded"
    assert main(grade_argv(run, out)) == 0, capsys.readouterr().err
    events = list(csv.reader((out / "events.csv").read_text().splitlines()))
    assert len(events) > 1
    drift = list(csv.reader((out / "drift.csv").read_text().splitlines()))
    cells = [c for row in events + drift for c in row]
    assert not [c for c in cells if c[:1] in ("=", "@", "+")]
    assert any(c.startswith("'=HYPERLINK(1)") or ";'" in c or c.startswith("'@")
               for row in events[1:] for c in row)


# ------------------------------------------------------------------ own cases
def test_report_into_a_run_folder_is_refused(run, tmp_path, capsys):
    graded = tmp_path / "graded"
    assert main(grade_argv(run, graded)) == 0
    capsys.readouterr()
    check(capsys, ["report", graded, "--out", run], 2, r"run: holds (files vidodo did not "
          "write|an input)", run, graded)


def test_report_keeps_the_grade_files(run, tmp_path, capsys):
    graded = tmp_path / "graded"
    assert main(grade_argv(run, graded)) == 0
    before = snapshot(*(graded / f for f in ("drift.csv", "events.csv", "summary.json")))
    assert main(["report", str(graded), "--quiet"]) == 0
    assert snapshot(*(graded / f for f in ("drift.csv", "events.csv", "summary.json"))) \
        == before
    assert "report.html" in json.loads((graded / MANIFEST).read_text())["files"]
    capsys.readouterr()


def test_wheel_reading_the_time_column(run, tmp_path, capsys):
    edit(run / "robot.toml", 'column = "left_ticks"', 'column = "time_ms"')
    check(capsys, grade_argv(run, tmp_path / "o"), 2, r"wheel 'left' reads the time column",
          run)


def test_profile_that_is_not_toml(run, tmp_path, capsys):
    (run / "robot.toml").write_text("[robot\nname = 1\n")
    check(capsys, grade_argv(run, tmp_path / "o"), 2, r"robot\.toml: not valid TOML", run)


def test_negative_imu_scale_names_the_sign(run, tmp_path, capsys):
    edit(run / "robot.toml", "scale = 1.0", "scale = -1.0")
    check(capsys, grade_argv(run, tmp_path / "o"), 2, r"\[imu\]: key 'scale' = -1 is "
          r"negative; set sign = -1", run)


# ------------------------------------------------------------------ single-file outputs
def _users_png(path):
    """A PNG vidodo did not write (no vidodo text chunk)."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    Figure(figsize=(1, 1)).savefig(path, format="png")


def test_picture_over_a_users_png_is_refused(run, tmp_path, capsys):
    _users_png(run / "mine.png")
    check(capsys, ["picture", run / "robot.toml", "--out", run / "mine.png"], 2,
          r"mine\.png: exists and was not written by vidodo", run)
    check(capsys, ["picture", run / "robot.toml", "--out", run / "robot.toml", "--force"],
          2, r"robot\.toml: is an input of this command", run)
    out = tmp_path / "pic.png"
    assert main(["picture", str(run / "robot.toml"), "--out", str(out)]) == 0
    before = snapshot(out)
    check(capsys, ["picture", run / "robot.toml", "--out", out], 0, None, run)
    assert main(["picture", str(run / "robot.toml"), "--out", str(run / "mine.png"),
                 "--force"]) == 0
    assert snapshot(out) == before  # the same profile draws the same picture


def test_new_robot_picture_over_a_users_png_is_refused(run, tmp_path, capsys):
    answers = tmp_path / "answers.toml"
    answers.write_text("")
    _users_png(tmp_path / "robot.png")
    check(capsys, ["new-robot", "--answers", answers, "--out", tmp_path / "robot.toml"], 2,
          r"robot\.png: exists and was not written by vidodo \(or by a version before "
          r"its pictures carried vidodo's mark\); add --force to overwrite it", tmp_path)
    assert not (tmp_path / "robot.toml").exists()
    assert main(["new-robot", "--answers", str(answers), "--out",
                 str(tmp_path / "robot.toml"), "--force"]) == 0
    # now both are vidodo's: written again without --force
    assert main(["new-robot", "--answers", str(answers), "--out",
                 str(tmp_path / "robot.toml")]) == 0
    capsys.readouterr()


def test_pick_over_a_users_page_is_refused(run, tmp_path, capsys, monkeypatch):
    from vidodo import picker

    monkeypatch.setattr(picker, "picker_frames", lambda *a, **k: ["frame"])
    monkeypatch.setattr(picker, "build_page", lambda frames, field, title="":
                        picker.PAGE_SIGNATURE.decode() + "\n<html></html>\n")
    page = run / "video-pick.html"
    page.write_text("<!DOCTYPE html>\n<html><body>my notes</body></html>\n")
    check(capsys, ["pick", run / "video.mp4", "--field", run / "field.toml"], 2,
          r"video-pick\.html: exists and was not written by vidodo", run)
    check(capsys, ["pick", run / "video.mp4", "--field", run / "field.toml", "--out",
                   run / "field.toml", "--force"], 2,
          r"field\.toml: is an input of this command", run)
    assert main(["pick", str(run / "video.mp4"), "--field", str(run / "field.toml"),
                 "--force", "--quiet"]) == 0
    assert page.read_bytes().startswith(picker.PAGE_SIGNATURE)
    assert main(["pick", str(run / "video.mp4"), "--field", str(run / "field.toml"),
                 "--quiet"]) == 0  # its own page is replaced without --force


def test_failed_run_in_a_batch_leaves_no_partial_grade_folder(run, tmp_path, capsys):
    """The run's video is not a video: the run fails; its grade folder never appears."""
    root = tmp_path / "season"
    shutil.copytree(run, root / "r1")
    out = tmp_path / "out"
    before = snapshot(root)
    assert main(["batch", str(root), "--out", str(out), "--jobs", "1"]) == 3
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    assert err and re.search(r"r1: ", err[0]), err
    assert snapshot(root) == before
    names = {p.name for p in out.iterdir()}
    assert "r1" not in names
    assert not [p for p in out.rglob("*") if ".partial-" in p.name
                or p.name.endswith(".vidodo-lock")]
    assert set(json.loads((out / MANIFEST).read_text())["files"]) == names - {MANIFEST}


@pytest.mark.parametrize("which", ["log", "track"])
def test_one_usable_sample_names_the_file(run, tmp_path, capsys, which):
    """A log (or truth track) cut to its header and one row: exit 2, the first line
    names that file, and the grade folder is never written."""
    name = "log.csv" if which == "log" else "track.csv"
    lines = (run / name).read_text().splitlines()
    (run / name).write_text("\n".join(lines[:2]) + "\n")
    out = tmp_path / "g"
    if which == "log":
        check(capsys, grade_argv(run, out), 2, r"log\.csv: fewer than two samples", run,
              out)
    else:  # a measuring-stage error (exit 3), given the file names by the command
        check(capsys, grade_argv(run, out), 3,
              r"track\.csv.*: truth track has only 1 usable sample;", run, out)
    check(capsys, ["odometry", run / "log.csv", "--robot", run / "robot.toml", "--out",
                   tmp_path / "odo.csv"], 0 if which == "track" else 2,
          None if which == "track" else r"log\.csv: fewer than two samples", run)

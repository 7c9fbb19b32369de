"""Everything a person looks at, from one grade: plots, the HTML report, the replay.

:func:`write_report` is what ``vidodo grade`` and ``vidodo report`` call after the grade
outputs (``drift.csv``, ``events.csv``, ``summary.json``) are written. It reads those
files back, so the pictures show exactly the figures the files hold.
"""

from __future__ import annotations

import json
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from ..csvsafe import read_csv_checked
from ..errors import InputError, VidodoError
from ..outputs import atomic_file
from ..timings import StageTimes, merged
from .page import write_html
from .plots import source_prefixes, write_plots

__all__ = ["GradeData", "load_grade_dir", "field_from_summary", "write_report",
           "robot_picture", "PLOT_CAPTIONS"]

PLOT_CAPTIONS = {
    "field_map": "Field map: truth track and every odometry source, events numbered "
                 "as in the events table",
    "error_vs_time": "Anchored drift over time per source (solid: distance, dashed: "
                     "along-track, dotted: cross-track); event windows shaded",
    "speed": "Ground speed of the truth track against each odometry source",
    "plan": "This run's camera placement: expected 1-sigma position error and marker "
            "cell size over the field (vidodo plan's model, this run's corner noise)",
    "robot": "The robot profile used, from above to scale (front up): wheels, count "
             "directions, rollers, tracking-wheel lever arms, markers",
}


@dataclass(frozen=True)
class GradeData:
    """The grade outputs of one run, as read back from its folder."""

    drift: pd.DataFrame
    """Drift table, one row per truth sample (SI units, see DEVELOPERS.md)."""
    events: pd.DataFrame
    """Events table, one row per event."""
    summary: dict
    """Content of summary.json."""
    folder: Path | None = None
    """The grade folder the data came from."""
    field: object | None = None
    """Field profile (tile grid) when it could be found, else None."""

    @property
    def sources(self) -> dict[str, str]:
        """Source display name -> drift column prefix, in summary order."""
        return source_prefixes(self.drift, (self.summary.get("sources") or {}).keys())


def _read_csv(path: Path) -> pd.DataFrame:
    return read_csv_checked(path, f"run `vidodo grade --out {path.parent}` first",
                            "grade the run again", keep_default_na=True)


def field_from_summary(summary: dict, folder: Path | None = None):
    """The field profile a grade used, or None when it cannot be found.

    Looked for, in order: a ``field`` table in the summary (``tiles_x, tiles_y,
    tile_size_m``), ``inputs.field`` as a path to field.toml (relative to the grade
    folder or absolute), ``field.toml`` in the grade folder.
    """
    from ..profiles import FieldProfile, load_field

    f = summary.get("field")
    if isinstance(f, dict) and {"tiles_x", "tiles_y", "tile_size_m"} <= set(f):
        try:
            from ..plausible import check_field

            fp = FieldProfile(int(f["tiles_x"]), int(f["tiles_y"]), float(f["tile_size_m"]))
            check_field(fp)  # bounds the tile grid drawn
            return fp
        except (TypeError, ValueError, OverflowError):
            pass
    candidates = []
    p = (summary.get("inputs") or {}).get("field")
    if isinstance(p, str) and p:
        candidates.append(Path(p))
        if folder is not None:
            candidates.append(folder / p)
    if folder is not None:
        candidates.append(folder / "field.toml")
    for c in candidates:
        if c.is_file():
            try:
                return load_field(c)
            except InputError:
                continue
    return None


def load_grade_dir(folder) -> GradeData:
    """Read ``drift.csv``, ``events.csv`` and ``summary.json`` of a grade folder.

    Raises
    ------
    InputError
        Naming the missing or unreadable file.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: not a folder; give the --out folder of `vidodo grade`")
    spath = folder / "summary.json"
    try:
        summary = json.loads(spath.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"{spath}: file not found; run `vidodo grade --out {folder}` "
                         "first") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{spath}: not valid JSON ({exc}); grade the run again") from None
    if not isinstance(summary, dict):
        raise InputError(f"{spath}: expected a JSON object; grade the run again")
    drift = _read_csv(folder / "drift.csv")
    for col in ("t_s", "truth_x_m", "truth_y_m"):
        if col not in drift:
            raise InputError(f"{folder / 'drift.csv'}: missing column '{col}'; "
                             "grade the run again")
    epath = folder / "events.csv"
    events = _read_csv(epath) if epath.is_file() else pd.DataFrame(
        columns=["kind", "t_start_s", "t_end_s", "x_m", "y_m", "magnitude",
                 "magnitude_unit", "sources", "detail"])
    return GradeData(drift=drift, events=events, summary=summary, folder=folder,
                     field=field_from_summary(summary, folder))


def _grade_folder_of(grade_result_or_dir, out_dir: Path) -> Path:
    """A folder holding the grade outputs: the given one, or ``out_dir`` after writing."""
    if isinstance(grade_result_or_dir, str | Path):
        return Path(grade_result_or_dir)
    if (out_dir / "summary.json").is_file() and (out_dir / "drift.csv").is_file():
        return out_dir
    from . import grade_files  # written by the grading stage

    grade_files.write_outputs(grade_result_or_dir, out_dir)
    return out_dir


def _run_title(summary: dict) -> str:
    inputs = summary.get("inputs") or {}
    run = inputs.get("run") or inputs.get("video") or ""
    if not run:
        return ""
    p = Path(str(run))
    return p.parent.name if p.name == "video.mp4" and p.parent.name else p.name


def robot_picture(summary: dict, folder: Path | None, out_dir: Path) -> dict[str, Path]:
    """``{'robot': robot.png}`` drawn from the profile named in ``summary.inputs.robot``.

    Empty when that profile cannot be found or read any more (the report is still
    written without it).
    """
    from ..profiles import load_robot
    from ..robot_picture import PICTURE_NAME, write_robot_picture

    p = (summary.get("inputs") or {}).get("robot")
    if not isinstance(p, str) or not p:
        return {}
    for cand in ([Path(p)] + ([folder / p] if folder is not None else [])):
        if cand.is_file():
            try:
                robot = load_robot(cand)
            except InputError:
                return {}
            return {"robot": write_robot_picture(robot, out_dir / PICTURE_NAME)}
    return {}


def _registration(data):
    """The report's registration section data (None when the grade has no
    registrations)."""
    from ..registration_report import registration_summary

    return registration_summary(data)


def write_report(grade_result_or_dir, out_dir, *, replay: bool = True, units: str = "mm",
                 progress=None, grid: bool = True, replay_scale: float | None = None,
                 registrar=None) -> list[Path]:
    """Write the plots, the HTML report and (optionally) the annotated replay.

    Parameters
    ----------
    grade_result_or_dir : GradeResult or path
        A grade folder holding drift.csv, events.csv and summary.json, or a
        ``GradeResult`` (its outputs are written into ``out_dir`` first unless they are
        already there).
    out_dir : path
        Where the pictures go (usually the grade folder itself).
    replay : bool
        Also write ``replay.mp4`` (needs the footage named in ``summary.inputs.video``
        and the robot profile in ``summary.inputs.robot``).
    units : {'mm', 'in', 'm'}
        Display unit for lengths.
    progress : callable, optional
        ``progress(done, total)`` for the replay's frames.
    grid : bool
        Draw the registered tile grid, faint, on every frame of the replay.
    replay_scale : float, optional
        Size of the replay relative to the footage (default
        :data:`vidodo.report.replay.DEFAULT_SCALE`; 1 for full resolution).
    registrar : FloorRegistrar, optional
        The registrar the tracker used on this footage: the replay follows the floor
        from where tracking left it instead of registering from scratch.

    Returns
    -------
    list of Path
        The files written: three PNGs (plus ``robot.png`` when the robot profile
        named in the summary can be read, and ``plan.png`` when also the footage and
        field can), ``report.html`` and, if asked, ``replay.mp4``.
        When ``out_dir`` holds the grade's ``summary.json``, the seconds spent on the
        pictures and the replay are added to its ``timings_s``.

    Raises
    ------
    InputError
        When the grade files cannot be read, or the replay could not be written (the
        plots and the report are written first; the report says why the replay is
        missing).
    """
    out_dir = Path(out_dir)
    folder = _grade_folder_of(grade_result_or_dir, out_dir)
    data = load_grade_dir(folder)
    title = _run_title(data.summary)
    times = StageTimes()
    job = None
    if replay:  # on a second thread while the plots are drawn (see _ReplayJob)
        job = _ReplayJob(data, out_dir / "replay.mp4", times, progress,
                         dict(units=units, scale=replay_scale, registration=registrar,
                              grid=grid))
    try:
        with times.stage("pictures"):
            pngs = write_plots(data.drift, data.events, out_dir, field=data.field,
                               sources=data.sources, unit=units, title=title)
            pngs.update(robot_picture(data.summary, data.folder, out_dir))
            from ..plan_picture import plan_of_grade

            pngs.update(plan_of_grade(data.summary, data.folder, out_dir))
    except BaseException:
        if job is not None:
            job.stop()
        raise
    written = list(pngs.values())
    extra = []
    failure = None
    if job is not None:
        try:
            path = job.result()
        except VidodoError as exc:  # the report is still written, then the error raised
            failure = exc
            extra.append(f"replay.mp4 not written: {exc}")
        else:
            written.append(path)
            extra.append(f"{path.name}: the footage with the truth track and every source "
                         "drawn in")
    images = {PLOT_CAPTIONS.get(k, k): p for k, p in pngs.items()}
    with times.stage("pictures"):
        html_path = write_html(out_dir / "report.html", data.summary, images, unit=units,
                               title=f"vidodo report: {title}" if title else None,
                               extra_files=extra, registration=_registration(data))
    written.append(html_path)
    _record_times(out_dir / "summary.json", times.as_dict())
    if failure is not None:
        raise failure
    return written


class _ReplayStopped(Exception):
    """Raised in the replay's thread to stop it at the next frame."""


class _ReplayJob:
    """The replay written on a thread of its own, beside the plots.

    Decoding, drawing and encoding the replay spend most of their time in OpenCV and
    FFmpeg, which release the GIL, so the plots (Python and Matplotlib) are drawn on the
    other core meanwhile. :meth:`stop` ends it at the next frame (an interrupt of the
    main thread); :meth:`result` waits and returns its path or raises its error.
    """

    def __init__(self, data, path, times, progress, options):
        self._stop = threading.Event()
        self._outcome: list = []

        def step(done, total):
            if self._stop.is_set():
                raise _ReplayStopped
            if progress is not None:
                progress(done, total)

        def work():
            from .replay import replay_from_grade

            t0 = time.perf_counter()
            try:
                self._outcome.append(replay_from_grade(data, path, progress=step,
                                                       **options))
            except BaseException as exc:  # noqa: BLE001 - handed to result()
                self._outcome.append(exc)
            finally:
                times.add("replay", time.perf_counter() - t0)

        self._thread = threading.Thread(target=work, name="vidodo-replay", daemon=True)
        self._thread.start()

    def stop(self):
        """Ask the replay to stop and wait until it has."""
        self._stop.set()
        self._thread.join()

    def result(self):
        """The replay's path, once written; its exception if it failed."""
        self._thread.join()
        outcome = self._outcome[0]
        if isinstance(outcome, BaseException):
            raise outcome
        return outcome


def _record_times(summary_path: Path, table: dict) -> None:
    """Add the report's stage times to the ``timings_s`` of ``summary_path`` (if the
    grade's summary is there: the report may be written elsewhere)."""
    if not summary_path.is_file():
        return
    try:
        summary = json.loads(summary_path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return  # not a summary this report may touch
    if not isinstance(summary, dict):
        return
    summary["timings_s"] = merged(summary.get("timings_s"), table)
    with atomic_file(summary_path) as tmp:
        tmp.write_text(json.dumps(summary, indent=2, allow_nan=False), encoding="utf-8")


"""Grading run folders: one with every output, or many in parallel.

A run folder holds ``video.mp4``, ``log.csv``, ``robot.toml``, ``field.toml`` and
optionally ``camera.toml`` (the layout ``vidodo render`` writes; see DEVELOPERS.md).
:func:`grade_run_folder` grades one and writes the grade files, the plots, the HTML
report and optionally the replay and a corrected profile. :func:`grade_folders` grades
many in worker processes (a run that fails does not stop the others),
:func:`batch_table` makes one row per run and :func:`write_batch_outputs` writes
``batch.csv`` and ``drift_trend.png``.
"""

from __future__ import annotations

import multiprocessing
import os
import time
import traceback
from concurrent.futures import ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path

import numpy as np
import pandas as pd

from .csvsafe import write_csv
from .errors import EXIT_MEASURE, EXIT_OK, EXIT_PARTIAL, InputError, VidodoError
from .outputs import column_prefix, staged_dir
from .pipeline import GradeResult, GradeSettings, Tolerances, grade_run
from .report.build import write_report
from .report.grade_files import write_outputs
from .report.plots import save_figure, trend_figure
from .tuning import tune_from_grade

__all__ = ["RUN_FILES", "ROW_FIGURES", "find_runs", "run_name", "grade_run_folder",
           "grade_one", "grade_folders", "batch_table", "exit_code_for",
           "write_batch_outputs"]

RUN_FILES = ("video.mp4", "log.csv", "robot.toml", "field.toml")
"""Files every run folder must hold (camera.toml is optional)."""
ROW_FIGURES = ("final_err_m", "ate_rmse_m", "drift_pct", "max_err_m",
               "final_heading_err_rad", "pass")
"""Per-source figures copied from summary.json into the batch table."""
TABLE = "batch.csv"
TREND_PNG = "drift_trend.png"



def grade_run_folder(run_dir, out_dir, *, tolerances=None, report=True, replay=True,
                     units="mm", tune=False, progress=None) -> GradeResult:
    """Grade a run folder (``video.mp4``, ``log.csv``, ``robot.toml``, ``field.toml``,
    optional ``camera.toml``; see DEVELOPERS.md) and write every output into ``out_dir``.

    Writes the grade outputs (:func:`vidodo.report.grade_files.write_outputs`),
    optionally a corrected robot profile (:func:`vidodo.tuning.tune_from_grade`) into
    ``out_dir/tune``, then the plots and the HTML report
    (:func:`vidodo.report.build.write_report`). The run folder's ``truth/`` is never read.

    Parameters
    ----------
    run_dir, out_dir : str or Path
        The run folder, and the folder to write.
    tolerances : Tolerances, optional
        Pass/fail limits; none by default.
    report : bool
        Write the plots and ``report.html`` (written with the replay too).
    replay : bool
        Write ``replay.mp4`` (the footage with truth and sources drawn in).
    units : {"mm", "in", "m"}
        Length unit of the pictures (files stay SI).
    tune : bool
        Also fit the robot profile (``out_dir/tune/robot.toml`` and ``fit.csv``).
    progress : callable, optional
        Progress factory for the tracker and the replay.

    Returns
    -------
    GradeResult
    """
    run_dir, out_dir = Path(run_dir), Path(out_dir)
    missing = [f for f in RUN_FILES if not (run_dir / f).is_file()]
    if missing:
        raise InputError(f"{run_dir}: missing {', '.join(missing)}; a run folder needs "
                         f"{', '.join(RUN_FILES)}")
    from .profiles import load_camera, load_field
    from .registration.registrar import FloorRegistrar

    cam = run_dir / "camera.toml"
    field = load_field(run_dir / "field.toml")
    camera = load_camera(cam) if cam.is_file() else None
    registrar = FloorRegistrar(field, camera)  # handed on to the replay
    # one staged set: grade files, tune folder and pictures appear together or not at all
    with staged_dir(out_dir, inputs=(run_dir,), command="vidodo grade") as stage:
        result = grade_run(run_dir / "video.mp4", run_dir / "log.csv",
                           run_dir / "robot.toml", field, camera,
                           settings=GradeSettings(tolerances=tolerances or Tolerances(),
                                                  registrar=registrar),
                           progress=progress)
        write_outputs(result, stage)
        if tune:
            tune_from_grade(result, run_dir, stage / "tune")
        if report or replay:
            write_report(stage, stage, replay=replay, units=units, progress=progress,
                         registrar=registrar)
    return result


# ------------------------------------------------------------------ finding runs
def find_runs(root) -> list[Path]:
    """Run folders under ``root``: folders holding a ``video.mp4`` or a ``log.csv``.

    Folders named ``truth`` and hidden folders are not searched; a run folder's own
    subfolders are not searched either. Sorted by path.
    """
    root = Path(root)
    if not root.is_dir():
        raise InputError(f"{root}: not a folder; give the folder that holds the run folders")
    found = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = sorted(d for d in dirnames if not d.startswith(".") and d != "truth")
        if "video.mp4" in filenames or "log.csv" in filenames:
            found.append(Path(dirpath))
            dirnames[:] = []
    return sorted(found)


def run_name(run_dir: Path, root: Path) -> str:
    """The run's name in the table: its path below ``root`` ('.' for root itself)."""
    rel = Path(run_dir).resolve().relative_to(Path(root).resolve())
    return rel.as_posix() if rel.parts else Path(root).resolve().name


# ------------------------------------------------------------------ one run
def _init_worker():
    """Worker start: one OpenCV thread per process (OpenCV threads fight over 2 cores and
    leak in detectors when several run at once: opencv issue 27714)."""
    import cv2

    cv2.setNumThreads(1)


def grade_one(run_dir, out_dir, options: dict) -> dict:
    """Grade one run folder into ``out_dir``; never raises.

    Parameters
    ----------
    run_dir, out_dir : path
    options : dict
        ``tol_pos_m``, ``tol_heading_rad`` (None for no tolerance), ``report`` (bool),
        ``replay`` (bool), ``units``, ``replay_scale`` (None for the default).

    Returns
    -------
    dict
        ``status`` ('graded' or 'failed'), ``exit_code``, ``error`` (one line),
        ``summary`` (the summary.json content when graded), ``seconds``.
    """
    t0 = time.perf_counter()
    run_dir, out_dir = Path(run_dir), Path(out_dir)
    try:
        tol = Tolerances(position_m=options.get("tol_pos_m"),
                         heading_rad=options.get("tol_heading_rad"))
        warnings = []
        with staged_dir(out_dir, inputs=(run_dir,), command="vidodo batch") as stage:
            result = grade_run_folder(run_dir, stage, tolerances=tol, report=False,
                                      replay=False)
            summary = result.summary
            if options.get("report", True) or options.get("replay", False):
                try:
                    write_report(stage, stage, replay=bool(options.get("replay")),
                                 units=options.get("units", "mm"),
                                 replay_scale=options.get("replay_scale"))
                except VidodoError as exc:  # the grade stands; the pictures are extra
                    warnings.append(f"report not written: {exc}")
        return {"status": "graded", "exit_code": 4 if summary.get("verdict") == "fail" else 0,
                "error": "; ".join(warnings), "summary": summary,
                "seconds": time.perf_counter() - t0}
    except VidodoError as exc:
        return {"status": "failed", "exit_code": exc.exit_code, "error": _one_line(exc),
                "summary": None, "seconds": time.perf_counter() - t0}
    except Exception as exc:  # a bug in one run must not stop the batch
        tb = traceback.extract_tb(exc.__traceback__)
        where = f" at {Path(tb[-1].filename).name}:{tb[-1].lineno}" if tb else ""
        return {"status": "failed", "exit_code": 1,
                "error": f"internal error: {type(exc).__name__}: {_one_line(exc)}{where}",
                "summary": None, "seconds": time.perf_counter() - t0}


def _one_line(exc) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


# ------------------------------------------------------------------ many runs
def grade_folders(run_dirs, root, out_root, options: dict, *, jobs: int = 1,
                  grade_fn=grade_one, on_done=None, scheduler=None) -> list[dict]:
    """Grade many run folders in worker processes, or on a Dask cluster.

    Parameters
    ----------
    run_dirs : list of Path
    root : Path
        The folder the runs were found under (names in the table are relative to it).
    out_root : Path
        Each run's outputs go to ``out_root/<name>``.
    options : dict
        Passed to ``grade_fn``.
    jobs : int
        Worker processes; 1 still uses one worker so a crash cannot take the batch down.
    grade_fn : callable
        ``grade_fn(run_dir, out_dir, options) -> dict`` (see :func:`grade_one`); must be
        importable by name (it runs in a freshly started process).
    on_done : callable, optional
        ``on_done(record)`` after each run (for progress and printing).
    scheduler : str or distributed.Client, optional
        A Dask scheduler's address: the runs are tasks on its workers
        (:mod:`vidodo.batch_dask`) instead of local processes; ``jobs`` is then unused.

    Returns
    -------
    list of dict
        One record per run, in the order of ``run_dirs``: ``run``, ``folder``, ``out``
        and the keys of :func:`grade_one`.
    """
    names = [run_name(d, root) for d in run_dirs]
    records: dict[int, dict] = {}
    pending = list(range(len(run_dirs)))

    def finish(i, res):
        rec = {"run": names[i], "folder": str(run_dirs[i]),
               "out": str(Path(out_root) / names[i]), **res}
        records[i] = rec
        if on_done is not None:
            on_done(rec)

    def attempt(indices, workers):
        """Run ``indices``; return those lost to a crashed pool."""
        lost = []
        # 'spawn': a forked child of a process whose OpenCV thread pool has run can
        # deadlock in its first OpenCV call; fresh interpreters cannot
        ctx = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(max_workers=workers, initializer=_init_worker,
                                 mp_context=ctx) as pool:
            futs = {pool.submit(grade_fn, run_dirs[i], Path(out_root) / names[i], options): i
                    for i in indices}
            try:
                for fut in as_completed(futs):
                    i = futs[fut]
                    try:
                        finish(i, fut.result())
                    except BrokenProcessPool:
                        lost.append(i)
                    except Exception as exc:  # e.g. a result that cannot be pickled
                        finish(i, {"status": "failed", "exit_code": 1, "summary": None,
                                   "error": f"internal error: {type(exc).__name__}: {exc}",
                                   "seconds": float("nan")})
            except BaseException:  # Ctrl-C, SIGTERM: stop our workers now, not after
                pool.shutdown(wait=False, cancel_futures=True)
                for proc in multiprocessing.active_children():
                    proc.terminate()
                raise
        return lost

    if scheduler is not None:
        from .batch_dask import grade_folders_dask

        grade_folders_dask(run_dirs, names, out_root, options, scheduler,
                           grade_fn=grade_fn, finish=finish)
        return [records[i] for i in range(len(run_dirs))]
    lost = attempt(pending, max(1, min(jobs, len(pending)))) if pending else []
    # a worker died (a crash in native code): retry the runs it took down one by one,
    # so only the run that crashes is reported as failed
    for i in lost:
        if attempt([i], 1):
            finish(i, {"status": "failed", "exit_code": 1, "summary": None,
                       "error": "the worker process died while grading this run (a crash "
                                "in native code; try `vidodo grade` on it with --debug)",
                       "seconds": float("nan")})
    return [records[i] for i in range(len(run_dirs))]


def batch_table(records) -> pd.DataFrame:
    """One row per run: status, error, clock, events and the figures per source.

    Columns: ``run, status, exit_code, error, verdict, n_events, clock_offset_s,
    seconds, out``, then ``<src>_<figure>`` for every source seen (``<src>`` as in
    drift.csv, figures of :data:`ROW_FIGURES`, SI units).
    """
    rows = []
    for r in records:
        s = r.get("summary") or {}
        row = {"run": r["run"], "status": r["status"], "exit_code": r["exit_code"],
               "error": r.get("error") or "", "verdict": s.get("verdict", ""),
               "n_events": len(s.get("events") or []) if s else np.nan,
               "clock_offset_s": (s.get("clock") or {}).get("offset_s", np.nan) if s
               else np.nan,
               "seconds": r.get("seconds", np.nan), "out": r.get("out", "")}
        for name, m in (s.get("sources") or {}).items():
            for fig in ROW_FIGURES:
                v = m.get(fig)
                row[f"{column_prefix(name)}_{fig}"] = np.nan if v is None else v
        rows.append(row)
    table = pd.DataFrame(rows)
    table.attrs["source_names"] = {
        column_prefix(n): n for r in records for n in ((r.get("summary") or {}).get("sources")
                                                 or {})}
    return table


def exit_code_for(records) -> int:
    """0 when every run was graded, 5 when some were, 3 when none was."""
    graded = sum(r["status"] == "graded" for r in records)
    if graded == len(records):
        return EXIT_OK
    return EXIT_PARTIAL if graded else EXIT_MEASURE


def write_batch_outputs(records, out_root, *, unit: str = "mm") -> tuple[Path, Path]:
    """Write ``batch.csv`` and ``drift_trend.png`` into ``out_root``."""
    from .outputs import atomic_file

    out_root = Path(out_root)
    out_root.mkdir(parents=True, exist_ok=True)
    table = batch_table(records)
    with atomic_file(out_root / TABLE) as tmp:
        write_csv(table, tmp, float_format="%.6g")
    with atomic_file(out_root / TREND_PNG) as tmp:
        save_figure(trend_figure(table, unit=unit), tmp)
    return out_root / TABLE, out_root / TREND_PNG

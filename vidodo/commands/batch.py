"""``vidodo batch DIR --out OUT``: grade every run folder under DIR in parallel.

A run folder holds ``video.mp4``, ``log.csv``, ``robot.toml``, ``field.toml`` and
optionally ``camera.toml`` (the layout ``vidodo render`` writes). Each run is graded in
its own worker process into ``OUT/<run>/`` (drift.csv, events.csv, summary.json, plots,
report.html). A run that fails is reported with its error and does not stop the
others. ``OUT/batch.csv`` has one row per run; ``OUT/drift_trend.png`` shows each
source's drift across the runs, in folder-name order (name runs by date to see a
season's trend).

Exit codes: 0 every run graded, 5 some graded and some failed, 3 none graded, 2 no run
folder found or bad arguments.
"""

from __future__ import annotations

import math
import multiprocessing
import os
import sys
import time
import traceback
from concurrent.futures import ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import EXIT_MEASURE, EXIT_OK, EXIT_PARTIAL, InputError, VidodoError

NAME = "batch"
HELP = "grade every run folder under a directory, in parallel; one table for all"
DESCRIPTION = (
    "Grade every run folder (video.mp4, log.csv, robot.toml, field.toml, optional "
    "camera.toml) found under DIR, in parallel worker processes. Each run's outputs go "
    "to OUT/<run>/; OUT/batch.csv has one row per run (status, error, figures per "
    "source) and OUT/drift_trend.png plots drift across runs. A failing run does not "
    "stop the others. Exit 0 all graded, 5 some failed, 3 none graded."
)

RUN_FILES = ("video.mp4", "log.csv", "robot.toml", "field.toml")
"""Files every run folder must hold (camera.toml is optional)."""
ROW_FIGURES = ("final_err_m", "ate_rmse_m", "drift_pct", "max_err_m",
               "final_heading_err_rad", "pass")
"""Per-source figures copied from summary.json into the batch table."""
TABLE = "batch.csv"
TREND_PNG = "drift_trend.png"


def add_arguments(parser):
    """Options of the verb."""
    parser.add_argument("dir", type=Path, help="folder holding run folders (searched deeply)")
    parser.add_argument("--out", type=Path, required=True, help="output folder")
    parser.add_argument("--jobs", type=int, default=None,
                        help="worker processes (default: number of CPUs)")
    parser.add_argument("--units", choices=("mm", "in", "m"), default="mm",
                        help="length unit of the printed lines and plots (files stay SI)")
    parser.add_argument("--replay", action="store_true",
                        help="also write each run's annotated replay (slow)")
    parser.add_argument("--no-report", action="store_true",
                        help="skip each run's plots and HTML report")
    parser.add_argument("--tol-pos-m", type=float, metavar="M",
                        help="largest final position error that passes [m]")
    parser.add_argument("--tol-heading-deg", type=float, metavar="DEG",
                        help="largest final heading error that passes [deg]")


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
        ``replay`` (bool), ``units``.

    Returns
    -------
    dict
        ``status`` ('graded' or 'failed'), ``exit_code``, ``error`` (one line),
        ``summary`` (the summary.json content when graded), ``seconds``.
    """
    t0 = time.perf_counter()
    run_dir, out_dir = Path(run_dir), Path(out_dir)
    try:
        missing = [f for f in RUN_FILES if not (run_dir / f).is_file()]
        if missing:
            raise InputError(f"{run_dir}: missing {', '.join(missing)}; a run folder needs "
                             f"{', '.join(RUN_FILES)}")
        from ..pipeline import Tolerances, grade_run
        from ..report.grade_files import write_outputs

        cam = run_dir / "camera.toml"
        tol = Tolerances(position_m=options.get("tol_pos_m"),
                         heading_rad=options.get("tol_heading_rad"))
        result = grade_run(run_dir / "video.mp4", run_dir / "log.csv", run_dir / "robot.toml",
                           run_dir / "field.toml", cam if cam.is_file() else None,
                           tolerances=tol)
        write_outputs(result, out_dir)
        summary = result.summary
        warnings = []
        if options.get("report", True) or options.get("replay", False):
            from ..report.build import render_all

            try:
                render_all(out_dir, out_dir, replay=bool(options.get("replay")),
                           units=options.get("units", "mm"))
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
                  grade_fn=grade_one, on_done=None) -> list[dict]:
    """Grade many run folders in worker processes.

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
        return lost

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


def _prefix(name: str) -> str:
    from ..report.plots import column_prefix

    return column_prefix(name)


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
                row[f"{_prefix(name)}_{fig}"] = np.nan if v is None else v
        rows.append(row)
    table = pd.DataFrame(rows)
    table.attrs["source_names"] = {
        _prefix(n): n for r in records for n in ((r.get("summary") or {}).get("sources")
                                                 or {})}
    return table


def trend_figure(table: pd.DataFrame, *, unit: str = "mm"):
    """Drift across runs: final error and ATE per source, failed runs marked."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from ..report.plots import source_colors
    from ..units import length_factor

    k = length_factor(unit)
    srcs = [c[: -len("_final_err_m")] for c in table.columns if c.endswith("_final_err_m")]
    names = table.attrs.get("source_names", {})
    colors = source_colors(srcs)
    n = len(table)
    fig = Figure(figsize=(max(7.0, 1.0 + 0.55 * n), 6.4), dpi=110)
    FigureCanvasAgg(fig)
    axes = fig.subplots(2, 1, sharex=True)
    x = np.arange(n)
    failed = (table["status"] != "graded").to_numpy() if n else np.zeros(0, bool)
    for ax, fig_key, label in ((axes[0], "final_err_m", "final error"),
                               (axes[1], "ate_rmse_m", "ATE (best fit)")):
        for s in srcs:
            col = f"{s}_{fig_key}"
            if col in table:
                y = pd.to_numeric(table[col], errors="coerce").to_numpy(float) * k
                ax.plot(x, y, "o-", color=colors[s], lw=1.4, ms=5, label=names.get(s, s))
        for xi in x[failed]:
            ax.axvspan(xi - 0.4, xi + 0.4, color="#d32f2f", alpha=0.12, lw=0)
        ax.set_ylabel(f"{label} [{unit}]")
        ax.set_ylim(bottom=0)
        ax.grid(True, lw=0.3, alpha=0.6)
    if failed.any():
        axes[0].plot([], [], "s", color="#d32f2f", alpha=0.3, ms=10, label="not graded")
    axes[0].legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    axes[1].set_xticks(x)
    axes[1].set_xticklabels(list(table["run"]) if n else [], rotation=35, ha="right",
                            fontsize=8)
    axes[1].set_xlabel("run (folder-name order)")
    fig.suptitle(f"Drift across {n} runs ({int((~failed).sum())} graded)")
    fig.tight_layout()
    return fig


def exit_code_for(records) -> int:
    """0 when every run was graded, 5 when some were, 3 when none was."""
    graded = sum(r["status"] == "graded" for r in records)
    if graded == len(records):
        return EXIT_OK
    return EXIT_PARTIAL if graded else EXIT_MEASURE


def write_batch_outputs(records, out_root, *, unit: str = "mm") -> tuple[Path, Path]:
    """Write ``batch.csv`` and ``drift_trend.png`` into ``out_root``."""
    from ..outputs import atomic_file

    out_root = Path(out_root)
    out_root.mkdir(parents=True, exist_ok=True)
    table = batch_table(records)
    with atomic_file(out_root / TABLE) as tmp:
        table.to_csv(tmp, index=False, float_format="%.6g")
    with atomic_file(out_root / TREND_PNG) as tmp:
        trend_figure(table, unit=unit).savefig(tmp, format="png")
    return out_root / TABLE, out_root / TREND_PNG


def _line(rec, unit) -> str:
    from ..units import format_length

    if rec["status"] != "graded":
        return f"FAILED  {rec['run']}: {rec['error']}"
    s = rec["summary"] or {}
    parts = []
    for name, m in (s.get("sources") or {}).items():
        parts.append(f"{name} {format_length(m.get('final_err_m'), unit)}")
    verdict = s.get("verdict", "")
    return f"{verdict:<7} {rec['run']}: final error " + ", ".join(parts)


def run(args) -> int:
    """Find, grade in parallel, write the table and the trend plot."""
    from ..progress import progress_bar

    if args.jobs is not None and args.jobs < 1:
        raise InputError(f"--jobs {args.jobs}: must be at least 1")
    for opt in ("tol_pos_m", "tol_heading_deg"):
        v = getattr(args, opt)
        if v is not None and not (v > 0):
            raise InputError(f"--{opt.replace('_', '-')} must be positive")
    out_root = args.out.resolve()
    runs = [d for d in find_runs(args.dir) if out_root not in (d.resolve(),
                                                                *d.resolve().parents)]
    if not runs:
        raise InputError(f"{args.dir}: no run folder found (a folder holding video.mp4 and "
                         "log.csv); check the path")
    jobs = args.jobs or os.cpu_count() or 1
    options = {"tol_pos_m": args.tol_pos_m,
               "tol_heading_rad": None if args.tol_heading_deg is None
               else math.radians(args.tol_heading_deg),
               "report": not args.no_report, "replay": args.replay, "units": args.units}
    with progress_bar(len(runs), "batch", unit="run", quiet=args.quiet) as bar:
        records = grade_folders(runs, args.dir, out_root, options, jobs=jobs,
                                on_done=lambda rec: bar.update(1))
    table, trend = write_batch_outputs(records, out_root, unit=args.units)
    graded = sum(r["status"] == "graded" for r in records)
    for rec in records:
        if rec["status"] != "graded":
            print(f"vidodo batch: {rec['run']}: {rec['error']}", file=sys.stderr)
    if not args.quiet:
        for rec in records:
            print(_line(rec, args.units))
        print(f"graded {graded} of {len(records)} runs; table {table}; trend {trend}")
    return exit_code_for(records)

"""Grading run folders on a Dask distributed cluster (``vidodo batch --scheduler ADDRESS``).

The same work as the local pool of :func:`vidodo.batch.grade_folders`: one task per run
folder, each calling the grading function (:func:`vidodo.batch.grade_one`, which never
raises and writes only into its own ``OUT/<run>/``), so one bad run does not stop the
others and the records, table and exit code are those of a local batch. A task whose
worker dies (a crash in native code) is failed by the scheduler after its retries and
reported as a failed run. Interrupting (Ctrl-C) cancels every task not yet finished.

Workers read the run folders and write the outputs by the paths the client gives, so
every worker must see the same paths (a shared file system mounted alike) and have
vidodo installed (``pip install 'vidodo[dask]'``). Needs the optional ``distributed``
package; without it :func:`grade_folders_dask` raises :class:`vidodo.errors.InputError`.
"""

from __future__ import annotations

from pathlib import Path

from .errors import InputError

__all__ = ["grade_folders_dask", "run_task"]


def run_task(grade_fn, run_dir, out_dir, options: dict) -> dict:
    """One run on a worker: one OpenCV thread (several tasks share a worker's cores),
    then ``grade_fn(run_dir, out_dir, options)``."""
    import cv2

    cv2.setNumThreads(1)
    return grade_fn(run_dir, out_dir, options)


def _client(scheduler):
    """A client for ``scheduler`` (an address such as ``tcp://host:8786``, or a client
    or cluster object already made)."""
    try:
        from distributed import Client
    except ImportError:
        raise InputError("--scheduler needs the 'distributed' package; install it with "
                         "pip install 'vidodo[dask]'") from None
    if isinstance(scheduler, Client):
        return scheduler, False
    try:
        return Client(scheduler, timeout="10s", set_as_default=False), True
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"--scheduler {scheduler}: cannot connect ({exc}); start the "
                         "scheduler first (dask scheduler) or check the address") from None


def grade_folders_dask(run_dirs, names, out_root, options: dict, scheduler, *,
                       grade_fn, finish) -> None:
    """Grade every run folder as a task on the cluster at ``scheduler``.

    Parameters
    ----------
    run_dirs, names : list
        Run folders and their names in the table (outputs go to ``out_root/<name>``).
    out_root : Path
    options : dict
        Passed to ``grade_fn``.
    scheduler : str or distributed.Client
        Scheduler address, or a client.
    grade_fn : callable
        Importable by name on the workers (see :func:`vidodo.batch.grade_one`).
    finish : callable
        ``finish(i, result_dict)`` for run ``i`` as it completes.
    """
    from distributed import as_completed

    client, own = _client(scheduler)
    futures = {}
    try:
        for i, run_dir in enumerate(run_dirs):
            fut = client.submit(run_task, grade_fn, Path(run_dir).resolve(),
                                (Path(out_root) / names[i]).resolve(), options,
                                key=f"vidodo-grade-{i}-{names[i]}", pure=False)
            futures[fut] = i
        with client.as_current():
            done = as_completed(list(futures))
        for fut in done:
            i = futures[fut]
            try:
                finish(i, fut.result())
            except Exception as exc:  # the worker died, or a result that cannot travel
                first = (str(exc).strip().splitlines() or ["no message"])[0]
                finish(i, {"status": "failed", "exit_code": 1, "summary": None,
                           "seconds": float("nan"),
                           "error": f"the task failed on the cluster ({type(exc).__name__}: "
                                    f"{first}); try `vidodo grade` on it with --debug"})
    except BaseException:
        client.cancel(list(futures), force=True)
        raise
    finally:
        if own:
            client.close()

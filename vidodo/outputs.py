"""Writing results so that no user file is ever lost and nothing half-written is left.

Rules (README, "Exit codes"; issue 14):

* A command writes its whole output set into a hidden staging folder beside the
  target; the set appears only when the command succeeds, at once (the target folder is
  swapped for the staging folder), and it replaces the whole previous set, so no old
  report or replay is left beside new figures.
* Every output folder carries a small manifest (:data:`MANIFEST`) listing the files
  vidodo wrote there. A folder that holds anything else (a file not in its manifest),
  or any input of the run, is refused with :class:`OutputError` (exit 2) unless the
  user passes ``--force``; even then no input is ever replaced or removed, and files
  not in the manifest are kept.
* One command at a time per target: a lock file beside the target (``flock``) makes a
  second command writing to the same folder fail at once.
* Failures of the final move (target is a file, another filesystem, no permission)
  are :class:`OutputError` (exit 2) with one line naming the path; the staging folder
  is removed.

Single files (``track --out track.csv``) go through :func:`atomic_file`, which refuses
to replace an input and, given a ``signature``, a file that is not one vidodo wrote.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import json
import math
import os
import re
import shutil
import tempfile
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["staged_dir", "atomic_file", "check_target", "check_file_target", "OutputError",
           "MANIFEST", "owned_files", "column_prefix", "jsonable"]

MANIFEST = ".vidodo-manifest.json"
"""Name of the manifest every output folder carries (JSON: ``files``, ``written_by``)."""

_ACTIVE: set[Path] = set()
"""Staging folders open in this process: writing below one needs no staging of its own."""


class OutputError(InputError):
    """The output path cannot be written safely (exit 2); the message names the path."""


# ---------------------------------------------------------------------- checks
def _resolved(paths) -> list[Path]:
    out = []
    for p in paths or ():
        if p is None:
            continue
        with contextlib.suppress(OSError, RuntimeError):
            out.append(Path(p).resolve())
    return out


def owned_files(folder) -> set[str] | None:
    """Files (relative POSIX paths) the folder's manifest lists, or None without one."""
    m = Path(folder) / MANIFEST
    try:
        data = json.loads(m.read_text(encoding="utf-8"))
        files = data["files"]
        if not isinstance(files, list) or not all(isinstance(f, str) for f in files):
            return None
        return set(files)
    except (OSError, ValueError, KeyError, TypeError):
        return None


def _first_foreign(target: Path) -> str | None:
    """The first entry of ``target`` vidodo did not write there (None if all are ours)."""
    owned = owned_files(target) or set()
    for root, dirs, files in os.walk(target):
        rel_root = Path(root).relative_to(target)
        for name in sorted(files) + [d for d in sorted(dirs)
                                     if Path(root, d).is_symlink()]:
            rel = (rel_root / name).as_posix()
            if rel != MANIFEST and rel not in owned:
                return rel
        if not files and not dirs and rel_root.parts:
            rel = rel_root.as_posix()
            if not any(f.startswith(rel + "/") for f in owned):
                return rel + "/"
    return None


def _holds_input(target: Path, inputs: list[Path]) -> Path | None:
    t = target.resolve() if target.exists() else target.absolute()
    for inp in inputs:
        if inp == t or t in inp.parents:
            return inp
    return None


def _nearest_existing(path: Path) -> Path:
    p = path.absolute()
    while not p.exists() and p.parent != p:
        p = p.parent
    return p


def check_target(target, *, inputs=(), force=False) -> None:
    """Refuse an output folder that cannot be written without losing a file.

    Parameters
    ----------
    target : path
        The output folder.
    inputs : iterable of path
        Every input file or folder of the command.
    force : bool
        Allow a folder holding other files (they are kept) or inputs (never touched).

    Raises
    ------
    OutputError
        Target is a file, holds files vidodo did not write, holds an input, or its
        parent cannot be written.
    """
    target = Path(target)
    if target.exists() and not target.is_dir():
        raise OutputError(f"{target}: exists and is not a folder; give a new or empty "
                          "folder as --out")
    inp = _holds_input(target, _resolved(inputs))
    if inp is not None and not force:
        raise OutputError(f"{target}: holds an input of this run ({inp}); write the "
                          "outputs to another folder (or add --force: inputs are never "
                          "touched)")
    if target.is_dir() and not force:
        foreign = _first_foreign(target)
        if foreign is not None:
            raise OutputError(f"{target}: holds files vidodo did not write (e.g. "
                              f"{foreign}); use a new or empty folder, or add --force to "
                              "write beside them")
    base = _nearest_existing(target.parent)
    if not base.is_dir():
        raise OutputError(f"{target}: {base} is not a folder; choose another --out")
    if not os.access(base, os.W_OK | os.X_OK):
        raise OutputError(f"{target}: cannot write in {base} (permission denied); "
                          "choose a writable folder")


# ---------------------------------------------------------------------- locking
class _Lock:
    """An exclusive ``flock`` on ``.NAME.vidodo-lock`` beside the target."""

    def __init__(self, target: Path):
        self.target = target
        self.path = target.parent / f".{target.name}.vidodo-lock"
        self.fd = None

    def acquire(self):
        for _ in range(5):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                os.close(fd)
                raise OutputError(
                    f"{self.target}: another vidodo command is writing there now; wait "
                    "for it to finish or choose another --out") from None
            try:  # the holder before us may have removed the file: lock the live one
                same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
            except FileNotFoundError:
                same = False
            if same:
                self.fd = fd
                return self
            os.close(fd)
        raise OutputError(f"{self.path}: could not take the output lock; try again")

    def release(self):
        if self.fd is None:
            return
        with contextlib.suppress(OSError):
            os.unlink(self.path)
        os.close(self.fd)
        self.fd = None


# ---------------------------------------------------------------------- staging
def _inside_active(target: Path) -> bool:
    t = target.absolute()
    return any(s == t or s in t.parents for s in _ACTIVE)


def _os_message(exc: OSError, target: Path) -> str:
    if exc.errno == errno.EXDEV:
        why = "it is on another filesystem than its parent folder"
    elif exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        why = "permission denied (or a read-only filesystem)"
    elif exc.errno == errno.ENOSPC:
        why = "the disk is full"
    else:
        why = exc.strerror or str(exc)
    return f"{target}: cannot write the outputs there ({why}); choose another --out"


def _stage_parent(target: Path) -> Path:
    """Where the staging folder goes: beside the target, or inside a mounted target."""
    if target.is_dir():
        with contextlib.suppress(OSError):
            if os.path.ismount(target) or os.stat(target).st_dev != os.stat(
                    target.parent).st_dev:
                return target
    return target.parent


def _files_below(folder: Path) -> list[str]:
    out = []
    for root, _dirs, files in os.walk(folder):
        rel = Path(root).relative_to(folder)
        out += [(rel / f).as_posix() for f in files]
    return sorted(f for f in out if f != MANIFEST)


def _write_manifest(stage: Path, files, command: str) -> None:
    from . import __version__

    (stage / MANIFEST).write_text(json.dumps(
        {"written_by": command, "vidodo_version": __version__, "files": sorted(files)},
        indent=1) + "\n", encoding="utf-8")


@contextlib.contextmanager
def staged_dir(target, *, inputs=(), force=False, carry_over=False, command="vidodo"):
    """Yield a staging folder; on success it becomes ``target`` as one set.

    Parameters
    ----------
    target : path
        The output folder.
    inputs : iterable of path
        The command's inputs: a target holding one is refused (unless ``force``), and
        no input is ever replaced or removed.
    force : bool
        Write into a folder holding other files or inputs; those are kept untouched.
    carry_over : bool
        Keep the files of the previous set that this command does not write again
        (``vidodo report`` adding pictures to a grade folder); otherwise the new set
        replaces the old one entirely.
    command : str
        Recorded in the manifest.

    Raises
    ------
    OutputError
        See :func:`check_target`; also a second command on the same target, and a
        final move that fails. Nothing is left behind.

    Notes
    -----
    Writing into a folder below a staging folder already open in this process needs
    no staging of its own: the folder is yielded as it is (created if needed).
    """
    target = Path(target)
    if target.name in ("", ".", ".."):  # "--out ." : its name and parent must be real
        target = Path(os.path.abspath(target))
    if _inside_active(target):
        target.mkdir(parents=True, exist_ok=True)
        yield target
        return
    inputs = _resolved(inputs)
    check_target(target, inputs=inputs, force=force)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        lock = _Lock(target).acquire()
    except OSError as exc:
        raise OutputError(_os_message(exc, target)) from None
    try:
        try:
            stage = Path(tempfile.mkdtemp(prefix=f".{target.name}.partial-",
                                          dir=_stage_parent(target)))
        except OSError as exc:
            raise OutputError(_os_message(exc, target)) from None
        _ACTIVE.add(stage.absolute())
        try:
            yield stage
            _ACTIVE.discard(stage.absolute())
            _commit(stage, target, inputs, carry_over=carry_over, command=command)
        finally:
            _ACTIVE.discard(stage.absolute())
            shutil.rmtree(stage, ignore_errors=True)
    finally:
        lock.release()


def _commit(stage: Path, target: Path, inputs: list[Path], *, carry_over, command):
    files = _files_below(stage)
    for rel in files:
        dest = (target / rel).absolute()
        if any(dest == i or dest.resolve() == i for i in inputs):
            raise OutputError(f"{target / rel}: is an input of this run and would be "
                              "replaced; write the outputs to another folder")
    old = (owned_files(target) or set()) if target.is_dir() else set()
    carried = sorted(f for f in old - set(files) if (target / f).is_file()) \
        if carry_over else []
    _write_manifest(stage, files + carried, command)
    try:
        if not target.exists():
            os.rename(stage, target)
        elif (stage.parent == target or _first_foreign(target) is not None
              or _holds_input(target, inputs) is not None or _is_cwd_or_above(target)):
            _merge(stage, target, files, old if not carry_over else set(), inputs)
        else:
            _swap(stage, target, carried)
    except OSError as exc:
        raise OutputError(_os_message(exc, target)) from None


def _is_cwd_or_above(target: Path) -> bool:
    """True for the working folder or one holding it: never renamed away under a shell."""
    try:
        cwd, t = Path.cwd(), target.resolve()
    except OSError:
        return True
    return cwd == t or t in cwd.parents


def _swap(stage: Path, target: Path, carried: list[str]) -> None:
    """Replace ``target`` (only vidodo's files in it) by ``stage`` in two renames."""
    moved = []
    try:
        for rel in carried:
            (stage / rel).parent.mkdir(parents=True, exist_ok=True)
            os.rename(target / rel, stage / rel)
            moved.append(rel)
        old = Path(tempfile.mkdtemp(prefix=f".{target.name}.old-", dir=target.parent))
        os.rename(target, old / "set")
        try:
            os.rename(stage, target)
        except OSError:
            os.rename(old / "set", target)
            raise
    except OSError:
        for rel in moved:
            with contextlib.suppress(OSError):
                os.rename(stage / rel, target / rel)
        raise
    shutil.rmtree(old, ignore_errors=True)


def _merge(stage: Path, target: Path, files, old_set, inputs) -> None:
    """Move the new files in one by one, keeping every file vidodo did not write."""
    for rel in files:
        (target / rel).parent.mkdir(parents=True, exist_ok=True)
        os.replace(stage / rel, target / rel)
    for rel in sorted(set(old_set) - set(files)):
        p = (target / rel).absolute()
        if p.is_file() and not any(p == i or p.resolve() == i for i in inputs):
            with contextlib.suppress(OSError):
                p.unlink()
    os.replace(stage / MANIFEST, target / MANIFEST)


# ---------------------------------------------------------------------- one file
def check_file_target(path, *, inputs=(), force=False, signature=None):
    """Refuse an output file that is a folder, an input, or a file vidodo did not write.

    See :func:`atomic_file` for the parameters; call it before long work so a mistake
    is found at once.
    """
    path = Path(path)
    if path.is_dir():
        raise OutputError(f"{path}: is a folder; give a file name for --out")
    if path.exists() and any(path.resolve() == i for i in _resolved(inputs)):
        raise OutputError(f"{path}: is an input of this command; write to another file")
    if path.exists() and signature is not None and not force:
        try:
            if callable(signature):
                ours = bool(signature(path))
            else:
                with open(path, "rb") as fh:
                    ours = fh.read(len(signature)) == signature
        except OSError as exc:
            raise OutputError(_os_message(exc, path)) from None
        if not ours and callable(signature):  # a PNG: older vidodo ones lack the mark
            raise OutputError(f"{path}: exists and was not written by vidodo (or by a "
                              "version before its pictures carried vidodo's mark); add "
                              "--force to overwrite it, or choose another file name")
        if not ours:
            raise OutputError(f"{path}: exists and was not written by vidodo; choose "
                              "another file name, or add --force to overwrite it")


@contextlib.contextmanager
def atomic_file(path, *, inputs=(), force=False, signature=None):
    """Yield a temporary path; rename it to ``path`` only if the block succeeds.

    Parameters
    ----------
    path : path
        The file to write.
    inputs : iterable of path
        Never replaced, even with ``force``.
    force : bool
        Replace an existing file that does not start with ``signature``.
    signature : bytes or callable, optional
        The first bytes of every file this command writes (e.g. its CSV header), or a
        function ``f(path) -> bool`` telling a file vidodo wrote (a PNG carrying
        vidodo's text chunk, :func:`vidodo.robot_picture.is_vidodo_png`); an existing
        file that does not match is refused unless ``force``. Without a signature an
        existing file is replaced (library use).

    Raises
    ------
    OutputError
        ``path`` is a folder, an input, or a file vidodo did not write.
    """
    path = Path(path)
    check_file_target(path, inputs=inputs, force=force, signature=signature)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.partial-", dir=path.parent,
                                   suffix=path.suffix)
    except OSError as exc:
        raise OutputError(_os_message(exc, path)) from None
    os.close(fd)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; give the usual file mode
    try:
        yield Path(tmp)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    try:
        os.replace(tmp, path)
    except OSError as exc:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise OutputError(_os_message(exc, path)) from None


def jsonable(obj):
    """``obj`` made plain for JSON: dict keys as text, tuples as lists, NumPy scalars as
    Python numbers, NaN and infinities as None (JSON null), paths as text."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def column_prefix(name: str) -> str:
    """A source name as a column prefix in every file vidodo writes.

    Lower-cased, then every character outside ``[a-z0-9]`` becomes ``_``.

    Examples
    --------
    >>> column_prefix("tracking+imu")
    'tracking_imu'
    >>> column_prefix("Drive 2")
    'drive_2'
    """
    return re.sub(r"[^a-z0-9]", "_", str(name).lower())

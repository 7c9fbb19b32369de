"""Writing results so that nothing half-written is ever left behind.

All files of one command go first into a hidden staging folder beside the target; they
are moved into place only when the command succeeds. On any error the staging folder
is removed and the target folder is left as it was.
"""

from __future__ import annotations

import contextlib
import os
import re
import shutil
import tempfile
from pathlib import Path

__all__ = ["staged_dir", "atomic_file", "column_prefix"]


@contextlib.contextmanager
def staged_dir(target):
    """Yield a staging folder; on success move its files into ``target``.

    Files already in ``target`` with the same names are replaced; others are kept.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=f".{target.name}.partial-", dir=target.parent))
    try:
        yield stage
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    target.mkdir(parents=True, exist_ok=True)
    for root, _dirs, files in os.walk(stage):
        rel = Path(root).relative_to(stage)
        (target / rel).mkdir(parents=True, exist_ok=True)
        for f in files:
            os.replace(Path(root) / f, target / rel / f)
    shutil.rmtree(stage, ignore_errors=True)


@contextlib.contextmanager
def atomic_file(path):
    """Yield a temporary path; rename it to ``path`` only if the block succeeds."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.partial-", dir=path.parent,
                               suffix=path.suffix)
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
    os.replace(tmp, path)


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

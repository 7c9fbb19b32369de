"""Progress bars for long stages, shown on stderr only when a person is watching.

Library stages take an optional ``progress`` callable; commands make one with
:func:`progress_bar`. The bar is drawn with tqdm on stderr, and is silent when stderr is
not a terminal (pipes, CI logs, worker processes) or when the user asked for
``--quiet``.
"""

from __future__ import annotations

import sys

from tqdm import tqdm

__all__ = ["Progress", "StageProgress", "progress_bar", "progress_factory", "enabled"]


def enabled(*, quiet: bool = False, stream=None) -> bool:
    """True when a bar should be drawn: not quiet and the stream is a terminal."""
    if quiet:
        return False
    stream = sys.stderr if stream is None else stream
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False


class _Bar:
    """Owns one tqdm bar (or none); closes it on :meth:`close` and on leaving ``with``."""

    _bar = None

    def close(self):
        """Remove the bar from the terminal."""
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


class Progress(_Bar):
    """A progress bar that is also a ``progress(done, total=None)`` callback.

    Use it as a context manager. Call it with the number of items done so far (absolute,
    so a stage can report from anywhere), or use :meth:`update` for increments.
    When disabled it does nothing and costs nothing.
    """

    def __init__(self, total=None, desc: str = "", *, unit: str = "frame",
                 quiet: bool = False, stream=None):
        stream = sys.stderr if stream is None else stream
        self.active = enabled(quiet=quiet, stream=stream)
        self._bar = None
        if self.active:
            self._bar = tqdm(total=total, desc=desc, unit=unit, file=stream,
                             leave=False, dynamic_ncols=True, mininterval=0.2)

    def __call__(self, done, total=None):
        """Report ``done`` items finished of ``total`` (total may change)."""
        if self._bar is None:
            return
        if total is not None and total != self._bar.total:
            self._bar.total = total
            self._bar.refresh()
        self._bar.n = done
        self._bar.refresh()

    def update(self, n=1):
        """Add ``n`` finished items."""
        if self._bar is not None:
            self._bar.update(n)

    def set_description(self, desc: str):
        """Change the label in front of the bar."""
        if self._bar is not None:
            self._bar.set_description(desc)



def progress_bar(total=None, desc: str = "", *, unit: str = "frame", quiet: bool = False,
                 stream=None) -> Progress:
    """A :class:`Progress` for a command: on stderr, off when quiet or not a terminal."""
    return Progress(total, desc, unit=unit, quiet=quiet, stream=stream)


class StageProgress(_Bar):
    """One ``progress(done, total)`` callback for a chain of stages (render, track, replay).

    Each stage reports from 0 again; when the count goes back or the total changes, the
    finished bar is closed and a new one is opened for the next stage.
    """

    def __init__(self, desc: str = "step", *, unit: str = "frame", quiet: bool = False,
                 stream=None):
        self.desc = desc
        self.unit = unit
        self.quiet = quiet
        self.stream = sys.stderr if stream is None else stream
        self.active = enabled(quiet=quiet, stream=self.stream)
        self._bar: Progress | None = None
        self._last = None
        self._total = None
        self.stages = 0

    def __call__(self, done, total=None):
        """Report ``done`` of ``total`` for the current stage."""
        if not self.active:
            return
        if self._bar is None or (self._last is not None and done < self._last) or (
                total is not None and self._total is not None and total != self._total):
            self.close()
            self.stages += 1
            self._bar = Progress(total, f"{self.desc} {self.stages}", unit=self.unit,
                                 stream=self.stream)
        self._last, self._total = done, total
        self._bar(done, total)



def progress_factory(*, quiet: bool = False, desc: str = "step", stream=None) -> StageProgress:
    """A :class:`StageProgress` for a command that runs several long stages in a row."""
    return StageProgress(desc, quiet=quiet, stream=stream)

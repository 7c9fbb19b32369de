"""Exception hierarchy and the exit codes the command line maps them to.

Exit codes (documented in the README):

====  ==============================================================
0     done; every graded source within tolerance (or none was set)
1     internal error (a bug: please report it with the traceback)
2     bad input: a file, column, frame or profile value is wrong,
      or the command line itself is wrong
3     could not measure: the input is readable but does not hold
      enough to compute the result (no marker seen, no overlap,
      too little motion, degenerate calibration)
4     graded, but at least one odometry source is outside tolerance
5     batch: some runs were graded, some failed
130   interrupted (Ctrl-C)
====  ==============================================================
"""

from __future__ import annotations

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_INPUT = 2
EXIT_MEASURE = 3
EXIT_TOLERANCE = 4
EXIT_PARTIAL = 5
EXIT_INTERRUPTED = 130


class VidodoError(Exception):
    """Base class of every error vidodo reports to the user as one line."""

    exit_code = EXIT_INTERNAL


class InputError(VidodoError, ValueError):
    """A file, column, frame or profile value is wrong; the message says what to do."""

    exit_code = EXIT_INPUT


class MeasurementError(VidodoError):
    """The input is readable but does not hold enough to compute the result."""

    exit_code = EXIT_MEASURE


class CalibrationError(MeasurementError):
    """A floor registration or lens calibration could not be fitted."""


#: What a refused registration tells the user to do instead.
REFUSAL_HINT = "give tile corners with --points or floor fiducials"


class RegistrationRefused(CalibrationError):
    """A floor registration failed its self-check: it may be wrong, so nothing is graded.

    The message is one line: ``the floor could not be registered reliably: <reason>;
    give tile corners with --points or floor fiducials``. ``preview_bgr`` holds the
    preview image (the fitted grid over the reference frame), or None.
    """

    def __init__(self, reason: str, preview_bgr=None):
        super().__init__(f"the floor could not be registered reliably: {reason}; "
                         f"{REFUSAL_HINT}")
        self.reason = reason
        self.preview_bgr = preview_bgr


class TrackingError(MeasurementError):
    """The robot's marker could not be tracked."""


class SyncError(MeasurementError):
    """The log clock could not be put on the video clock."""


class ObservabilityError(InputError):
    """A wheel layout cannot determine part of the body motion."""


class Interrupted(KeyboardInterrupt):
    """SIGTERM or SIGHUP arrived: handled like Ctrl-C (staged outputs removed, exit 130)."""

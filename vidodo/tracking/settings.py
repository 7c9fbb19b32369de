"""How to track: one frozen set of options for the frame loop and the video entry point."""

from __future__ import annotations

from dataclasses import dataclass

from .detector import DEFAULT_REFINE

__all__ = ["TrackSettings"]


@dataclass(frozen=True)
class TrackSettings:
    """Options of :func:`~vidodo.tracking.tracker.track_video` and
    :func:`~vidodo.tracking.frame_loop.track_frames` (defaults suit a phone video)."""

    refine: str = DEFAULT_REFINE
    """Corner refinement, one of :data:`~vidodo.tracking.detector.REFINE_METHODS` (see
    :class:`~vidodo.tracking.detector.MarkerDetector`; ``benchmarks/track_accuracy.py``
    measures their accuracy)."""
    detector: str = "auto"
    """Marker detector, one of :data:`~vidodo.tracking.detector.DETECTORS`."""
    window: bool = True
    """Search a window around the predicted marker position first."""
    register_every: str | int = "auto"
    """Floor registration policy (see
    :class:`~vidodo.tracking.registration_policy.RegistrationPolicy`)."""
    max_speed_mps: float = 5.0
    """Detections implying a faster jump than this are rejected [m/s]."""
    max_omega_radps: float = 25.0
    """Detections implying a faster turn than this are rejected [rad/s]."""
    readout_s: float | None = None
    """Rolling-shutter readout time [s]; None: the camera profile's (0 if none)."""
    max_gap_s: float = 0.25
    """Gaps up to this long are bridged by the smoother and flagged ``interpolated``;
    longer ones are left NaN and reported [s]."""
    corner_sigma_px: float | None = None
    """Corner noise [px]; None: estimated from the fit residuals of the run. Either way
    it is split into a fresh and a persistent part by the residuals' frame-to-frame
    correlation (:func:`~vidodo.tracking.noise.estimate_corner_noise`)."""
    corner_bias_px: float | None = None
    """1-sigma of a shift common to all corners of a marker (blur, sampling, print),
    which fit residuals cannot reveal; it is not averaged down by the smoother [px].
    None: the refinement's own (:func:`~vidodo.tracking.detector.refine_bias_sigma_px`,
    0.052 px for 'apriltag', 0 for the others); a larger value suits markers printed or
    mounted with visible defects."""
    threaded: bool = True
    """Decode in a background thread."""

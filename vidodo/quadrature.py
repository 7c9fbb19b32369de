"""Home-built optical encoders: two raw reflectance channels -> signed counts.

Two sensors look at a disc of alternating dark and light stripes, offset by half a
stripe, so their two on/off states run through the four-state Gray sequence
00 -> 01 -> 11 -> 10 -> 00 one way and the reverse the other way. Every state change
is one count: a disc of S stripes gives 2 S counts per revolution (each sensor sees S
edges) (common practice), so such a wheel's profile sets ``ticks_per_rev = 2 * S``.
Which sensor leads sets the sign of the counts; the wheel's ``sign`` key fixes it.

Steps:

1. Threshold each channel with hysteresis (a Schmitt trigger). The threshold comes
   from the readings' histogram by Otsu's method (Otsu, IEEE T-SMC 9(1), 1979) or from
   the profile; the hysteresis band is a fraction of the distance between the two
   class means. A channel whose histogram is not bimodal (Otsu's separation measure
   below ``min_separation``) is taken as not moving, with a warning.
2. Decode the Gray sequence: a step of +1 or -1 per state change.
3. Two samples whose states differ in both channels are an illegal transition:
   counts were lost because sampling was too slow. With ``illegal='guess'`` such a
   step counts two in the direction of the last legal step; with ``'skip'`` it counts
   nothing. Either way the number is reported with the minimum sample rate the
   observed speed needs.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["ChannelThreshold", "QuadratureResult", "otsu_threshold", "threshold_channel",
           "decode_states", "decode_raw", "GRAY_SEQUENCE"]

GRAY_SEQUENCE = ((0, 0), (0, 1), (1, 1), (1, 0))
"""Channel states (A, B) in the order of counting up."""

# position in GRAY_SEQUENCE of the state with code 2*A + B
_POS = np.array([0, 1, 3, 2], dtype=np.int64)
_RATE_WINDOW = 8  # sample intervals over which the peak count rate is measured


@dataclass(frozen=True)
class ChannelThreshold:
    """How one raw channel was turned into on/off states."""

    threshold: float
    """Middle of the hysteresis band [reading units]."""
    low: float
    """A reading at or below this switches the state off [reading units]."""
    high: float
    """A reading at or above this switches the state on [reading units]."""
    separation: float
    """Otsu's between-class / total variance ratio (1: two clean levels, 0: none)."""
    binary: bool
    """True when the channel already held 0/1 states."""
    moving: bool
    """False when the readings showed no two levels (the stripes never passed)."""


@dataclass(frozen=True)
class QuadratureResult:
    """Decoded counts of one encoder."""

    counts: np.ndarray
    """Cumulative signed counts per sample, starting at 0, int64 [counts]."""
    direction: np.ndarray
    """Sign of the most recent legal step per sample (+1, -1, 0 before any), int8."""
    illegal: int
    """Number of illegal transitions (both channels changed between two samples)."""
    illegal_index: np.ndarray
    """Sample index (the later one) of each illegal transition."""
    channels: tuple[ChannelThreshold, ChannelThreshold]
    """Threshold details of channel A and channel B."""
    sample_rate_hz: float
    """1 / median sampling step [Hz] (NaN without times)."""
    peak_count_rate_hz: float
    """Highest count rate seen, over 8 sample intervals [counts/s] (NaN without times)."""
    min_sample_rate_hz: float
    """Sample rate needed for the peak count rate, two samples per state [Hz]."""
    warnings: list[str] = field(default_factory=list)
    """What looks doubtful, one line each."""


def otsu_threshold(values, bins: int = 256) -> tuple[float, float]:
    """Otsu's threshold of a set of readings.

    Parameters
    ----------
    values : ndarray of shape (N,)
        Readings (finite).
    bins : int
        Histogram bins.

    Returns
    -------
    threshold : float
        Reading that best splits the histogram into two classes.
    separation : float
        Between-class variance over total variance at that split (0..1).

    Notes
    -----
    Otsu, "A threshold selection method from gray-level histograms", IEEE T-SMC
    9(1):62-66, 1979: maximise ``w0 w1 (mu0 - mu1)^2`` over the split.
    """
    v = np.asarray(values, dtype=float)
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        return lo, 0.0
    hist, edges = np.histogram(v, bins=bins, range=(lo, hi))
    centres = 0.5 * (edges[:-1] + edges[1:])
    p = hist / hist.sum()
    w0 = np.cumsum(p)[:-1]
    m = np.cumsum(p * centres)[:-1]
    mt = float(np.sum(p * centres))
    w1 = 1.0 - w0
    with np.errstate(divide="ignore", invalid="ignore"):
        between = (mt * w0 - m) ** 2 / (w0 * w1)
    between[~np.isfinite(between)] = 0.0
    k = int(np.argmax(between))
    total = float(np.sum(p * (centres - mt) ** 2))
    return float(edges[k + 1]), float(between[k] / total) if total > 0 else 0.0


def threshold_channel(values, threshold=None, *, band: float = 0.15,
                      min_separation: float = 0.8) -> tuple[np.ndarray, ChannelThreshold]:
    """On/off states of one raw channel, with hysteresis.

    Parameters
    ----------
    values : ndarray of shape (N,)
        Raw readings (reflectance) or 0/1 states; NaN are held at the previous state.
    threshold : float, optional
        Fixed threshold (the profile's ``raw_threshold``); default from the histogram.
    band : float
        Half-width of the hysteresis band as a fraction of the distance between the
        two class means.
    min_separation : float
        Otsu separation below which the channel is taken as showing one level only.

    Returns
    -------
    states : ndarray of shape (N,), bool
    info : ChannelThreshold
    """
    v = np.asarray(values, dtype=float)
    fin = v[np.isfinite(v)]
    if fin.size == 0:
        return np.zeros(v.size, bool), ChannelThreshold(np.nan, np.nan, np.nan, 0.0, False,
                                                        False)
    uniq = np.unique(fin)
    binary = uniq.size <= 2 and set(uniq.tolist()) <= {0.0, 1.0}
    if binary:
        thr, sep = 0.5, 1.0 if uniq.size == 2 else 0.0
        lo_m, hi_m = 0.0, 1.0
        band = 0.0
    else:
        thr, sep = otsu_threshold(fin)
        if threshold is not None:
            thr = float(threshold)
        below, above = fin[fin < thr], fin[fin >= thr]
        lo_m = float(below.mean()) if below.size else thr
        hi_m = float(above.mean()) if above.size else thr
        if threshold is None and below.size and above.size:
            thr = 0.5 * (lo_m + hi_m)  # centre the band between the two levels
    moving = uniq.size > 1 and (binary or (sep >= min_separation or threshold is not None)) \
        and lo_m < thr <= hi_m
    half = band * (hi_m - lo_m)
    info = ChannelThreshold(thr, thr - half, thr + half, sep, binary, bool(moving))
    if not moving:
        first = fin[0] >= thr if fin.size else False
        return np.full(v.size, bool(first)), info
    # Schmitt trigger: set where clearly high, clear where clearly low, else hold
    ev = np.full(v.size, -1, dtype=np.int8)
    ev[v >= thr + half] = 1
    ev[v <= thr - half] = 0
    if ev[0] < 0:  # start inside the band: take the side of the threshold
        ev[0] = 1 if fin[0] >= thr else 0
    idx = np.where(ev >= 0, np.arange(v.size), 0)
    np.maximum.accumulate(idx, out=idx)
    return ev[idx] == 1, info


def decode_states(a, b, *, illegal: str = "guess") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Decode two on/off channels into cumulative signed counts.

    Parameters
    ----------
    a, b : ndarray of shape (N,), bool
        States of channel A and B per sample.
    illegal : {'guess', 'skip'}
        How a step with both channels changed counts: two in the direction of the
        last legal step, or nothing.

    Returns
    -------
    counts : ndarray of shape (N,), int64
        Cumulative counts, starting at 0; +1 per step along :data:`GRAY_SEQUENCE`.
    direction : ndarray of shape (N,), int8
        Sign of the most recent legal step.
    illegal_index : ndarray of int
        Sample index (the later one) of each illegal transition.

    Examples
    --------
    >>> a = np.array([0, 0, 1, 1, 0], bool); b = np.array([0, 1, 1, 0, 0], bool)
    >>> decode_states(a, b)[0].tolist()
    [0, 1, 2, 3, 4]
    >>> decode_states(a[::-1], b[::-1])[0].tolist()
    [0, -1, -2, -3, -4]
    """
    if illegal not in ("guess", "skip"):
        raise ValueError(f"illegal must be 'guess' or 'skip', got {illegal!r}")
    pos = _POS[2 * np.asarray(a, dtype=np.int64) + np.asarray(b, dtype=np.int64)]
    n = pos.size
    if n == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int8), np.zeros(0, np.int64)
    d = np.diff(pos) % 4
    step = np.where(d == 1, 1, np.where(d == 3, -1, 0)).astype(np.int64)
    # direction of the most recent legal step, per sample
    last = np.concatenate([[0], step])
    idx = np.where(last != 0, np.arange(n), 0)
    np.maximum.accumulate(idx, out=idx)
    direction = last[idx].astype(np.int8)
    bad = np.flatnonzero(d == 2)
    if illegal == "guess" and bad.size:
        step[bad] = 2 * direction[bad]  # direction before the illegal step
    counts = np.concatenate([[0], np.cumsum(step)]).astype(np.int64)
    return counts, direction, bad + 1


def decode_raw(a, b, t_s=None, *, threshold=None, illegal: str = "guess", band: float = 0.15,
               name: str = "encoder") -> QuadratureResult:
    """Raw readings of two optical channels -> signed counts, with diagnostics.

    Parameters
    ----------
    a, b : ndarray of shape (N,)
        Raw readings (or 0/1 states) of channel A and B, in time order.
    t_s : ndarray of shape (N,), optional
        Sample times [s]; needed for the count rate and the sample-rate advice.
    threshold : float, optional
        Fixed threshold for both channels (default: Otsu per channel).
    illegal : {'guess', 'skip'}
        See :func:`decode_states`.
    band : float
        Hysteresis half-width as a fraction of the class-mean distance.
    name : str
        Encoder name used in warnings.

    Returns
    -------
    QuadratureResult
    """
    sa, ia = threshold_channel(a, threshold, band=band)
    sb, ib = threshold_channel(b, threshold, band=band)
    counts, direction, bad = decode_states(sa, sb, illegal=illegal)
    warnings = []
    for ch, info in (("A", ia), ("B", ib)):
        if not info.moving:
            warnings.append(f"encoder '{name}': channel {ch} shows no two reflectance levels "
                            f"(separation {info.separation:.2f}); taken as not moving")
    rate = peak = need = float("nan")
    if t_s is not None and counts.size > 1:
        t = np.asarray(t_s, dtype=float)
        dt = np.diff(t)
        rate = 1.0 / float(np.median(dt))
        steps = np.abs(np.diff(counts)).astype(float)
        if illegal == "skip" and bad.size:
            steps[bad - 1] = 2.0
        w = min(_RATE_WINDOW, steps.size)
        cs = np.concatenate([[0.0], np.cumsum(steps)])
        ct = np.concatenate([[0.0], np.cumsum(dt)])
        span = ct[w:] - ct[:-w]
        with np.errstate(divide="ignore", invalid="ignore"):
            r = np.where(span > 0, (cs[w:] - cs[:-w]) / span, 0.0)
        peak = float(r.max()) if r.size else 0.0
        need = 2.0 * peak
    if bad.size:
        advice = (f"; the wheel reached at least {peak:.0f} counts/s, so sample at "
                  f"{need:.0f} Hz or more (now {rate:.0f} Hz)") if np.isfinite(need) else ""
        how = "guessed from the last direction" if illegal == "guess" else "lost"
        warnings.append(f"encoder '{name}': {bad.size} illegal transition(s) (both channels "
                        f"changed between two samples), counts {how}{advice}")
    elif np.isfinite(need) and need > rate:
        warnings.append(f"encoder '{name}': peak {peak:.0f} counts/s at {rate:.0f} Hz sampling "
                        f"leaves less than two samples per state; sample at {need:.0f} Hz "
                        "or more")
    return QuadratureResult(counts, direction, int(bad.size), bad, (ia, ib), rate, peak, need,
                            warnings)

"""Robust spread: SciPy's median absolute deviation, imported on first use.

Importing ``scipy.stats`` costs about 0.6 s of CPU at every process start, more than
the rest of the tracking path's imports; only the seam check, the event detector and
the profile fit need this one function from it.
"""

from __future__ import annotations

__all__ = ["median_abs_deviation"]


def median_abs_deviation(x, **kwargs):
    """:func:`scipy.stats.median_abs_deviation` of ``x`` (same keywords and result).

    >>> round(float(median_abs_deviation([1.0, 2.0, 3.0, 4.0, 100.0], scale="normal")), 4)
    1.4826
    """
    from scipy.stats import median_abs_deviation as mad

    return mad(x, **kwargs)

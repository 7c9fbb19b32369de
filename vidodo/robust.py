"""Robust spread: the median absolute deviation, in NumPy.

SciPy has it (:func:`scipy.stats.median_abs_deviation`), but importing ``scipy.stats``
costs about 0.6 s of CPU in every process that calls it (SciPy generates its
distributions' docstrings on import), and the tracker calls it on every floor
registration (the seam check). This is the same computation for the keywords the
project uses; ``tests/test_robust.py`` checks it against SciPy's.
"""

from __future__ import annotations

import numpy as np

__all__ = ["median_abs_deviation"]

_NORMAL_SCALE = 0.6744897501960817
"""``scale='normal'``: the standard normal's 75th percentile, Phi^-1(0.75) (MAD of a
unit normal), so that MAD / this estimates sigma (common practice)."""


def median_abs_deviation(x, axis=0, center=np.median, scale=1.0):
    """Median absolute deviation of ``x`` about ``center(x, axis=axis)``, over ``axis``,
    divided by ``scale`` (a number, or 'normal' for a normal sigma); NaN propagates.

    Same arguments and result as :func:`scipy.stats.median_abs_deviation` with its
    default ``nan_policy='propagate'``.

    >>> round(float(median_abs_deviation([1.0, 2.0, 3.0, 4.0, 100.0], scale="normal")), 4)
    1.4826
    """
    if isinstance(scale, str):
        if scale.lower() != "normal":
            raise ValueError(f"scale {scale!r}: use a number or 'normal'")
        scale = _NORMAL_SCALE
    x = np.asarray(x, dtype=float)
    if axis is None:
        x, axis = x.ravel(), 0
    if x.shape[axis] == 0:
        return np.full(np.delete(x.shape, axis), np.nan)[()]
    mid = np.expand_dims(center(x, axis=axis), axis)
    return np.median(np.abs(x - mid), axis=axis) / scale

"""Stand-in truth tracks for tests and benchmarks: exact poses plus known noise.

Never used by the pipeline; the truth-track columns are those of ``vidodo track``.
"""

from __future__ import annotations

import pandas as pd


def noisy_track(t_s, x_m, y_m, heading_rad, sigma_m, sigma_rad, rng, detected=True):
    """A truth-track DataFrame: the given poses with Gaussian noise of the stated 1-sigma
    (``sigma_m`` per axis, ``sigma_rad`` on heading) and those sigmas in its columns."""
    n = len(t_s)
    return pd.DataFrame({
        "t_s": t_s,
        "x_m": x_m + rng.normal(0, sigma_m, n),
        "y_m": y_m + rng.normal(0, sigma_m, n),
        "heading_rad": heading_rad + rng.normal(0, sigma_rad, n),
        "sigma_xy_m": sigma_m, "sigma_heading_rad": sigma_rad,
        "detected": detected, "interpolated": False})

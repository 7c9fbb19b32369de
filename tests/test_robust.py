"""The NumPy median absolute deviation against SciPy's (an independent reference)."""

import numpy as np
import pytest
from scipy import stats

from vidodo.robust import median_abs_deviation


def _zero(values, axis):
    return np.zeros(np.delete(values.shape, axis))


@pytest.mark.parametrize("kwargs", [{}, {"scale": "normal"}, {"scale": 2.5},
                                    {"axis": 1, "scale": "normal"}, {"axis": None},
                                    {"axis": 1, "center": _zero, "scale": "normal"},
                                    {"center": np.mean}])
def test_matches_scipy(kwargs):
    x = np.random.default_rng(3).standard_t(3, size=(7, 40))
    ours = median_abs_deviation(x, **kwargs)
    ref = stats.median_abs_deviation(x, **kwargs)
    np.testing.assert_allclose(ours, ref, rtol=1e-12)


def test_nan_propagates_and_empty_is_nan_like_scipy():
    x = np.array([1.0, np.nan, 3.0])
    assert np.isnan(median_abs_deviation(x)) and np.isnan(stats.median_abs_deviation(x))
    assert np.isnan(median_abs_deviation(np.array([])))


def test_scalar_centre_like_scipy():
    x = np.array([-3.0, 1.0, 2.0, 5.0])
    assert median_abs_deviation(x, center=lambda v, axis=None: 0.0) == pytest.approx(
        stats.median_abs_deviation(x, center=lambda v, axis=None: 0.0))


def test_bad_scale_refused():
    with pytest.raises(ValueError, match="scale"):
        median_abs_deviation([1.0, 2.0], scale="iqr")

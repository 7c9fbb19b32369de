"""The single wheel model against textbook drivetrain formulas."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from vidodo.errors import ObservabilityError
from vidodo.profiles import Wheel
from vidodo.wheels import check_observable, solve_twist, twist_to_rim, wheel_rows


def _w(name, x, y, dir_deg=0.0, roller_deg=0.0, r=0.05):
    return Wheel(name, name, x_m=x, y_m=y, direction_rad=math.radians(dir_deg),
                 radius_m=r, ticks_per_rev=1000, roller_rad=math.radians(roller_deg))


def test_mecanum_matches_published_matrix():
    """Mecanum inverse kinematics, X layout, 45-degree rollers.

    Lynch & Park, Modern Robotics (2017), eq. 13.10 (twist reordered to (vx, vy, w)):
    u = (1/r) [[1, -1, -(l+w)], [1, 1, (l+w)], [1, 1, -(l+w)], [1, -1, (l+w)]] for
    front-left, front-right, rear-left, rear-right.
    """
    lx, ly, r = 0.2, 0.15, 0.05
    wheels = [_w("fl", lx, ly, 0, -45, r), _w("fr", lx, -ly, 0, 45, r),
              _w("rl", -lx, ly, 0, 45, r), _w("rr", -lx, -ly, 0, -45, r)]
    k = lx + ly
    expected = np.array([[1, -1, -k], [1, 1, k], [1, 1, -k], [1, -1, k]], float)
    assert_allclose(wheel_rows(wheels), expected, atol=1e-12)
    tw = np.array([[0.3, -0.2, 0.7]])
    assert_allclose(solve_twist(wheels, twist_to_rim(wheels, tw)), tw, atol=1e-12)


def test_differential_drive_textbook():
    """v = (vR + vL)/2, omega = (vR - vL)/b (Siegwart, Nourbakhsh & Scaramuzza, 2011, sec. 3.2)."""
    b = 0.36
    wheels = [_w("l", 0, b / 2), _w("r", 0, -b / 2)]
    vl, vr = 0.4, 0.7
    tw = solve_twist(wheels, np.array([[vl, vr]]), no_sideways=True)
    assert_allclose(tw, [[(vr + vl) / 2, 0.0, (vr - vl) / b]], atol=1e-12)


def test_parallel_wheels_cannot_see_sideways():
    wheels = [_w("l", 0, 0.2), _w("r", 0, -0.2)]
    with pytest.raises(ObservabilityError, match="sideways"):
        check_observable(wheels)

"""The single wheel model: body twist <-> wheel rim speed <-> encoder ticks.

Every wheel, powered or not, plain, omni or mecanum, reads the velocity of its
contact point projected on its rolling direction, corrected for its roller angle:

    s_i = d_i . v_c,i + tan(gamma_i) * d_perp,i . v_c,i,
    v_c,i = (vx - omega * y_i, vy + omega * x_i)

(Lynch & Park, *Modern Robotics*, 2017, section 13.2, eq. 13.6, with the twist
reordered as (vx, vy, omega)). So a group of wheels gives ``s = A @ twist`` and the
body twist is a small least-squares solve.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import ObservabilityError
from .profiles import Wheel

__all__ = ["wheel_rows", "twist_to_rim", "rim_to_ticks", "ticks_to_rim", "solve_twist",
           "check_observable"]

_MOTIONS = ("forward (vx)", "sideways (vy)", "turning (omega)")


def wheel_rows(wheels) -> np.ndarray:
    """Rows of the wheel matrix A, one per wheel: rim speed = A @ (vx, vy, omega).

    Parameters
    ----------
    wheels : sequence of Wheel

    Returns
    -------
    ndarray of shape (N, 3)
        Rim speed [m/s] per unit body twist ([m/s], [m/s], [rad/s]).

    Examples
    --------
    A wheel on the left side of a tank drive, rolling forward:

    >>> from vidodo.profiles import Wheel
    >>> w = Wheel("left", "l", x_m=0.0, y_m=0.2, direction_rad=0.0,
    ...           radius_m=0.05, ticks_per_rev=100)
    >>> wheel_rows([w]).round(3).tolist()
    [[1.0, 0.0, -0.2]]
    """
    rows = []
    for w in wheels:
        c, s = math.cos(w.direction_rad), math.sin(w.direction_rad)
        k = math.tan(w.roller_rad)
        # direction along which the wheel reads: d + tan(gamma) * d_perp
        ex, ey = c - k * s, s + k * c
        rows.append([ex, ey, -ex * w.y_m + ey * w.x_m])
    return np.asarray(rows, dtype=float).reshape(-1, 3)


def twist_to_rim(wheels, twist) -> np.ndarray:
    """Rim speed of each wheel for body twists.

    Parameters
    ----------
    wheels : sequence of Wheel
    twist : ndarray of shape (M, 3) or (3,)
        ``(vx_mps, vy_mps, omega_radps)``; also works for increments (m, m, rad).

    Returns
    -------
    ndarray of shape (M, N)
        Rim speed (or rim travel) per wheel [m/s] (or [m]).
    """
    return np.atleast_2d(np.asarray(twist, dtype=float)) @ wheel_rows(wheels).T


def rim_to_ticks(wheel: Wheel, rim_m):
    """Encoder counts for rim travel ``rim_m`` [m] (not rounded, sign applied)."""
    return wheel.sign * np.asarray(rim_m, dtype=float) / wheel.metres_per_tick


def ticks_to_rim(wheel: Wheel, ticks):
    """Rim travel [m] for encoder counts (sign applied)."""
    return wheel.sign * np.asarray(ticks, dtype=float) * wheel.metres_per_tick


def check_observable(wheels, *, omega_known=False, no_sideways=False, where="source"):
    """Raise if the wheels cannot determine the body twist.

    Parameters
    ----------
    wheels : sequence of Wheel
    omega_known : bool
        Heading rate comes from elsewhere (IMU).
    no_sideways : bool
        Sideways velocity is constrained to zero.
    where : str
        Name used in the message.

    Raises
    ------
    ObservabilityError
        Naming the motion the layout cannot see and what would fix it.
    """
    a = wheel_rows(wheels)
    free = [i for i, known in enumerate((False, no_sideways, omega_known)) if not known]
    sub = a[:, free]
    if sub.shape[1] == 0:
        return
    if sub.shape[0] < sub.shape[1] or np.linalg.matrix_rank(sub, tol=1e-9) < sub.shape[1]:
        # find which motion lies in the null space
        _, sv, vt = np.linalg.svd(sub) if sub.shape[0] else (None, np.array([]), np.eye(len(free)))
        null = vt[-1] if sub.shape[0] else vt[0]
        lost = _MOTIONS[free[int(np.argmax(np.abs(null)))]]
        raise ObservabilityError(
            f"{where}: wheels {[w.name for w in wheels]} cannot measure {lost} motion; "
            "add a wheel that rolls in that direction, take heading from the IMU, "
            "or set no_sideways = true for a tank drive"
        )


def solve_twist(wheels, rim, *, omega=None, no_sideways=False, weights=None):
    """Least-squares body twist (or increment) from the wheels' rim speeds (or travel).

    Parameters
    ----------
    wheels : sequence of Wheel
    rim : ndarray of shape (M, N)
        Rim speed [m/s] or rim travel [m] per sample (rows) and wheel (columns).
    omega : ndarray of shape (M,), optional
        Known heading rate [rad/s] (or heading change [rad]) from an IMU.
    no_sideways : bool
        Constrain the sideways component to zero.
    weights : ndarray of shape (N,), optional
        Per-wheel weights (inverse variance).

    Returns
    -------
    ndarray of shape (M, 3)
        ``(vx, vy, omega)`` per sample, in the units of ``rim``.
    """
    rim = np.atleast_2d(np.asarray(rim, dtype=float))
    a = wheel_rows(wheels)
    check_observable(wheels, omega_known=omega is not None, no_sideways=no_sideways)
    out = np.zeros((rim.shape[0], 3))
    free = [0] + ([] if no_sideways else [1]) + ([2] if omega is None else [])
    rhs = rim.copy()
    if omega is not None:
        om = np.asarray(omega, dtype=float).reshape(-1)
        out[:, 2] = om
        rhs = rhs - om[:, None] * a[:, 2][None, :]
    sub = a[:, free]
    if weights is not None:
        wsq = np.sqrt(np.asarray(weights, dtype=float))
        sub = sub * wsq[:, None]
        rhs = rhs * wsq[None, :]
    sol, *_ = np.linalg.lstsq(sub, rhs.T, rcond=None)
    out[:, free] = sol.T
    return out

"""When to register the floor again while tracking, and the registration in effect."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["RegistrationPolicy"]


# ------------------------------------------------------------ registration policy
class RegistrationPolicy:
    """Decides when to register the floor again and keeps the one in effect.

    ``every`` = int registers every that many frames. ``'auto'`` registers every frame
    until two registrations ``moving_check_s`` apart agree within ``still_px`` (the
    camera is still: a slow hand-held sway moves less than that between consecutive
    frames, so the comparison spans a longer time; a hand holding a phone drifts by
    pixels in a quarter second even at the turn of a sway), then registers only every
    ``still_check_s`` and goes back to every frame as soon as the view has moved by
    ``still_px`` since the last check (a bumped tripod is noticed within that time).
    """

    def __init__(self, registrar, field_profile, every="auto", still_px=0.5, still_check_s=1.0,
                 moving_check_s=0.25):
        self.registrar = registrar
        self.every = every
        self.still_px = still_px
        self.still_check_s = still_check_s
        self.moving_check_s = moving_check_s
        self.current = None
        self.anchor = None
        self.anchor_t = -math.inf
        self.last_index = -(10**9)
        self.last_t = -math.inf
        self.still = False
        self.moved_count = 0
        self.registered = 0
        self.failures: dict[str, int] = {}
        fx, fy = field_profile.size_m
        self._probe = np.array([[0, 0], [fx, 0], [fx, fy], [0, fy], [fx / 2, fy / 2]], float)

    def due(self, index, t_s) -> bool:
        if self.current is None:
            return True
        if self.every != "auto":
            return index - self.last_index >= int(self.every)
        if self.still:
            return t_s - self.last_t >= self.still_check_s
        return True

    def _shift_px(self, a, b) -> float:
        try:
            pa = np.asarray(a.floor_to_image(self._probe), float)
            pb = np.asarray(b.floor_to_image(self._probe), float)
            return float(np.nanmax(np.hypot(*(pa - pb).T)))
        except Exception:  # noqa: BLE001 - a registrar without projection: assume moving
            return float("inf")

    def update(self, frame, index, t_s, mask_fn=None):
        """Register ``frame`` if due; return (registration in effect, fresh?).

        ``mask_fn()`` gives the pixels to ignore (the robot) when a registration is due.
        """
        if not self.due(index, t_s):
            return self.current, False
        mask = mask_fn() if mask_fn is not None else None
        if mask is not None:
            reg = self.registrar.register(frame, t_s, mask=mask)
        else:
            reg = self.registrar.register(frame, t_s)
        self.registered += 1
        self.last_index = index
        self.last_t = t_s
        if not getattr(reg, "ok", False):
            reason = str(getattr(reg, "reason", "") or "registration failed")
            self.failures[reason] = self.failures.get(reason, 0) + 1
            return self.current, False
        if self.every == "auto":
            if self.anchor is None:
                self.anchor, self.anchor_t = reg, t_s
            elif self.still or t_s - self.anchor_t >= self.moving_check_s:
                was_still = self.still
                self.still = self._shift_px(self.anchor, reg) < self.still_px
                if was_still and not self.still:
                    self.moved_count += 1
                self.anchor, self.anchor_t = reg, t_s
        self.current = reg
        return reg, True


"""One line of a pass / warn / fail checklist (the pre-flight check's and its parts')."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Check", "STATUSES"]

STATUSES = ("pass", "warn", "fail")
"""Statuses from best to worst."""


@dataclass(frozen=True)
class Check:
    """One line of the checklist."""

    name: str
    status: str
    """'pass', 'warn' or 'fail'."""
    detail: str
    """What was found."""
    todo: str = ""
    """What to do about it ('' when nothing)."""

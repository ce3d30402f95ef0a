"""Statuses of the audit checks: whether a gap is within a policy's tolerance, or noise.

A check compares a point estimate ``d`` and its 95% interval ``[low, high]`` with a tolerance
``eps`` (every quantity here is a difference: group minus reference, or realized minus
promised). The statuses, in the order they are decided:

- ``not-identifiable``: a rate the check needs cannot be estimated (selective labels).
- ``too-few``: a denominator the check needs is below the minimum count.
- ``holds``: the whole interval lies within the tolerance: ``-eps <= low`` and ``high <= eps``.
- ``breach``: the whole interval lies beyond it: ``low > eps`` or ``high < -eps``.
- ``watch``: the point is beyond the tolerance (``|d| > eps``) but the interval reaches back
  inside it: probably a real gap, not yet certain.
- ``unsettled``: the point is within the tolerance but the interval reaches beyond it: no sign
  of a problem, but too little data to confirm the tolerance is met.

The four-fifths check uses the same names on different evidence; see :func:`four_fifths_status`.
"""

from __future__ import annotations

from enum import StrEnum


class Status(StrEnum):
    BREACH = "breach"
    WATCH = "watch"
    TOO_FEW = "too-few"
    NOT_IDENTIFIABLE = "not-identifiable"
    UNSETTLED = "unsettled"
    HOLDS = "holds"


ALERTING = (Status.BREACH, Status.WATCH, Status.TOO_FEW, Status.NOT_IDENTIFIABLE)
"""Statuses that go on the alert list, most severe first."""

SEVERITY = {status: i for i, status in enumerate(Status)}

DEFAULT_MIN_COUNT = 20
"""Smallest denominator a status is decided on. Common practice, after the CDC's habit of
flagging rates built on fewer than 20 events as unstable."""


def classify(point: float, low: float, high: float, tolerance: float) -> Status:
    """holds / breach / watch / unsettled for a difference and its interval."""
    if tolerance < 0:
        raise ValueError("tolerance must be >= 0")
    if low > high:
        raise ValueError(f"interval [{low}, {high}] is reversed")
    if -tolerance <= low and high <= tolerance:
        return Status.HOLDS
    if low > tolerance or high < -tolerance:
        return Status.BREACH
    if abs(point) > tolerance:
        return Status.WATCH
    return Status.UNSETTLED


def four_fifths_status(flagged: bool, difference_high: float) -> Status:
    """Four-fifths check of one group against the group with the highest favourable rate.

    ``holds`` when the ratio is not flagged (29 CFR 1607.4(D), exact comparison);
    ``breach`` when flagged and the Newcombe interval of (rate - highest rate) lies entirely
    below 0, so the shortfall is not chance; ``watch`` when flagged but that interval reaches 0.
    """
    if not flagged:
        return Status.HOLDS
    return Status.BREACH if difference_high < 0 else Status.WATCH

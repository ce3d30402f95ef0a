"""Shared result types of the margin tests behind the audit verdicts.

A check compares a quantity (a difference, a rate or a ratio) with a tolerance band. Two
kinds of evidence are reported side by side:

- ``p_inside``: the p-value of a test whose null hypothesis is "the quantity lies outside
  the band"; rejecting it shows the quantity INSIDE the band (for a two-edged band this is
  the two one-sided tests procedure, TOST, of Schuirmann 1987, J Pharmacokinet Biopharm
  15:657-680: the larger of the two one-sided p-values).
- ``p_outside``: the p-value of a test whose null hypothesis is "the quantity lies inside
  the band (or on its edge)"; rejecting it shows the quantity OUTSIDE the band.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

Alternative = Literal["larger", "smaller"]
"""One-sided alternative: "larger" tests H0: quantity <= value; "smaller" tests H0: quantity
>= value (the words statsmodels uses)."""

Side = Literal["above", "below"]


@dataclass(frozen=True, slots=True)
class OneSidedTest:
    """A one-sided test: its standardized statistic and its p-value."""

    statistic: float
    p_value: float


@dataclass(frozen=True, slots=True)
class MarginEvidence:
    """Evidence that a quantity lies inside, or outside, its tolerance band."""

    p_inside: float
    """p-value of the test whose rejection shows the quantity INSIDE the band (TOST: the
    larger of the two one-sided p-values)."""
    p_outside: float
    """p-value of the test whose rejection shows the quantity OUTSIDE the band."""
    side: Side
    """The side of the band the outside evidence points to: the side whose one-sided outside
    test has the smaller p-value (ties -> "above"). Whenever ``p_outside < 0.5`` this is the
    side of the band the estimate lies on."""
    estimate: float
    """The point estimate (difference, rate or ratio)."""

"""Rates of one group when outcomes are seen only after one of the two decisions.

Setting. Case ``i`` has the recorded probability of action ``p_i`` of the randomized rule, the
decision actually drawn ``a_i ~ Bernoulli(p_i)`` (drawn by the service, so independent of the
outcome given the score) and an outcome ``y_i`` in {0, 1} that is OBSERVED only after action
(mode ``"action"``) or only after no action (mode ``"no-action"``). Write O for the observed
side (the decision after which outcomes are seen), H for the hidden side, and
``pi_i = P(case i lands on O)``: ``p_i`` in mode "action", ``1 - p_i`` in mode "no-action".
The rates are those of the decisions actually taken, over every case of the group:

    prevalence = #(y=1) / n            action_rate = #(a=1) / n
    tpr = #(a=1, y=1) / #(y=1)         fpr = #(a=1, y=0) / #(y=0)
    ppv = #(a=1, y=1) / #(a=1)         npv = #(a=0, y=0) / #(a=0)

Zones. ``p = 1`` (certain action), ``0 < p < 1`` (the randomized band), ``p = 0`` (certain no
action). In mode "action" the p = 1 zone is all on O and the p = 0 zone all on H; in mode
"no-action" the other way round. A band case is on either side.

1. Identified. Every case on O with its outcome counts exactly.

2. Weighted (the band's cases on H). A band case lands on O with probability ``pi_i``, known
   from the log, so the observed band cases stand for the hidden ones with weights
   ``(1 - pi_i) / pi_i`` (inverse-probability weighting; Horvitz & Thompson 1952, JASA
   47:663-685). With ``S1 = sum y / pi`` and ``S0 = sum (1 - y) / pi`` over the observed band
   cases, and ``k1``, ``k0`` their numbers of positives and negatives:

       W1 = S1 - k1 = sum y (1 - pi) / pi        W0 = S0 - k0 = sum (1 - y)(1 - pi) / pi

   ``W1`` alone is the Horvitz-Thompson estimate of the hidden band positives (so ``S1`` is the
   HT total of the band's positives). We use the Hajek ratio instead:

       hidden band positives = h * W1 / (W1 + W0),   hidden band negatives = h - that,

   where ``h`` is the number of band cases on H, known exactly from the log. Why the ratio:
   the estimated positives and negatives then add up to the known ``h``, so every rate built
   from them lies in [0, 1] and agrees with the exact decision counts (the HT totals need not
   add up to ``h``; with few observed band cases HT can report more hidden positives than
   there are hidden cases); and when the outcome is not proportional to the weight the ratio
   has the smaller variance (Hajek 1971, comment in Godambe & Sprott, Foundations of
   Statistical Inference, p. 236; Sarndal, Swensson & Wretman 1992, Model Assisted Survey
   Sampling -- both from memory). Its bias is of order 1/(observed band cases).

3. Bounds (cases whose outcome is unknown and has no weight): the certain zone on H (p = 0 in
   mode "action", p = 1 in mode "no-action"), the band's hidden cases when no band case was
   observed, and cases on O whose outcome has not arrived yet. Worst and best case (Manski
   1989, Journal of Human Resources 24:343-360): their number of positives ``u_s`` on each
   side s is anywhere in ``[0, U_s]``. Each rate is a ratio of affine functions of
   ``(u_action, u_no_action)``, monotone in each, so its range over the box is spanned by the
   box's corners; ``low`` and ``high`` are the smallest and largest value over the corners
   with a positive denominator, the identified and weighted parts held at their values.

``PartialRate.low`` and ``high`` describe what the data identify, not sampling error: for an
identified or weighted rate they equal ``value``; for bounds ``value`` is None.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import product
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

Mode = Literal["action", "no-action"]
RateKind = Literal["identified", "weighted", "bounds", "none"]

SELECTIVE_METRICS: tuple[str, ...] = ("prevalence", "tpr", "fpr", "ppv", "npv", "action_rate")

_SLACK = 1e-9
"""Relative slack for sums of inverse probabilities accumulated in floating point."""


@dataclass(frozen=True, slots=True)
class SelectiveCounts:
    """Per-zone sums for one group, as one GROUP BY over the decision log gives them.

    ``certain_action``, ``band`` and ``certain_no_action`` count the cases with ``p = 1``,
    ``0 < p < 1`` and ``p = 0``; ``band_actions`` the band cases whose drawn decision was
    action. ``*_positives`` and ``*_negatives`` count observed outcomes 1 and 0 per zone (only
    cases on the observed side can have one). ``band_weighted_positives`` and
    ``band_weighted_negatives`` are sums over the observed band cases of ``y / pi`` and
    ``(1 - y) / pi``, with ``pi = p`` in mode "action" and ``1 - p`` in mode "no-action".
    """

    mode: Mode
    certain_action: int = 0
    band: int = 0
    certain_no_action: int = 0
    band_actions: int = 0
    certain_action_positives: int = 0
    certain_action_negatives: int = 0
    band_positives: int = 0
    band_negatives: int = 0
    certain_no_action_positives: int = 0
    certain_no_action_negatives: int = 0
    band_weighted_positives: float = 0.0
    band_weighted_negatives: float = 0.0

    def __post_init__(self) -> None:
        if self.mode not in ("action", "no-action"):
            raise ValueError(f"mode must be 'action' or 'no-action', got {self.mode!r}")
        ints = (
            self.certain_action,
            self.band,
            self.certain_no_action,
            self.band_actions,
            self.certain_action_positives,
            self.certain_action_negatives,
            self.band_positives,
            self.band_negatives,
            self.certain_no_action_positives,
            self.certain_no_action_negatives,
        )
        if any(v < 0 for v in ints):
            raise ValueError(f"counts must be non-negative: {self}")
        if self.band_actions > self.band:
            raise ValueError(f"band_actions ({self.band_actions}) exceed band ({self.band})")
        if self.mode == "action":
            hidden = ("certain_no_action", self.certain_no_action_positives)
            hidden_neg = self.certain_no_action_negatives
            certain_obs = self.certain_action_positives + self.certain_action_negatives
            certain_cases, band_obs_side = self.certain_action, self.band_actions
        else:
            hidden = ("certain_action", self.certain_action_positives)
            hidden_neg = self.certain_action_negatives
            certain_obs = self.certain_no_action_positives + self.certain_no_action_negatives
            certain_cases, band_obs_side = self.certain_no_action, self.band - self.band_actions
        if hidden[1] or hidden_neg:
            raise ValueError(
                f"mode {self.mode!r}: {hidden[0]} cases are never observed, yet "
                f"{hidden[1] + hidden_neg} of them have an outcome"
            )
        if certain_obs > certain_cases:
            raise ValueError(f"{certain_obs} observed outcomes among {certain_cases} cases")
        if self.band_positives + self.band_negatives > band_obs_side:
            raise ValueError(
                f"{self.band_positives + self.band_negatives} observed band outcomes, but only "
                f"{band_obs_side} band cases are on the observed side"
            )
        for name, weighted, count in (
            ("positives", self.band_weighted_positives, self.band_positives),
            ("negatives", self.band_weighted_negatives, self.band_negatives),
        ):
            if not math.isfinite(weighted) or weighted < count * (1.0 - _SLACK):
                raise ValueError(
                    f"band_weighted_{name} ({weighted}) must be finite and at least band_{name} "
                    f"({count}): each observed case adds 1/pi >= 1"
                )
            if count == 0 and weighted != 0.0:
                raise ValueError(f"band_weighted_{name} is {weighted} with no band_{name}")

    @property
    def n(self) -> int:
        return self.certain_action + self.band + self.certain_no_action

    @classmethod
    def from_rows(cls, p: ArrayLike, a: ArrayLike, y: ArrayLike, mode: Mode) -> SelectiveCounts:
        """Tally rows: probabilities ``p``, drawn decisions ``a`` (0/1), outcomes ``y``.

        ``y`` is read only on the observed side, where it is 0, 1 or NaN (not arrived yet);
        on the hidden side it is ignored (it may hold the truth, for simulations).
        """
        pa = np.asarray(p, dtype=float).ravel()
        aa = np.asarray(a, dtype=float).ravel()
        ya = np.asarray(y, dtype=float).ravel()
        if not pa.shape == aa.shape == ya.shape:
            raise ValueError(f"p, a and y differ in length: {pa.size}, {aa.size}, {ya.size}")
        if not np.all((pa >= 0.0) & (pa <= 1.0)):
            raise ValueError("every probability p must lie in [0, 1]")
        if not np.all((aa == 0.0) | (aa == 1.0)):
            raise ValueError("every decision a must be 0 or 1")
        if np.any((pa == 1.0) & (aa == 0.0)) or np.any((pa == 0.0) & (aa == 1.0)):
            raise ValueError(
                "a decision contradicts its probability (p = 1 with a = 0, or p = 0 with a = 1)"
            )
        on_obs = aa == 1.0 if mode == "action" else aa == 0.0
        yo = ya[on_obs]
        if not np.all((yo == 0.0) | (yo == 1.0) | np.isnan(yo)):
            raise ValueError("every observed outcome y must be 0, 1 or NaN (not arrived)")
        seen = on_obs & ~np.isnan(ya)
        pos, neg = seen & (ya == 1.0), seen & (ya == 0.0)
        one, zero = pa == 1.0, pa == 0.0
        band = ~one & ~zero
        pi = pa if mode == "action" else 1.0 - pa
        return cls(
            mode=mode,
            certain_action=int(one.sum()),
            band=int(band.sum()),
            certain_no_action=int(zero.sum()),
            band_actions=int((band & (aa == 1.0)).sum()),
            certain_action_positives=int((one & pos).sum()),
            certain_action_negatives=int((one & neg).sum()),
            band_positives=int((band & pos).sum()),
            band_negatives=int((band & neg).sum()),
            certain_no_action_positives=int((zero & pos).sum()),
            certain_no_action_negatives=int((zero & neg).sum()),
            band_weighted_positives=math.fsum(1.0 / pi[band & pos]),
            band_weighted_negatives=math.fsum(1.0 / pi[band & neg]),
        )


@dataclass(frozen=True, slots=True)
class PartialRate:
    """A rate that is a point (``identified``), a point estimate by weighting (``weighted``),
    worst/best-case ``bounds`` (``value`` None), or ``none`` (nothing to divide by).

    ``low``/``high`` bound what the data identify (equal to ``value`` for a point); they carry
    no sampling error. ``note`` says in words what the rate rests on.
    """

    kind: RateKind
    value: float | None
    low: float | None
    high: float | None
    note: str


@dataclass(frozen=True, slots=True)
class _Side:
    """One decision side: its cases, known or estimated positives and negatives, how many of
    them were estimated by weighting, and how many have an unknown outcome."""

    cases: int
    positives: float
    negatives: float
    weighted: int
    unknown: int
    unknown_why: tuple[str, ...]


def _sides(c: SelectiveCounts) -> tuple[_Side, _Side]:
    """(action side, no-action side)."""
    if c.mode == "action":
        certain_obs, certain_hidden = c.certain_action, c.certain_no_action
        certain_pos, certain_neg = c.certain_action_positives, c.certain_action_negatives
        band_obs, band_hidden = c.band_actions, c.band - c.band_actions
        hidden_zone = "p = 0, never observed"
    else:
        certain_obs, certain_hidden = c.certain_no_action, c.certain_action
        certain_pos, certain_neg = c.certain_no_action_positives, c.certain_no_action_negatives
        band_obs, band_hidden = c.band - c.band_actions, c.band_actions
        hidden_zone = "p = 1, never observed"

    obs_cases = certain_obs + band_obs
    known_pos = certain_pos + c.band_positives
    known_neg = certain_neg + c.band_negatives
    pending = obs_cases - known_pos - known_neg
    observed = _Side(
        obs_cases,
        float(known_pos),
        float(known_neg),
        0,
        pending,
        (f"{pending} not arrived",) if pending else (),
    )

    w1 = max(0.0, c.band_weighted_positives - c.band_positives)
    w0 = max(0.0, c.band_weighted_negatives - c.band_negatives)
    why: list[str] = []
    unknown = 0
    est_pos = est_neg = 0.0
    weighted = 0
    if band_hidden and w1 + w0 > 0.0:
        est_pos = band_hidden * w1 / (w1 + w0)
        est_neg = band_hidden - est_pos
        weighted = band_hidden
    elif band_hidden:
        unknown += band_hidden
        why.append(f"{band_hidden} in the band with no observed band case to weight")
    if certain_hidden:
        unknown += certain_hidden
        why.append(f"{certain_hidden} at {hidden_zone}")
    hidden = _Side(certain_hidden + band_hidden, est_pos, est_neg, weighted, unknown, tuple(why))
    return (observed, hidden) if c.mode == "action" else (hidden, observed)


Cell = tuple[int, int]
"""(side: 0 action / 1 no action, outcome: 1 positives / 0 negatives)."""


def _partial(
    num: tuple[Cell, ...], den: tuple[Cell, ...] | int, sides: tuple[_Side, _Side], what: str
) -> PartialRate:
    """The ratio of the sum of the ``num`` cells to the sum of the ``den`` cells (or to the
    fixed count ``den``), over every way the unknown outcomes can fall."""

    def cell(side: int, positive: int, u: tuple[float, float]) -> float:
        s = sides[side]
        return s.positives + u[side] if positive else s.negatives + s.unknown - u[side]

    corners = list(product((0.0, float(sides[0].unknown)), (0.0, float(sides[1].unknown))))
    values: list[float] = []
    for u in corners:
        top = sum(cell(s, k, u) for s, k in num)
        bottom = float(den) if isinstance(den, int) else sum(cell(s, k, u) for s, k in den)
        if bottom > 0.0:
            values.append(min(1.0, max(0.0, top / bottom)))
    used = {side for side, _ in num} | (set() if isinstance(den, int) else {s for s, _ in den})
    involved = [sides[i] for i in sorted(used)]
    unknown = sum(s.unknown for s in involved)
    weighted = sum(s.weighted for s in involved)
    if not values:
        return PartialRate("none", None, None, None, f"no {what}")
    if unknown:
        why = "; ".join(w for s in involved for w in s.unknown_why)
        note = f"outcome unknown for {unknown} cases ({why}): worst and best case"
        if weighted:
            note += f"; {weighted} hidden band cases weighted"
        return PartialRate("bounds", None, min(values), max(values), note)
    value = values[0]
    if weighted:
        note = f"{weighted} hidden band cases estimated by inverse-probability weighting"
        return PartialRate("weighted", value, value, value, note)
    return PartialRate("identified", value, value, value, "observed on every case it counts")


def selective_rates(counts: SelectiveCounts) -> dict[str, PartialRate]:
    """Prevalence, TPR, FPR, PPV, NPV and action rate (formulas in the module docstring)."""
    sides = _sides(counts)
    act, no_act = sides
    n = counts.n
    acted_pos, acted_neg, left_pos, left_neg = (0, 1), (0, 0), (1, 1), (1, 0)
    rates = {
        "prevalence": _partial((acted_pos, left_pos), n, sides, "cases"),
        "tpr": _partial((acted_pos,), (acted_pos, left_pos), sides, "positives"),
        "fpr": _partial((acted_neg,), (acted_neg, left_neg), sides, "negatives"),
        "ppv": _partial((acted_pos,), act.cases, sides, "actions"),
        "npv": _partial((left_neg,), no_act.cases, sides, "no-actions"),
    }
    if n == 0:
        rates["action_rate"] = PartialRate("none", None, None, None, "no cases")
    else:
        share = act.cases / n
        rates["action_rate"] = PartialRate("identified", share, share, share, "decisions logged")
    return {m: rates[m] for m in SELECTIVE_METRICS}

"""Tallies: the audit's counts of a set of records, as one vector per cohort cell.

A *cell* is (policy, version, group, shadow version, the day the decision was issued in the
batch's time zone: the audit's time zone, so a month is a set of whole days). For the
records of one tally batch, every cell gets a vector of counts and sums (:data:`FIELDS`): the
decisions issued that day; the outcomes reported for them (a correction adds its new value and
takes its previous one away, so summing the batches of all time gives the outcome that counts
now); the final decisions recorded for them. The audit of a month adds up the tallies of the
days inside it instead of reading every record, and counts only what is not tallied yet.

The same functions tally records for the sealer, for the audit's untallied tail, for
verification and for the standalone bundle verifier, so all agree by construction; every field
is an exact integer (real-valued sums in units of 2^-64, see :data:`SCALE`). Standard library
only.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date
from typing import Any

BINS = 10
"""Equal-width score bins over [0, 1] (the reliability table)."""

_DECISION = (
    "n",
    "actions",
    "expected_actions",
    "shadow_n",
    "shadow_actions",
    "differs",
    "zone0",
    "zone1",
    "zone2",
    "band_actions",
)
_OUTCOME = (
    "observed",
    "positives",
    "tp",
    "fp",
    "expected_fp",
    "expected_fn",
    "shadow_observed",
    "shadow_positives",
    "shadow_tp",
    "shadow_fp",
    "s_n",
    "s_y",
    "s1",
    "s2",
    "s3",
    "s4",
    "s_yp",
    "log_double",
    "log_half",
    *(f"b{i}_n" for i in range(BINS)),
    *(f"b{i}_pos" for i in range(BINS)),
    *(f"b{i}_sum" for i in range(BINS)),
    # observed outcomes by randomization zone (0: p = 0, 1: 0 < p < 1, 2: p = 1), by the
    # decision drawn (a0: no action, a1: action) and by the outcome (y0, y1)
    *(f"z{z}_a{a}_y{y}" for z in range(3) for a in range(2) for y in range(2)),
    # over observed band cases: sums of 1/p (acted on) and 1/(1 - p) (not acted on), by y
    "inv_p_y0",
    "inv_p_y1",
    "inv_q_y0",
    "inv_q_y1",
)
_FINAL = ("finals", "overrides")
FIELDS: tuple[str, ...] = (*_DECISION, *_OUTCOME, *_FINAL)
"""Every field of a tally vector, in storage order."""
FLOAT_FIELDS = frozenset(
    {
        "expected_actions",
        "expected_fp",
        "expected_fn",
        "s1",
        "s2",
        "s3",
        "s4",
        "s_yp",
        "log_double",
        "log_half",
        "inv_p_y0",
        "inv_p_y1",
        "inv_q_y0",
        "inv_q_y1",
        *(f"b{i}_sum" for i in range(BINS)),
    }
)
"""Fields that are sums of real numbers; the rest are integer counts."""
_INDEX = {name: i for i, name in enumerate(FIELDS)}


@dataclass(frozen=True, slots=True, order=True)
class Cell:
    policy: str
    version: int
    group: str
    shadow_version: int | None
    day: date

    def key(self) -> tuple[str, int, str, int, str]:
        return (
            self.policy,
            self.version,
            self.group,
            self.shadow_version or 0,
            self.day.isoformat(),
        )


@dataclass(frozen=True, slots=True)
class DecisionFacts:
    """What a tally needs of one decision."""

    policy: str
    version: int
    group: str
    shadow_version: int | None
    day: date
    action: bool
    probability: float
    shadow_action: bool | None
    score: float

    cell: Cell = field(init=False, compare=False, repr=False)

    def __post_init__(self) -> None:
        object.__setattr__(
            self, "cell", Cell(self.policy, self.version, self.group, self.shadow_version, self.day)
        )


Vector = list[int]
Tallies = dict[Cell, Vector]
SCALE = 1 << 64
"""Real-valued fields are kept as integers in units of 2^-64 (each term truncated toward zero
once, exactly, before it is added), so sums are exact and do not depend on the order or the
grouping of the records: a month added up from daily tallies, recounted from the records, or
recounted by an outside verifier gives the same integers."""
_SCALE_F = float(SCALE)


def fixed(x: float) -> int:
    """``x`` in units of 2^-64, truncated toward zero (exact: scaling by a power of two)."""
    scaled = x * _SCALE_F
    if not math.isfinite(scaled):
        raise ValueError(f"{x!r} cannot be tallied")
    return int(scaled)


def _zone(p: float) -> int:
    return 2 if p >= 1.0 else (0 if p <= 0.0 else 1)


def _new() -> Vector:
    return [0] * len(FIELDS)


_I = _INDEX
_N, _ACTIONS, _EXPECTED_ACTIONS = _I["n"], _I["actions"], _I["expected_actions"]
_SHADOW_N, _SHADOW_ACTIONS, _DIFFERS = _I["shadow_n"], _I["shadow_actions"], _I["differs"]
_ZONES = (_I["zone0"], _I["zone1"], _I["zone2"])
_BAND_ACTIONS = _I["band_actions"]


def add_decision(t: Tallies, d: DecisionFacts) -> None:
    v = t.get(d.cell)
    if v is None:
        v = t[d.cell] = _new()
    v[_N] += 1
    v[_ACTIONS] += d.action
    v[_EXPECTED_ACTIONS] += fixed(d.probability)
    if d.shadow_action is not None:
        v[_SHADOW_N] += 1
        v[_SHADOW_ACTIONS] += d.shadow_action
        v[_DIFFERS] += d.shadow_action != d.action
    zone = _zone(d.probability)
    v[_ZONES[zone]] += 1
    if zone == 1 and d.action:
        v[_BAND_ACTIONS] += 1


_OBSERVED, _POSITIVES, _TP, _FP = _I["observed"], _I["positives"], _I["tp"], _I["fp"]
_EXPECTED_FP, _EXPECTED_FN = _I["expected_fp"], _I["expected_fn"]
_SH_OBSERVED, _SH_POSITIVES = _I["shadow_observed"], _I["shadow_positives"]
_SH_TP, _SH_FP = _I["shadow_tp"], _I["shadow_fp"]
_S_N, _S_Y, _S1, _S2, _S3, _S4 = (_I[k] for k in ("s_n", "s_y", "s1", "s2", "s3", "s4"))
_S_YP, _LOG_DOUBLE, _LOG_HALF = _I["s_yp"], _I["log_double"], _I["log_half"]
_BIN_N = tuple(_I[f"b{b}_n"] for b in range(BINS))
_BIN_POS = tuple(_I[f"b{b}_pos"] for b in range(BINS))
_BIN_SUM = tuple(_I[f"b{b}_sum"] for b in range(BINS))
_ZONE_AY = {(z, a, y): _I[f"z{z}_a{a}_y{y}"] for z in range(3) for a in range(2) for y in range(2)}
_INV_P = (_I["inv_p_y0"], _I["inv_p_y1"])
_INV_Q = (_I["inv_q_y0"], _I["inv_q_y1"])


def add_outcome(t: Tallies, d: DecisionFacts, outcome: int, sign: int = 1) -> None:
    """Count ``outcome`` for decision ``d`` (``sign`` -1 takes a replaced value away)."""
    y, a, p, s = int(outcome), bool(d.action), d.probability, d.score
    if y not in (0, 1):
        raise ValueError(f"an outcome is 0 or 1, got {outcome!r}")
    v = t.get(d.cell)
    if v is None:
        v = t[d.cell] = _new()
    v[_OBSERVED] += sign
    if y:
        v[_POSITIVES] += sign
        v[_EXPECTED_FN] += sign * fixed(1.0 - p)
    else:
        v[_EXPECTED_FP] += sign * fixed(p)
    if a:
        v[_TP if y else _FP] += sign
    if d.shadow_action is not None:
        v[_SH_OBSERVED] += sign
        if y:
            v[_SH_POSITIVES] += sign
        if d.shadow_action:
            v[_SH_TP if y else _SH_FP] += sign
    if 0.0 <= s <= 1.0:
        s1, s2 = fixed(s), s * s
        v[_S_N] += sign
        v[_S1] += sign * s1
        v[_S2] += sign * fixed(s2)
        v[_S3] += sign * fixed(s2 * s)
        v[_S4] += sign * fixed(s2 * s2)
        v[_LOG_DOUBLE] += sign * fixed(math.log1p(s))
        v[_LOG_HALF] += sign * fixed(math.log1p(-0.5 * s))
        b = min(BINS - 1, int(s * BINS))
        v[_BIN_N[b]] += sign
        v[_BIN_SUM[b]] += sign * s1
        if y:
            v[_S_Y] += sign
            v[_S_YP] += sign * s1
            v[_BIN_POS[b]] += sign
    zone = 2 if p >= 1.0 else (0 if p <= 0.0 else 1)
    v[_ZONE_AY[(zone, int(a), y)]] += sign
    if zone == 1:
        if a:
            v[_INV_P[y]] += sign * fixed(1.0 / p)
        else:
            v[_INV_Q[y]] += sign * fixed(1.0 / (1.0 - p))


def add_final(t: Tallies, d: DecisionFacts, overridden: bool) -> None:
    v = t.get(d.cell)
    if v is None:
        v = t[d.cell] = _new()
    v[_I["finals"]] += 1
    v[_I["overrides"]] += bool(overridden)


def add_vector(t: Tallies, cell: Cell, vector: Sequence[int]) -> None:
    """Add ``vector`` to the cell's (in place)."""
    acc = t.get(cell)
    if acc is None:
        t[cell] = list(vector)
        return
    for i, x in enumerate(vector):
        acc[i] += x


def merged(parts: Iterable[Mapping[Cell, Sequence[int]]]) -> Tallies:
    """The field-wise sum of several tallies (exact, in any order)."""
    out: Tallies = {}
    for part in parts:
        for cell, vector in part.items():
            add_vector(out, cell, vector)
    return out


def count(vector: Sequence[int], name: str) -> int:
    """A count field."""
    if name in FLOAT_FIELDS:
        raise ValueError(f"{name} is a sum of reals, not a count")
    return int(vector[_INDEX[name]])


def real(vector: Sequence[int], name: str) -> float:
    """A real-valued field as the nearest float (the exact sum, rounded once)."""
    if name not in FLOAT_FIELDS:
        raise ValueError(f"{name} is a count, not a sum of reals")
    return vector[_INDEX[name]] / SCALE


def digest(tallies: Mapping[Cell, Sequence[int]]) -> bytes:
    """SHA-256 of the tallies in a fixed text form: one line per cell, sorted, tab-separated
    key and integers. Cells whose every field is zero are left out (a correction that puts a
    value back leaves nothing to count)."""
    h = hashlib.sha256()
    for cell in sorted(tallies):
        vector = tallies[cell]
        if not any(vector):
            continue
        row = [*cell.key(), *vector]
        h.update(("\t".join(str(x) for x in row) + "\n").encode("utf-8"))
    return h.digest()


def as_row(cell: Cell, vector: Sequence[int]) -> dict[str, Any]:
    """One stored tally row's values: the cell and the vector (a JSON array of integers)."""
    return {
        "policy": cell.policy,
        "version": cell.version,
        "group": cell.group,
        "shadow_version": cell.shadow_version,
        "day": cell.day,
        "vector": [int(x) for x in vector],
    }


def from_row(row: Any) -> tuple[Cell, Vector]:
    """A stored tally row back as (cell, vector); refuses a vector of the wrong length."""
    vector = [int(x) for x in row.vector]
    if len(vector) != len(FIELDS):
        raise ValueError(f"a tally vector has {len(FIELDS)} fields, got {len(vector)}")
    return Cell(row.policy, int(row.version), row.group, row.shadow_version, row.day), vector

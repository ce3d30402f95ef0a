"""The inputs and outputs of the charts across months."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

from service.audit.charts import ChartSide
from service.audit.month import Month
from service.audit.realized import CellCounts, ScoreSums
from service.audit.verdicts import CheckKind
from service.stats.pooling import PooledDifference
from service.stats.trend import Trend


@dataclass(frozen=True, slots=True)
class MonthCounts:
    """One month of one version: its cells, whether its outcomes were mature, and the score
    sums of each group's cases with an outcome (for the risk-adjusted charts)."""

    month: Month
    mature: bool
    cells: Mapping[str, CellCounts]
    scores: Mapping[str, ScoreSums] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class MonthEstimate:
    """The charted quantity in one month with its 95% interval (descriptive)."""

    month: str
    value: float
    low: float
    high: float


@dataclass(frozen=True, slots=True)
class Monitor:
    """The charts of one (version, check, rate, group) over the months that count."""

    version: int
    kind: CheckKind
    metric: str
    group: str
    against: str
    months: tuple[str, ...]
    sides: tuple[ChartSide, ...]
    estimates: tuple[MonthEstimate, ...]
    pooled: PooledDifference | None
    trend: Trend | None
    figures_from: tuple[tuple[str, str], ...]

    @property
    def signal(self) -> bool:
        return any(s.signal for s in self.sides)

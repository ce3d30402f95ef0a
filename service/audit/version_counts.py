"""What the database gives the audit about one policy version in one month."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

from service.audit.realized import CellCounts, ScoreSums, ShadowCounts
from service.policy.document import PolicyDocument
from service.stats.selective_labels import SelectiveCounts


@dataclass(frozen=True)
class VersionCounts:
    """The counts of one policy version in the month's cohort, per group: the confusion
    cells, the shadow versions' cells, the score sums of cases with an outcome, and (under
    selective labels) the counts by randomization zone."""

    version: int
    document: PolicyDocument
    cells: Mapping[str, CellCounts]
    shadows: Mapping[int, Mapping[str, ShadowCounts]] = field(default_factory=dict)
    content_hash: str | None = None
    scores: Mapping[str, ScoreSums] = field(default_factory=dict)
    selective: Mapping[str, SelectiveCounts] = field(default_factory=dict)

"""The report snapshot as typed data: what one audit run publishes (and keeps internally).

A snapshot is stored as the JSON of :class:`Snapshot` and never changes. Its ``digest`` is the
SHA-256 of the canonical JSON (keys sorted, no spaces, UTF-8) of everything else. The layout is
documented in ``docs/audit.md`` ("Snapshot layout"); :data:`SNAPSHOT_FORMAT` names its version.

Two views are built from the same counts: ``published`` (small cells suppressed, the one the
report endpoints serve) and ``internal`` (every count, for the audit role only, clearly
labelled, and the input of the cross-month monitoring).
"""

from __future__ import annotations

import hashlib
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from service.policy.document import canonical_json

SNAPSHOT_FORMAT = "evenhand.audit-snapshot/2"

Withheld = Literal["small-cell", "not-identifiable", "no-cases", "pending"]
PublishedCount = int | Literal["<11"] | None
"""A count as published: the number, ``"<11"`` (1 to 10) or None (withheld because a small
count could be worked out from it)."""
StatusName = Literal[
    "breach", "undecided", "holds", "too-few", "not-identifiable", "pending", "outside-promise"
]
CheckName = Literal["parity", "four-fifths", "promise"]
ChartName = Literal["parity", "four-fifths", "calibration"]


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", populate_by_name=True)


class Estimate(_Model):
    """A figure with its 95% interval, or why it is not shown."""

    value: float | None = None
    low: float | None = None
    high: float | None = None
    withheld: Withheld | None = None


class FourFifthsFigures(_Model):
    """A group's favourable rate divided by the comparator's, with the Katz 95% interval;
    ``flagged`` is the rule's own point comparison (ratio strictly below 4/5, exact)."""

    against: str
    ratio: Estimate
    flagged: bool | None


class CostFigures(_Model):
    realized: float | None = None
    expected: float | None = None
    promised: float | None = None
    withheld: Withheld | None = None


class PartialRate(_Model):
    """A rate under selective labels: identified, estimated by inverse-probability weighting
    over the randomized band, or worst/best-case bounds."""

    kind: Literal["identified", "weighted", "bounds", "none"]
    value: float | None
    low: float | None
    high: float | None
    note: str
    withheld: Withheld | None = None


class ScoreSumsRow(_Model):
    """Sums over the group's cases with an outcome (internal view only): the input of the
    calibration tests and the risk-adjusted charts of later months."""

    n: int
    sum_y: float
    sum_p: float
    sum_p2: float
    sum_p3: float
    sum_p4: float
    sum_yp: float
    log_double: float
    log_half: float
    bin_counts: list[int]
    bin_positives: list[int]
    bin_score_sums: list[float]


class GroupRow(_Model):
    group: str
    reference: bool
    comparator: bool
    outside_promise: str | None
    counts: dict[str, PublishedCount]
    rates: dict[str, Estimate]
    gaps: dict[str, Estimate]
    four_fifths: FourFifthsFigures | None
    cost_per_case: CostFigures
    promised: dict[str, float] | None
    partial_rates: dict[str, PartialRate] | None = None
    score_sums: ScoreSumsRow | None = None


class ShadowGroup(_Model):
    group: str
    counts: dict[str, PublishedCount]
    rates: dict[str, Estimate]


class ShadowSection(_Model):
    version: int
    groups: list[ShadowGroup]


class Band(_Model):
    low: float
    high: float | None


class EvidenceRow(_Model):
    procedure: str
    p_inside: float
    p_inside_adjusted: float
    p_outside: float
    p_outside_adjusted: float
    side: Literal["above", "below"]


class CheckRow(_Model):
    key: str
    version: int
    check: CheckName
    criterion: str | None
    metric: str
    group: str
    against: str
    band: Band
    estimate: Estimate
    status: StatusName
    evidence: EvidenceRow | None
    message: str


class PValueRow(_Model):
    statistic: float
    p_value: float
    p_adjusted: float


class ReliabilityRow(_Model):
    low: float
    high: float
    n: PublishedCount
    mean_score: float | None
    observed: Estimate


class CalibrationRow(_Model):
    """Calibration of the score within one group this month."""

    group: str
    status: Literal["departs", "no-evidence", "pending", "too-few"]
    mean_score: float | None
    observed_rate: float | None
    spiegelhalter: PValueRow | None
    observed_expected: PValueRow | None
    reliability: list[ReliabilityRow]
    withheld: Withheld | None = None


class ChartSideRow(_Model):
    side: Literal["above", "below"]
    in_control: float
    out_of_control: float
    limit: float
    statistic: float | None
    path: list[float] | None
    signal: bool
    first_signal: str | None


class MonthEstimateRow(_Model):
    month: str
    estimate: Estimate


class TrendRow(_Model):
    slope: float
    standard_error: float
    p_value: float
    points: int


class MonitorRow(_Model):
    key: str
    check: ChartName
    metric: str
    group: str
    against: str
    months: list[str]
    sides: list[ChartSideRow]
    estimates: list[MonthEstimateRow]
    pooled: Estimate | None
    trend: TrendRow | None
    signal: bool
    message: str


class Costs(_Model):
    false_positive: float
    false_negative: float


class VersionSection(_Model):
    version: int
    content_hash: str | None
    criterion: str | None
    tolerance: float
    tolerance_source: Literal["auditor", "version", "default"]
    favourable: Literal["action", "no-action"]
    outcome_observed_after: Literal["both", "action", "no-action"]
    action_label: str
    no_action_label: str
    costs: Costs
    reference_group: str | None
    reference_source: str
    comparator_group: str | None
    comparator_source: str
    promises: Literal["two-sample", "exact", "none"]
    totals: dict[str, PublishedCount]
    groups: list[GroupRow]
    shadows: list[ShadowSection]
    checks: list[CheckRow]
    calibration: list[CalibrationRow] = []
    calibration_family: str | None = None
    monitoring: list[MonitorRow] = []
    monitoring_design: str | None = None


class MaturitySection(_Model):
    state: Literal["mature", "provisional"]
    reason: str
    observable: PublishedCount
    observed: PublishedCount
    share: float | None
    required_share: float
    mature_after: str
    outcome_checks: Literal["decided", "pending", "decided provisionally"]


class FamilySection(_Model):
    method: Literal["holm", "benjamini-yekutieli"]
    level: float
    tests: int
    description: str


class AlertRow(_Model):
    level: Literal["breach", "watch"]
    version: int
    check: CheckName | ChartName
    metric: str
    group: str
    against: str
    message: str


class Cohort(_Model):
    from_: str = Field(alias="from")
    until: str


class RunSettings(_Model):
    min_count: int
    small_cell_limit: int
    reference_group: str | None
    tolerance: float | None
    provisional: bool


class Snapshot(_Model):
    format: Literal["evenhand.audit-snapshot/2"] = "evenhand.audit-snapshot/2"
    view: Literal["published", "internal"]
    policy: str
    month: str
    time_zone: str
    cohort: Cohort
    created_at: str
    code_version: str
    settings: RunSettings
    maturity: MaturitySection
    family: FamilySection
    row_counts: dict[str, PublishedCount]
    versions_covered: list[int]
    versions: list[VersionSection]
    alerts: list[AlertRow]
    cautions: list[str]
    digest: str = ""

    def content(self) -> dict[str, object]:
        """The JSON-able content, as stored and served."""
        return self.model_dump(mode="json", by_alias=True)

    def computed_digest(self) -> str:
        content = self.content()
        content.pop("digest")
        return hashlib.sha256(canonical_json(content)).hexdigest()

    def sealed(self) -> Snapshot:
        """This snapshot with its digest set."""
        return self.model_copy(update={"digest": self.computed_digest()})

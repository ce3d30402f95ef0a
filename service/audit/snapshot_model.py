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
    check: CheckName
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

"""A month's tallies (``service.log.tallies``) as the audit's per-version counts. Pure.

Cells are added up over the days of the month and, for a group's own counts, over its shadow
versions; each shadow version keeps its own cells. Score sums and randomization-zone counts
come from the same vectors.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

from service.audit.realized import BINS, CellCounts, Observability, ScoreSums, ShadowCounts
from service.log import tallies
from service.log.tallies import Cell, count, real
from service.stats.calibration import PowerSums
from service.stats.selective_labels import SelectiveCounts

CellKey = tuple[int, str]


@dataclass
class Zones:
    """Counts of one (version, group) by randomization zone of the recorded probability of
    action (0: p = 0, 1: 0 < p < 1, 2: p = 1); made into SelectiveCounts per mode."""

    cases: list[int] = field(default_factory=lambda: [0, 0, 0])
    band_actions: int = 0
    # observed outcomes by (zone, acted, outcome); band sums of 1/p (acted) and 1/(1-p) (not)
    observed: dict[tuple[int, bool, int], int] = field(default_factory=dict)
    inverse_p: dict[int, float] = field(default_factory=dict)
    inverse_q: dict[int, float] = field(default_factory=dict)

    def selective(self, mode: Observability) -> SelectiveCounts | None:
        if mode == "both":
            return None
        acted = mode == "action"

        def seen(zone: int, y: int) -> int:
            return self.observed.get((zone, acted, y), 0)

        weights = self.inverse_p if acted else self.inverse_q
        return SelectiveCounts(
            mode=mode,
            certain_action=self.cases[2],
            band=self.cases[1],
            certain_no_action=self.cases[0],
            band_actions=self.band_actions,
            certain_action_positives=seen(2, 1) if acted else 0,
            certain_action_negatives=seen(2, 0) if acted else 0,
            band_positives=seen(1, 1),
            band_negatives=seen(1, 0),
            certain_no_action_positives=0 if acted else seen(0, 1),
            certain_no_action_negatives=0 if acted else seen(0, 0),
            band_weighted_positives=weights.get(1, 0.0),
            band_weighted_negatives=weights.get(0, 0.0),
        )


@dataclass(frozen=True)
class VersionTallies:
    """One version's month: cells per group, shadow cells, score sums and zones."""

    cells: dict[str, CellCounts]
    shadows: dict[int, dict[str, ShadowCounts]]
    scores: dict[str, ScoreSums]
    zones: dict[str, Zones]


def _add(into: dict[CellKey, list[int]], key: CellKey, vector: Sequence[int]) -> None:
    acc = into.get(key)
    if acc is None:
        into[key] = list(vector)
    else:
        for i, x in enumerate(vector):
            acc[i] += x


def by_version(month: Mapping[Cell, Sequence[int]]) -> dict[int, VersionTallies]:
    """The month's tallies per version; raises ValueError when the counts contradict each
    other (which only a damaged or edited log can cause)."""
    groups: dict[CellKey, list[int]] = {}
    shadow_cells: dict[tuple[int, int, str], list[int]] = {}
    for cell, vector in month.items():
        _add(groups, (cell.version, cell.group), vector)
        if cell.shadow_version is not None:
            key = (cell.version, cell.shadow_version, cell.group)
            acc = shadow_cells.setdefault(key, [0] * len(vector))
            for i, x in enumerate(vector):
                acc[i] += x
    out: dict[int, VersionTallies] = {}
    for (version, group), v in sorted(groups.items()):
        if not count(v, "n"):
            continue
        view = out.setdefault(version, VersionTallies({}, {}, {}, {}))
        view.cells[group] = _cell(v)
        sums = _score_sums(v)
        if sums.power.n:
            view.scores[group] = sums
        view.zones[group] = _zones(v)
    for (version, shadow, group), v in sorted(shadow_cells.items()):
        if version in out and count(v, "shadow_n"):
            out[version].shadows.setdefault(shadow, {})[group] = ShadowCounts(
                n=count(v, "shadow_n"),
                actions=count(v, "shadow_actions"),
                differs=count(v, "differs"),
                observed=count(v, "shadow_observed"),
                positives=count(v, "shadow_positives"),
                tp=count(v, "shadow_tp"),
                fp=count(v, "shadow_fp"),
            )
    return out


def _cell(v: Sequence[int]) -> CellCounts:
    return CellCounts(
        n=count(v, "n"),
        actions=count(v, "actions"),
        observed=count(v, "observed"),
        positives=count(v, "positives"),
        tp=count(v, "tp"),
        fp=count(v, "fp"),
        finals=count(v, "finals"),
        overrides=count(v, "overrides"),
        expected_actions=real(v, "expected_actions"),
        expected_fp=real(v, "expected_fp"),
        expected_fn=real(v, "expected_fn"),
    )


def _score_sums(v: Sequence[int]) -> ScoreSums:
    return ScoreSums(
        power=PowerSums(
            n=count(v, "s_n"),
            sum_y=float(count(v, "s_y")),
            sum_p=real(v, "s1"),
            sum_p2=real(v, "s2"),
            sum_p3=real(v, "s3"),
            sum_p4=real(v, "s4"),
            sum_yp=real(v, "s_yp"),
        ),
        log_double=real(v, "log_double"),
        log_half=real(v, "log_half"),
        bin_counts=[count(v, f"b{b}_n") for b in range(BINS)],
        bin_positives=[count(v, f"b{b}_pos") for b in range(BINS)],
        bin_score_sums=[real(v, f"b{b}_sum") for b in range(BINS)],
    )


def _zones(v: Sequence[int]) -> Zones:
    zones = Zones(
        cases=[count(v, f"zone{z}") for z in range(3)],
        band_actions=count(v, "band_actions"),
    )
    for z in range(3):
        for a in range(2):
            for y in range(2):
                n = count(v, f"z{z}_a{a}_y{y}")
                if n:
                    zones.observed[(z, bool(a), y)] = n
    zones.inverse_p = {y: real(v, f"inv_p_y{y}") for y in range(2)}
    zones.inverse_q = {y: real(v, f"inv_q_y{y}") for y in range(2)}
    return zones


assert tallies.BINS == BINS, "the tallies and the reliability table use the same score bins"

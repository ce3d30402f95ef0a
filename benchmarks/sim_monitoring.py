"""Error rates and detection delay of the charts across months (issue "evidence over time").

Calls ``version_monitors`` (``service/audit/monitoring.py``) on simulated month-by-month
histories of the demo's nine groups (``benchmarks/sim_scenario.py``): an equal-opportunity
policy with exact promises, tolerance 0.05, audit level 0.05, 2,000 decisions a month, outcome
coverage 88%, every month mature. Each audit month the charts are recomputed from the latest
``WINDOW`` (24) months of history, as the audit will, and a chart "signals" in a month when its
statistic that month is at or above its limit (``Monitor.signal``).

- **False alarms**: the probability that any chart of the version signals in any of the first
  12 monthly audits of a policy in control, (a) with every true TPR gap 0 and (b) with every
  non-reference group's TPR at the edge of the tolerance (+0.05 and -0.05 in turn); Wilson 95%
  intervals. Design bound: the audit plan's level, 0.05. To save time the twelfth audit is
  computed in full and an earlier one only for the groups with a chart near a limit
  (``year_signal``); the first ``--verify-years`` years of each row compute every audit in
  full and the script stops if the answers differ.
- **The single-month test at the same yearly false-alarm rate**: in-control months at the edge
  are run through ``version_checks`` + ``decide``; Holm shows a breach in a month iff the
  smallest Holm-adjusted outside p-value is at most the level, so the monthly level whose
  probability of any breach within 12 independent months equals the charts' measured one (b)
  is read off the simulated distribution of that smallest adjusted p-value.
- **Detection**: one group's TPR sustained 0.10 (twice the tolerance) below the reference's,
  everything else in control, for the smallest group, a mid-size one and the largest
  non-reference one: months to the first signal of any chart of that group, against months to
  the first ``breach`` of any check of that group by the single-month test at the matched level
  (and at the plan's level 0.05), on the same simulated months; runs are censored at ``--cap``.

To keep the run time down, the detection runs call ``version_monitors`` on a history holding
only the reference group and the group with the gap, with the level scaled by 2 / 16 (two
charts instead of sixteen; ``group_monitors``): that group's charts then get exactly the inputs
and the per-chart false-alarm bound (level / 16) of the full call. The script checks this on
the first months of every group's first run and stops if any figure differs.

    .venv/bin/python benchmarks/sim_monitoring.py [--seed N] [--years 600] [--verify-years 20]
        [--runs 200] [--cap 240] [--calibration-months 20000] [--pair-years 2000]
        [--window 24] [--quick] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from bisect import bisect_right
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sim_scenario import (
    COMMON_TPR,
    COVERAGE,
    DEFAULT_SEED,
    LARGEST,
    MID,
    PREVALENCE,
    REFERENCE,
    SHARES,
    SMALLEST,
    TOLERANCE,
    Truth,
    cell_text,
    document,
    draw_cells,
    machine_header,
    promised,
    quantiles,
    shifted,
    wilson,
)

from service.audit.monitoring import (
    HORIZON,
    WINDOW,
    ChartSide,
    Monitor,
    MonthCounts,
    version_monitors,
)
from service.audit.month import Month
from service.audit.verdicts import DEFAULT_MIN_COUNT, Check, MonthContext, decide
from service.audit.version_checks import version_checks
from service.audit.version_settings import VersionSettings, resolve_settings
from service.policy.document import AuditPlan

LEVEL = 0.05
VOLUME = 2000
START = Month.parse("2025-01")
CONTEXT = MonthContext(min_count=DEFAULT_MIN_COUNT, decide_outcomes=True)
DOC = document()


def settings_for(cells: Mapping[str, Any]) -> VersionSettings:
    s = resolve_settings(DOC, cells, None, None)
    if s.reference_group != REFERENCE:
        raise RuntimeError(f"reference {s.reference_group!r}, expected {REFERENCE!r}")
    return s


def monitors(history: Sequence[MonthCounts], window: int, level: float = LEVEL) -> list[Monitor]:
    looked_at = history[-window:] if window > 0 else history
    return version_monitors(1, DOC, settings_for(history[-1].cells), looked_at, level)


def restricted(
    history: Sequence[MonthCounts], groups: Collection[str], scores: bool = True
) -> list[MonthCounts]:
    """``history`` with the cells of the reference and ``groups`` only, and the score sums of
    ``groups`` only (none without ``scores``)."""
    keep = {REFERENCE, *groups}
    return [
        MonthCounts(
            m.month,
            m.mature,
            {g: c for g, c in m.cells.items() if g in keep},
            {g: ss for g, ss in m.scores.items() if g in groups} if scores else {},
        )
        for m in history
    ]


def chart_count(history: Sequence[MonthCounts]) -> int:
    """The charts ``version_monitors`` gives the scenario's version over ``history``: above and
    below for each group seen but the reference, and two outcome charts for each group seen
    with score sums (no group is outside the promise)."""
    seen = {g for m in history for g in m.cells}
    scored = {g for m in history for g in m.scores} & seen
    return 2 * len(seen - {REFERENCE}) + 2 * len(scored)


def group_monitors(
    history: Sequence[MonthCounts], groups: Collection[str], window: int, scores: bool = True
) -> list[Monitor]:
    """The monitors of ``groups`` as the full call computes them (their outcome charts only
    with ``scores``): a call on the restricted history, with the level scaled by its charts
    over the full call's, gives every chart the full call's inputs and per-chart bound."""
    looked_at = history[-window:] if window > 0 else history
    part = restricted(looked_at, groups, scores)
    ms = monitors(part, 0, LEVEL * chart_count(part) / chart_count(looked_at))
    return [m for m in ms if m.group in groups]


def verify(
    history: Sequence[MonthCounts], groups: Collection[str], window: int, scores: bool = True
) -> None:
    """Stop unless the restricted call gives exactly the full call's monitors of ``groups``."""
    fast = group_monitors(history, groups, window, scores)
    kinds = {_key(m) for m in fast}
    full = [m for m in monitors(history, window) if m.group in groups and _key(m) in kinds]
    if sorted(full, key=_key) != sorted(fast, key=_key):
        raise RuntimeError(f"restricted call differs from the full call for {sorted(groups)}")


def _key(m: Monitor) -> tuple[str, str]:
    return (m.kind.value, m.group)


SCREEN = 0.25
"""An audit month before the twelfth is computed in full only when some chart's statistic that
month reaches this share of the chart's limit at the twelfth audit (see ``year_signal``)."""


@dataclass
class Screening:
    """What the screened false-alarm years did: audits computed in full beyond the twelfth,
    years verified against every audit in full, and the smallest ratio seen there of a chart's
    limit at an earlier audit to its limit at the twelfth."""

    exact_audits: int = 0
    verified_years: int = 0
    smallest_ratio: float = math.inf


def _statistic_at(m: Monitor, side: ChartSide, month: str) -> float | None:
    """The side's statistic as the audit of ``month`` shows it: its value at the latest charted
    month up to ``month`` (None: nothing charted yet)."""
    j = bisect_right(m.months, month)
    return side.path[j - 1] if j else None


def _signalling(ms: Sequence[Monitor]) -> list[str]:
    return sorted({f"{m.kind.value}/{m.group}" for m in ms if m.signal})


def year_signal(
    history: Sequence[MonthCounts], window: int, screening: Screening, verify_all: bool
) -> tuple[int | None, list[str], int]:
    """The first of the year's audits (1-12) at which any chart of the version signals, the
    charts that signal then, and the number of charts.

    A chart signals at audit ``t`` when its statistic at ``t`` is at or above its limit at
    ``t``. Each month's increment depends on that month alone, so within the window the
    statistics of audit ``t`` are the first entries of the twelfth audit's paths (checked in
    verified years). Audit 12 is computed in full. At an earlier audit, only the groups with a
    chart whose statistic there reaches ``SCREEN`` times its limit at audit 12 are computed,
    by a restricted call (``group_monitors``); any other chart could signal only with a limit
    below ``SCREEN`` times the twelfth's. ``verify_all`` computes every audit in full, checks
    that the screened answer and the restricted calls agree with it, and records the smallest
    ratio of a limit to the twelfth's (the script stops when one falls below ``SCREEN``).
    """
    last = monitors(history, window)
    charts = sum(len(m.sides) for m in last)
    first: int | None = None
    which: list[str] = []
    for t in range(1, len(history)):
        month = str(history[t - 1].month)
        flagged = {
            m.group
            for m in last
            for side in m.sides
            if (v := _statistic_at(m, side, month)) is not None and v >= SCREEN * side.limit
        }
        if flagged:
            screening.exact_audits += 1
            ms = group_monitors(history[:t], flagged, window)
            if verify_all:
                verify(history[:t], flagged, window)
            if any(m.signal for m in ms):
                first, which = t, _signalling(ms)
                break
    if first is None and any(m.signal for m in last):
        first, which = len(history), _signalling(last)
    if verify_all:
        screening.verified_years += 1
        full_first, full_which = None, []
        sides = {(m.kind, m.group, s.side): (m, s) for m in last for s in m.sides}
        for t in range(1, len(history) + 1):
            ms = monitors(history[:t], window) if t < len(history) else last
            for m in ms:
                for s in m.sides:
                    m12, s12 = sides[(m.kind, m.group, s.side)]
                    j = len(m.months)
                    if m.months != m12.months[:j] or any(
                        abs(a - b) > 1e-9 for a, b in zip(s.path, s12.path[:j], strict=True)
                    ):
                        raise RuntimeError(f"audit {t}: {m.group}'s path is not a prefix")
                    screening.smallest_ratio = min(screening.smallest_ratio, s.limit / s12.limit)
            if full_first is None and any(m.signal for m in ms):
                full_first, full_which = t, _signalling(ms)
        if (full_first, full_which) != (first, which) or screening.smallest_ratio < SCREEN:
            raise RuntimeError(
                f"screening differs from the full audits: {first} {which} against "
                f"{full_first} {full_which} (smallest limit ratio {screening.smallest_ratio})"
            )
    return first, which, charts


def false_alarm_years(
    rng: np.random.Generator,
    years: int,
    draw: Callable[[np.random.Generator, int], MonthCounts],
    window: int,
    verify_years: int,
) -> tuple[int, int, dict[str, int], Screening]:
    """(years with any signal in the first 12 audits, charts per call, the charts signalling at
    the first such audit by kind/group, the screening's record)."""
    hits, charts, by_chart = 0, 0, {}
    screening = Screening()
    for year in range(years):
        history = [draw(rng, month) for month in range(HORIZON)]
        first, which, n = year_signal(history, window, screening, year < verify_years)
        charts = max(charts, n)
        if first is not None:
            hits += 1
            for name in which:
                by_chart[name] = by_chart.get(name, 0) + 1
    return hits, charts, by_chart, screening


def plain_month(truth: Mapping[str, Truth]) -> Callable[[np.random.Generator, int], MonthCounts]:
    """Months of ``truth`` without score sums (the version's 16 gap charts only)."""

    def draw(rng: np.random.Generator, month: int) -> MonthCounts:
        return MonthCounts(START.shifted(month), True, draw_cells(rng, VOLUME, truth))

    return draw


def smallest_p(decided: Sequence[Check], group: str | None = None) -> float:
    """The smallest Holm-adjusted outside p-value (of ``group``'s checks, or of all)."""
    values = [
        c.evidence.p_outside_adjusted
        for c in decided
        if c.evidence is not None
        and c.evidence.p_outside_adjusted is not None
        and (group is None or c.group == group)
    ]
    return min(values, default=1.0)


def smallest_adjusted_p(
    rng: np.random.Generator, months: int, truth: Mapping[str, Truth]
) -> npt.NDArray[np.float64]:
    """Per in-control month: the smallest Holm-adjusted outside p-value of the family."""
    out = np.empty(months)
    for i in range(months):
        cells = draw_cells(rng, VOLUME, truth)
        checks = version_checks(1, DOC, cells, settings_for(cells), CONTEXT)
        out[i] = smallest_p(decide(checks, AuditPlan(level=LEVEL))[0])
    return out


def detection_run(
    rng: np.random.Generator,
    group: str,
    cap: int,
    window: int,
    levels: Sequence[float],
    check: bool,
) -> tuple[float, list[float]]:
    """Months to the first chart signal of ``group``, and to its first breach by the
    single-month test at each of ``levels`` (infinity: none within ``cap`` months)."""
    truth = promised()
    truth[group] = Truth(COMMON_TPR - 2 * TOLERANCE, truth[group].fpr)
    history: list[MonthCounts] = []
    chart = math.inf
    tests = [math.inf] * len(levels)
    for month in range(1, cap + 1):
        cells = draw_cells(rng, VOLUME, truth)
        history.append(MonthCounts(START.shifted(month - 1), True, cells))
        if chart == math.inf:
            if check and month <= 3:
                verify(history, {group}, window)
            if any(m.signal for m in group_monitors(history, {group}, window)):
                chart = month
        if math.inf in tests:
            checks = version_checks(1, DOC, cells, settings_for(cells), CONTEXT)
            p = smallest_p(decide(checks, AuditPlan(level=LEVEL))[0], group)
            tests = [
                month if t == math.inf and p <= a else t for t, a in zip(tests, levels, strict=True)
            ]
        if chart < math.inf and math.inf not in tests:
            break
    return chart, tests


def pair_false_alarms(
    rng: np.random.Generator, years: int, reference_cases: int, gap: float
) -> int:
    """Years in which MID's pair of charts against a reference of ``reference_cases`` cases a
    month crosses its limit in the first 12 months, as the twelfth audit shows the charts
    (a side's ``first_signal``); per-chart bound level / 16, as in the full version."""
    hits = 0
    cases = round(VOLUME * SHARES[MID])
    for _ in range(years):
        history: list[MonthCounts] = []
        for month in range(HORIZON):
            cells = draw_cells(
                rng,
                VOLUME,
                shifted_one(MID, gap),
                sizes={REFERENCE: reference_cases, MID: cases},
                only=(REFERENCE, MID),
            )
            history.append(MonthCounts(START.shifted(month), True, cells))
        ms = monitors(history, 0, LEVEL * 2 / 16)
        hits += any(s.first_signal is not None for m in ms for s in m.sides)
    return hits


def shifted_one(group: str, gap: float) -> dict[str, Truth]:
    truth = promised()
    truth[group] = Truth(truth[group].tpr + gap, truth[group].fpr)
    return truth


def cell(values: list[float], cap: int) -> str:
    censored = sum(v > cap for v in values)
    return f"{quantiles(values, cap)}; {censored}/{len(values)} censored"


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="base seed")
    parser.add_argument("--years", type=int, default=600, help="simulated years per scenario")
    parser.add_argument(
        "--verify-years", type=int, default=20, help="years per scenario with every audit in full"
    )
    parser.add_argument("--runs", type=int, default=200, help="detection runs per group")
    parser.add_argument("--cap", type=int, default=240, help="months before a run is censored")
    parser.add_argument(
        "--calibration-months", type=int, default=20000, help="months for the matched level"
    )
    parser.add_argument(
        "--pair-years", type=int, default=2000, help="years per row of the one-pair table"
    )
    parser.add_argument(
        "--window", type=int, default=WINDOW, help="months the charts look back (0: all)"
    )
    parser.add_argument("--quick", action="store_true", help="a few runs each (smoke run)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    years = 2 if args.quick else args.years
    verify_years = 1 if args.quick else args.verify_years
    runs = 2 if args.quick else args.runs
    cap = 12 if args.quick else args.cap
    calibration_months = 50 if args.quick else args.calibration_months
    pair_years = 5 if args.quick else args.pair_years
    groups = (SMALLEST, MID, LARGEST)
    print(machine_header("benchmarks/sim_monitoring.py", list(argv or sys.argv[1:]), args.seed))
    results: dict[str, Any] = {"seed": args.seed, "window": args.window}
    started = time.perf_counter()

    print(
        f"\n## False alarms: any chart signals within {HORIZON} monthly audits, in control "
        f"({years} years per row; {VOLUME:,} decisions/month; window {args.window} months)\n"
    )
    print("| true TPR gaps | years | charts | any signal within 12 months | design bound |")
    print("|---|---|---|---|---|")
    edge_name = "at the edge (+-0.05)"
    scenarios = {"0": promised(), edge_name: shifted(promised(), TOLERANCE, fpr_too=False)}
    alarms: dict[str, float] = {}
    results["false_alarms"] = []
    for index, (name, truth) in enumerate(scenarios.items()):
        t0 = time.perf_counter()
        rng = np.random.default_rng([args.seed, 1, index])
        hits, charts, by_chart, screening = false_alarm_years(
            rng, years, plain_month(truth), args.window, verify_years
        )
        alarms[name] = hits / years
        results["false_alarms"].append(
            {
                "gaps": name,
                "years": years,
                "charts": charts,
                "signals": hits,
                "by_chart": by_chart,
                "exact_audits": screening.exact_audits,
                "verified_years": screening.verified_years,
                "smallest_limit_ratio": screening.smallest_ratio,
                "seconds": time.perf_counter() - t0,
            }
        )
        print(f"| {name} | {years} | {charts} | {wilson(hits, years)} | {LEVEL} |", flush=True)
    for part in results["false_alarms"]:
        print(
            f"- gaps {part['gaps']}: charts signalling first (years) {part['by_chart']}; "
            f"{part['exact_audits']} earlier audits computed for their flagged groups; "
            f"{part['verified_years']} years verified with every audit in full (smallest "
            f"ratio of an earlier limit to the twelfth's {part['smallest_limit_ratio']:.3f})"
        )

    t0 = time.perf_counter()
    print(
        f"\n## One pair of charts at the edge: {MID} ({round(VOLUME * SHARES[MID])} cases a "
        f"month) against the reference ({pair_years} years per row; crossings within 12 months "
        "as the twelfth audit shows them)\n"
    )
    print("| reference cases / month | true TPR gap | P(signal within 12 months) | design bound |")
    print("|---|---|---|---|")
    results["pair"] = []
    demo_reference = round(VOLUME * SHARES[REFERENCE])
    for index, (reference_cases, gap) in enumerate(
        (r, g) for r in (demo_reference, 1000 * demo_reference) for g in (TOLERANCE, -TOLERANCE)
    ):
        rng = np.random.default_rng([args.seed, 4, index])
        hits = pair_false_alarms(rng, pair_years, reference_cases, gap)
        bound = 2 * LEVEL / 16
        results["pair"].append(
            {"reference_cases": reference_cases, "gap": gap, "years": pair_years, "signals": hits}
        )
        print(
            f"| {reference_cases:,} | {gap:+g} | {wilson(hits, pair_years)} | {bound:.5f} |",
            flush=True,
        )
    results["pair_seconds"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    rng = np.random.default_rng([args.seed, 2])
    edge = scenarios[edge_name]
    smallest = smallest_adjusted_p(rng, calibration_months, edge)
    yearly = alarms[edge_name]
    monthly_share = 1.0 - (1.0 - yearly) ** (1.0 / HORIZON)
    design_level = 1.0 - (1.0 - LEVEL) ** (1.0 / HORIZON)
    if monthly_share * calibration_months >= 5:
        level_matched = float(np.quantile(smallest, monthly_share, method="inverted_cdf"))
        matched_by = "measured"
    else:
        # Too few simulated months (or no chart false alarm at all) to read the quantile off:
        # match the designs instead; Holm keeps a month's false breaches below its level.
        level_matched, matched_by = design_level, "design"
    levels = {"matched": level_matched, "design": design_level, "plan": LEVEL}
    results["levels"] = []
    print(
        f"\n## Single-month test (version_checks + decide, Holm) at matched levels "
        f"({calibration_months} in-control months at the edge)\n"
    )
    print("| monthly level | chosen as | months with any breach | the same over 12 months |")
    print("|---|---|---|---|")
    reasons = {
        "matched": f"the charts' measured yearly rate at the edge, {yearly:.4f}"
        if matched_by == "measured"
        else "too few chart false alarms to match: the design level",
        "design": f"1 - (1 - {LEVEL})^(1/12): Holm's bound gives at most {LEVEL} a year",
        "plan": "the audit plan's level",
    }
    for name, level in levels.items():
        share = float(np.mean(smallest <= level))
        results["levels"].append(
            {
                "name": name,
                "level": level,
                "months": calibration_months,
                "monthly_false_alarm": share,
                "yearly_false_alarm": 1 - (1 - share) ** HORIZON,
            }
        )
        print(f"| {level:.4g} | {reasons[name]} | {share:.4%} | {1 - (1 - share) ** HORIZON:.4f} |")
    results["levels_seconds"] = time.perf_counter() - t0

    print(
        f"\n## Detection: one group's TPR {2 * TOLERANCE:g} below the reference's, sustained "
        f"({runs} runs per group; censored at {cap} months; months to the first signal, "
        "median (quartiles))\n"
    )
    print(
        "| group | share | TPR cases / month (mean) | charts | single-month test at "
        f"{level_matched:.3g} (matched) | at {design_level:.3g} (design) | at {LEVEL} (plan) |"
    )
    print("|---|---|---|---|---|---|---|")
    results["detection"] = []
    for index, group in enumerate(groups):
        t0 = time.perf_counter()
        rng = np.random.default_rng([args.seed, 3, index])
        found = [
            detection_run(rng, group, cap, args.window, list(levels.values()), check=(r == 0))
            for r in range(runs)
        ]
        chart = [f[0] for f in found]
        tests = {name: [f[1][i] for f in found] for i, name in enumerate(levels)}
        positives = VOLUME * SHARES[group] * COVERAGE * PREVALENCE[group]
        results["detection"].append(
            {
                "group": group,
                "runs": runs,
                "cap": cap,
                # Months to the first signal or breach; None: none within the cap (censored).
                "chart": [None if v > cap else v for v in chart],
                **{name: [None if v > cap else v for v in t] for name, t in tests.items()},
                "seconds": time.perf_counter() - t0,
            }
        )
        print(
            f"| {cell_text(group)} | {SHARES[group]:.1%} | {positives:.1f} | {cell(chart, cap)} | "
            + " | ".join(cell(t, cap) for t in tests.values())
            + " |",
            flush=True,
        )
    elapsed = time.perf_counter() - started
    results["seconds"] = elapsed
    print(f"\nrun time {elapsed:.1f} s")
    for part in results["false_alarms"]:
        print(f"- false alarms, gaps {part['gaps']}: {part['seconds']:.1f} s")
    print(f"- one pair of charts: {results['pair_seconds']:.1f} s")
    print(f"- single-month levels: {results['levels_seconds']:.1f} s")
    for part in results["detection"]:
        print(f"- detection, {part['group']}: {part['seconds']:.1f} s")
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Error rates and detection delay of the charts across months when the months carry score sums
(issue "evidence over time": the risk-adjusted outcome charts).

As ``sim_monitoring.py``, but every simulated month also carries each group's ``ScoreSums``
(``service/audit/realized.py``) from simulated scores and outcomes (``draw_scored_month`` in
``benchmarks/sim_scenario.py``: each case with an outcome draws a score like the demo's and its
outcome from it, and the sums are those the audit's query gives). ``version_monitors`` then adds
two risk-adjusted outcome charts per group (odds doubled or halved against the scores') to the
version's 16 gap charts: 34 charts, each with the limit for a false signal within 36 months from
zero at most 0.05 / 34 (``DESIGN_HORIZON``; 12 months before 2026-12-05).

- **False alarms**: the probability that any of the 34 charts signals within the first 12
  monthly audits, scores calibrated, TPR gaps 0 and at the edge (+-0.05); design bound 0.05.
  Computed as in ``sim_monitoring.py`` (``year_signal``: audit 12 in full, earlier audits for
  the groups whose statistics come near a limit, verified in full on the first years).
- **Detection (a)**: one group's TPR sustained 0.10 below the reference's, scores calibrated:
  months to the first signal of that group's gap charts with all 34 charts, and on the same
  months without score sums (16 charts, ``sim_monitoring.py``'s version).
- **Detection (b)**: one group's outcome odds sustained at 1.5 and 2 times its scores' (every
  other group calibrated, TPR gaps 0): months to the first signal of that group's outcome
  charts, against months to the first month in which the monthly calibration family
  (``calibration_rows``, Holm) shows the group ``departs``, at the plan's level 0.05 and at the
  level whose yearly bound is 0.05 (1 - 0.95^(1/12)).

Detection runs call ``version_monitors`` on a history restricted to the reference and the group
(``group_monitors``), with the level scaled so every chart keeps the full call's bound; the
first months of each configuration's first run are checked against the full call.

    .venv/bin/python benchmarks/sim_score_charts.py [--seed N] [--years 300] [--runs 100]
        [--cap 240] [--quick] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sim_calibration import calibration_family
from sim_monitoring import (
    START,
    VOLUME,
    false_alarm_years,
    group_monitors,
    verify,
)
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
    draw_scored_month,
    machine_header,
    promised,
    quantiles,
    shifted,
    wilson,
)

from service.audit.monitoring import HORIZON, WINDOW, MonthCounts
from service.audit.verdicts import CheckKind
from service.policy.document import AuditPlan

LEVEL = 0.05
DESIGN_LEVEL = 1.0 - (1.0 - LEVEL) ** (1.0 / HORIZON)
ODDS = (1.5, 2.0)
GAP_GROUPS = (SMALLEST, MID, LARGEST)
ODDS_GROUPS = (SMALLEST, MID, LARGEST, REFERENCE)


def scored_month(
    truth: Mapping[str, Truth], odds: Mapping[str, float] | None = None
) -> Callable[[np.random.Generator, int], MonthCounts]:
    """Months of ``truth`` with every group's score sums (outcome odds ``odds`` times the
    scores' for the groups named there, calibrated for the rest)."""

    def draw(rng: np.random.Generator, month: int) -> MonthCounts:
        cells, sums = draw_scored_month(rng, VOLUME, truth, odds)
        return MonthCounts(START.shifted(month), True, cells, sums)

    return draw


def first_signal(history: Sequence[MonthCounts], group: str, kind: CheckKind, scores: bool) -> bool:
    ms = group_monitors(history, {group}, WINDOW, scores)
    return any(m.signal for m in ms if m.kind is kind)


def gap_run(rng: np.random.Generator, group: str, cap: int, check: bool) -> tuple[float, float]:
    """Months to the first signal of ``group``'s gap charts with 34 charts and with 16 (the
    same months without score sums); infinity: none within ``cap`` months."""
    truth = promised()
    truth[group] = Truth(COMMON_TPR - 2 * TOLERANCE, truth[group].fpr)
    draw = scored_month(truth)
    history: list[MonthCounts] = []
    with_scores = without = math.inf
    for month in range(1, cap + 1):
        history.append(draw(rng, month - 1))
        if check and month <= 3:
            verify(history, {group}, WINDOW)
            verify(history, {group}, WINDOW, scores=False)
        if with_scores == math.inf and first_signal(history, group, CheckKind.PARITY, True):
            with_scores = month
        if without == math.inf:
            plain = [MonthCounts(m.month, m.mature, m.cells) for m in history]
            if first_signal(plain, group, CheckKind.PARITY, False):
                without = month
        if with_scores < math.inf and without < math.inf:
            break
    return with_scores, without


def odds_run(
    rng: np.random.Generator, group: str, odds: float, cap: int, check: bool
) -> tuple[float, float, float]:
    """Months to the first signal of ``group``'s outcome charts (34 charts), and to its first
    ``departs`` in the monthly calibration family at the plan's level and at DESIGN_LEVEL."""
    draw = scored_month(promised(), {group: odds})
    plans = (AuditPlan(level=LEVEL), AuditPlan(level=DESIGN_LEVEL))
    history: list[MonthCounts] = []
    chart = math.inf
    tests = [math.inf, math.inf]
    for month in range(1, cap + 1):
        history.append(draw(rng, month - 1))
        if check and month <= 3:
            verify(history, {group}, WINDOW)
        if chart == math.inf and first_signal(history, group, CheckKind.CALIBRATION, True):
            chart = month
        for i, plan in enumerate(plans):
            if tests[i] == math.inf:
                rows = calibration_family(history[-1].cells, history[-1].scores, plan)
                if group in rows and rows[group].status == "departs":
                    tests[i] = month
        if chart < math.inf and math.inf not in tests:
            break
    return chart, tests[0], tests[1]


def cell(values: list[float], cap: int) -> str:
    censored = sum(v > cap for v in values)
    return f"{quantiles(values, cap)}; {censored}/{len(values)} censored"


def months_list(values: list[float], cap: int) -> list[int | None]:
    return [None if v > cap else int(v) for v in values]


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="base seed")
    parser.add_argument("--years", type=int, default=300, help="simulated years per scenario")
    parser.add_argument(
        "--verify-years", type=int, default=10, help="years per scenario with every audit in full"
    )
    parser.add_argument("--runs", type=int, default=100, help="detection runs per row")
    parser.add_argument("--cap", type=int, default=240, help="months before a run is censored")
    parser.add_argument("--quick", action="store_true", help="a few runs each (smoke run)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    years = 1 if args.quick else args.years
    verify_years = 0 if args.quick else args.verify_years
    runs = 1 if args.quick else args.runs
    cap = 4 if args.quick else args.cap
    print(machine_header("benchmarks/sim_score_charts.py", list(argv or sys.argv[1:]), args.seed))
    results: dict[str, Any] = {"seed": args.seed, "window": WINDOW}
    started = time.perf_counter()

    print(
        f"\n## False alarms with score sums: any chart signals within {HORIZON} monthly audits, "
        f"scores calibrated ({years} years per row; {VOLUME:,} decisions/month)\n"
    )
    print(
        "| true TPR gaps | scores | years | charts | any signal within 12 months | "
        "first signals from gap charts | from outcome charts | design bound |"
    )
    print("|---|---|---|---|---|---|---|---|")
    scenarios = {"0": promised(), "at the edge (+-0.05)": shifted(promised(), TOLERANCE, False)}
    results["false_alarms"] = []
    for index, (name, truth) in enumerate(scenarios.items()):
        t0 = time.perf_counter()
        rng = np.random.default_rng([args.seed, 1, index])
        hits, charts, by_chart, screening = false_alarm_years(
            rng, years, scored_month(truth), WINDOW, verify_years
        )
        gap = sum(v for k, v in by_chart.items() if k.startswith("parity/"))
        outcome = sum(v for k, v in by_chart.items() if k.startswith("calibration/"))
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
        print(
            f"| {name} | calibrated | {years} | {charts} | {wilson(hits, years)} | {gap} | "
            f"{outcome} | {LEVEL} |",
            flush=True,
        )
    for part in results["false_alarms"]:
        print(
            f"- gaps {part['gaps']}: charts signalling first (years) {part['by_chart']}; "
            f"{part['exact_audits']} earlier audits computed for their flagged groups; "
            f"{part['verified_years']} years verified with every audit in full (smallest "
            f"ratio of an earlier limit to the twelfth's {part['smallest_limit_ratio']:.3f})"
        )

    print(
        f"\n## Detection (a): one group's TPR {2 * TOLERANCE:g} below the reference's, "
        f"sustained, scores calibrated ({runs} runs per group; censored at {cap} months; months "
        "to the first signal of the group's gap charts, median (quartiles))\n"
    )
    print(
        "| group | share | TPR cases / month (mean) | with score sums (34 charts) | "
        "without (16 charts) |"
    )
    print("|---|---|---|---|---|")
    results["gap_detection"] = []
    for index, group in enumerate(GAP_GROUPS):
        t0 = time.perf_counter()
        rng = np.random.default_rng([args.seed, 2, index])
        found = [gap_run(rng, group, cap, check=(r == 0)) for r in range(runs)]
        with_scores = [f[0] for f in found]
        without = [f[1] for f in found]
        positives = VOLUME * SHARES[group] * COVERAGE * PREVALENCE[group]
        results["gap_detection"].append(
            {
                "group": group,
                "runs": runs,
                "cap": cap,
                "with_scores": months_list(with_scores, cap),
                "without": months_list(without, cap),
                "seconds": time.perf_counter() - t0,
            }
        )
        print(
            f"| {cell_text(group)} | {SHARES[group]:.1%} | {positives:.1f} | "
            f"{cell(with_scores, cap)} | {cell(without, cap)} |",
            flush=True,
        )

    print(
        "\n## Detection (b): one group's outcome odds sustained at 1.5 and 2 times its scores' "
        f"({runs} runs per row; censored at {cap} months; months to the first signal, median "
        "(quartiles))\n"
    )
    print(
        "| group | share | outcomes / month (mean) | odds ratio | outcome charts (34 charts) | "
        f"monthly calibration family at {LEVEL} (plan) | at {DESIGN_LEVEL:.3g} (yearly "
        "bound 0.05) |"
    )
    print("|---|---|---|---|---|---|---|")
    results["odds_detection"] = []
    index = 0
    for group in ODDS_GROUPS:
        for odds in ODDS:
            t0 = time.perf_counter()
            rng = np.random.default_rng([args.seed, 3, index])
            found = [odds_run(rng, group, odds, cap, check=(r == 0)) for r in range(runs)]
            index += 1
            chart = [f[0] for f in found]
            plan = [f[1] for f in found]
            design = [f[2] for f in found]
            results["odds_detection"].append(
                {
                    "group": group,
                    "odds": odds,
                    "runs": runs,
                    "cap": cap,
                    "chart": months_list(chart, cap),
                    "plan": months_list(plan, cap),
                    "design": months_list(design, cap),
                    "seconds": time.perf_counter() - t0,
                }
            )
            outcomes = VOLUME * SHARES[group] * COVERAGE
            print(
                f"| {cell_text(group)} | {SHARES[group]:.1%} | {outcomes:.0f} | {odds:g} | "
                f"{cell(chart, cap)} | {cell(plan, cap)} | {cell(design, cap)} |",
                flush=True,
            )

    elapsed = time.perf_counter() - started
    results["seconds"] = elapsed
    print(f"\nrun time {elapsed:.1f} s")
    for part in results["false_alarms"]:
        print(f"- false alarms, gaps {part['gaps']}: {part['seconds']:.1f} s")
    for part in results["gap_detection"]:
        print(f"- detection (a), {part['group']}: {part['seconds']:.1f} s")
    for part in results["odds_detection"]:
        print(f"- detection (b), {part['group']} x{part['odds']:g}: {part['seconds']:.1f} s")
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""False alarms of the charts across months year by year, over several years of a version's use
(issue "evidence over time": the false-alarm rate per policy-year).

``sim_monitoring.py`` and ``sim_score_charts.py`` measure the first year of a version only, with
every chart starting from zero. Each audit month the charts are recomputed by
``version_monitors`` from the latest ``WINDOW`` (24) months, so from the second year on they no
longer start from zero. This script follows in-control versions (every non-reference group's
TPR at the edge of the tolerance, +0.05 and -0.05 in turn; exact promises; 2,000 decisions a
month; every month mature) for ``--years-of-use`` years of monthly audits and reports, per year
of use:

- the share of versions with any chart signal in that year (the per-year false-alarm rate; a
  chart is not restarted after a signal: each audit recomputes it from the window);
- the share whose first signal falls in that year, unconditionally and conditionally on no
  signal before;

for the 16 gap charts (months without score sums) and for the 34 charts of a version whose
months carry score sums (calibrated scores). Design bound: the audit plan's level, 0.05 a year.

How an audit is computed (to save time): the last audit of each year is computed in full. Each
month's increment of a chart depends on that month alone; the script computes every chart's
increments from the month's counts with the chart's own functions (``Design.rates`` +
``binomial_llr``, ``risk_adjusted_llr``) and checks them against every full call's paths
(it stops if any differs). An earlier audit of the year is computed, by a call restricted to
the reference and the flagged groups at the full call's per-chart bound (``group_monitors``),
only for the groups with a chart whose windowed statistic there reaches ``SCREEN`` times its
limit at the year's last audit. The first ``--verify-versions`` versions of each row compute
every audit in full and check the answer.

A second table gives the chain's view, without simulation: for each chart of a version, at the
expected monthly volumes, the Brook & Evans (1972) probability that a chart started from zero
signals within 12, 24 and 36 months, summed over the version's charts (Bonferroni).

    .venv/bin/python benchmarks/sim_chart_years.py [--seed N] [--versions 300]
        [--years-of-use 3] [--verify-versions 5] [--quick] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sim_monitoring import (
    CONTEXT,
    DOC,
    START,
    VOLUME,
    group_monitors,
    monitors,
    plain_month,
    settings_for,
    smallest_adjusted_p,
    smallest_p,
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
    draw_cells,
    machine_header,
    promised,
    quantiles,
    shifted,
    wilson,
)
from sim_score_charts import scored_month

from service.audit.charts import DESIGN_HORIZON, STATES, STEP_POINTS, limit_for
from service.audit.gap_charts import designs, in_control_step
from service.audit.monitoring import WINDOW, Monitor, MonthCounts
from service.audit.outcome_charts import ODDS
from service.audit.realized import fraction_of
from service.audit.verdicts import CheckKind, decide
from service.audit.version_checks import version_checks
from service.policy.document import AuditPlan
from service.stats.cusum import (
    binomial_llr,
    coarsened,
    cusum_path,
    risk_adjusted_llr,
    run_length_cdf,
)

LEVEL = 0.05
YEAR = 12
SCREEN = 0.25
"""An audit before the year's last is computed only for groups with a chart whose windowed
statistic there reaches this share of the chart's limit at the year's last audit."""

Key = tuple[str, str, str]  # (kind, group, side)


def chart_increments(history: Sequence[MonthCounts], m: Monitor) -> dict[str, dict[str, float]]:
    """Per side of ``m``'s chart: month -> that month's increment, for every month of
    ``history`` the chart charts (recomputed from the month's counts alone)."""
    out: dict[str, dict[str, float]] = {}
    if m.kind is CheckKind.CALIBRATION:
        for side, odds in ODDS:
            per: dict[str, float] = {}
            for month in history:
                ss = month.scores.get(m.group)
                if not month.mature or ss is None or ss.power.n == 0:
                    continue
                term = ss.log_double if odds == 2.0 else ss.log_half
                per[str(month.month)] = risk_adjusted_llr(ss.power.sum_y, term, odds)
            out[side] = per
        return out
    for design in designs(m.kind, TOLERANCE):
        per = {}
        for month in history:
            if m.group not in month.cells or m.against not in month.cells:
                continue
            g, r = month.cells[m.group].all_counts(), month.cells[m.against].all_counts()
            num, den = fraction_of(m.metric, DOC.favourable)
            kg, ng, kr, nr = g[num], g[den], r[num], r[den]
            if ng == 0 or nr == 0:
                continue
            rates = design.rates(kr / nr)
            per[str(month.month)] = 0.0 if rates is None else binomial_llr(kg, ng, *rates)
        out[design.side] = per
    return out


def windowed(per: dict[str, float], months: Sequence[str]) -> float | None:
    """The chart's statistic at an audit whose window holds ``months`` (None: nothing charted)."""
    values = [per[m] for m in months if m in per]
    return cusum_path(values)[-1] if values else None


def check_paths(
    ms: Sequence[Monitor], incs: dict[tuple[str, str], dict[str, dict[str, float]]]
) -> None:
    for m in ms:
        for s in m.sides:
            per = incs[(m.kind.value, m.group)][s.side]
            mine = cusum_path([per[x] for x in m.months])
            if len(mine) != len(s.path) or any(
                abs(a - b) > 1e-9 for a, b in zip(mine, s.path, strict=True)
            ):
                raise RuntimeError(f"increments of {m.group}/{s.side} differ from the audit's")


@dataclass
class Record:
    """Per version: the audits (1-based) with a signal, found year by year."""

    any_in_year: list[int] = field(default_factory=list)
    first_in_year: list[int] = field(default_factory=list)
    charts: int = 0
    exact_audits: int = 0
    verified: int = 0
    smallest_ratio: float = math.inf


def version_years(
    history: Sequence[MonthCounts], years: int, record: Record, verify_all: bool
) -> list[bool]:
    """For each year of use: does any chart of the version signal at one of its audits?"""
    months = [str(m.month) for m in history]
    out: list[bool] = []
    incs: dict[tuple[str, str], dict[str, dict[str, float]]] = {}
    for y in range(1, years + 1):
        end = YEAR * y
        last = monitors(history[:end], WINDOW)
        record.charts = max(record.charts, sum(len(m.sides) for m in last))
        for m in last:
            if (m.kind.value, m.group) not in incs:
                incs[(m.kind.value, m.group)] = chart_increments(history, m)
        check_paths(last, incs)
        limits = {(m.kind.value, m.group, s.side): s.limit for m in last for s in m.sides}
        signal = False
        for t in range(end - YEAR + 1, end):
            window = months[max(0, t - WINDOW) : t]
            flagged = {
                g
                for (kind, g, side), limit in limits.items()
                if (v := windowed(incs[(kind, g)][side], window)) is not None
                and v >= SCREEN * limit
            }
            if flagged:
                record.exact_audits += 1
                if any(m.signal for m in group_monitors(history[:t], flagged, WINDOW)):
                    signal = True
                    break
        signal = signal or any(m.signal for m in last)
        if verify_all:
            full = False
            for t in range(end - YEAR + 1, end + 1):
                ms = monitors(history[:t], WINDOW)
                check_paths(ms, incs)
                for m in ms:
                    for s in m.sides:
                        ratio = s.limit / limits[(m.kind.value, m.group, s.side)]
                        record.smallest_ratio = min(record.smallest_ratio, ratio)
                full = full or any(m.signal for m in ms)
            if full != signal or record.smallest_ratio < SCREEN:
                raise RuntimeError(
                    f"year {y}: screened {signal}, full {full} "
                    f"(smallest limit ratio {record.smallest_ratio})"
                )
        out.append(signal)
    if verify_all:
        record.verified += 1
    return out


def chain_view() -> tuple[list[tuple[int, float]], dict[str, float]]:
    """Sum over the 16 gap charts of a version at the expected monthly volumes of the chain's
    P(run length <= H), each chart with the limit ``version_monitors`` designs for it; and the
    "below" chart's limit per group."""
    truth = promised()
    charts = 16
    n_ref = round(VOLUME * SHARES[REFERENCE] * COVERAGE * PREVALENCE[REFERENCE])
    r = truth[REFERENCE].tpr
    totals = dict.fromkeys((12, 24, 36), 0.0)
    below: dict[str, float] = {}
    for g in SHARES:
        if g == REFERENCE:
            continue
        n = round(VOLUME * SHARES[g] * COVERAGE * PREVALENCE[g])
        for d in designs(CheckKind.PARITY, TOLERANCE):
            step = in_control_step(d, n, n_ref, r)
            h = limit_for(step, LEVEL / charts)
            if d.side == "below":
                below[g] = h
            cdf = run_length_cdf(h, [step], max(totals), STATES)
            for horizon in totals:
                totals[horizon] += float(cdf[horizon - 1])
    return list(totals.items()), below


DETECT_SCREEN = 0.6
"""In a detection run a month is computed in full only when a chart's windowed statistic
reaches this share of its limit at the latest month computed in full."""


@dataclass
class DetectionRecord:
    exact_months: int = 0
    months: int = 0
    verified_runs: int = 0
    smallest_ratio: float = math.inf


def detection_delay(
    rng: np.random.Generator, group: str, cap: int, record: DetectionRecord, verify_all: bool
) -> float:
    """Months to the first signal of ``group``'s gap charts (16-chart version, no score sums)
    when its TPR is sustained 0.10 below the reference's (infinity: none within ``cap``).

    A month is computed in full (``group_monitors``: the full call's inputs and per-chart bound)
    when no month has been yet or when a chart's windowed statistic, from the increments,
    reaches ``DETECT_SCREEN`` times its limit at the latest month computed in full;
    ``verify_all`` computes every month in full, checks the answer and records the smallest
    ratio of a month's limit to the latest one the screen would have used."""
    truth = promised()
    truth[group] = Truth(COMMON_TPR - 2 * TOLERANCE, truth[group].fpr)
    history: list[MonthCounts] = []
    chart: Monitor | None = None
    per: dict[str, dict[str, float]] = {}
    limits: dict[str, float] = {}
    screened_at: float = math.inf
    full_at: float = math.inf
    for month in range(1, cap + 1):
        history.append(MonthCounts(START.shifted(month - 1), True, draw_cells(rng, VOLUME, truth)))
        record.months += 1
        window = [str(m.month) for m in history[-WINDOW:]]
        if chart is not None:
            for side, values in chart_increments(history[-1:], chart).items():
                per[side].update(values)
        flagged = chart is None or any(
            (v := windowed(per[side], window)) is not None and v >= DETECT_SCREEN * limit
            for side, limit in limits.items()
        )
        exact: list[Monitor] | None = None
        if flagged or verify_all:
            exact = [m for m in group_monitors(history, {group}, WINDOW) if m.group == group]
        if exact and verify_all and limits:
            for s in exact[0].sides:
                record.smallest_ratio = min(record.smallest_ratio, s.limit / limits[s.side])
        if flagged and exact:
            record.exact_months += 1
            if chart is None:
                chart = exact[0]
                per = chart_increments(history, chart)
            check_paths(exact, {(chart.kind.value, chart.group): per})
            limits = {s.side: s.limit for s in exact[0].sides}
            if screened_at == math.inf and any(m.signal for m in exact):
                screened_at = month
        if verify_all and exact and full_at == math.inf and any(m.signal for m in exact):
            full_at = month
        if screened_at < math.inf and (not verify_all or full_at < math.inf):
            break
    if verify_all:
        record.verified_runs += 1
        if screened_at != full_at or record.smallest_ratio < DETECT_SCREEN:
            raise RuntimeError(
                f"detection screen differs: {screened_at} against {full_at} "
                f"(smallest limit ratio {record.smallest_ratio})"
            )
    return screened_at


def rows(
    rng: np.random.Generator,
    versions: int,
    years: int,
    draw: Callable[[np.random.Generator, int], MonthCounts],
    verify_versions: int,
) -> tuple[list[list[bool]], Record]:
    record = Record()
    found = []
    for v in range(versions):
        history = [draw(rng, month) for month in range(YEAR * years)]
        found.append(version_years(history, years, record, v < verify_versions))
    return found, record


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="base seed")
    parser.add_argument("--versions", type=int, default=300, help="versions followed per row")
    parser.add_argument("--years-of-use", type=int, default=3, help="years each is followed")
    parser.add_argument(
        "--verify-versions", type=int, default=5, help="versions per row with every audit in full"
    )
    parser.add_argument("--runs", type=int, default=100, help="detection runs per group")
    parser.add_argument("--cap", type=int, default=240, help="months before a run is censored")
    parser.add_argument(
        "--parts",
        default="alarms,chain,model,single,detection",
        help="comma-separated parts to run",
    )
    parser.add_argument(
        "--null-months", type=int, default=10_000, help="in-control months (single part)"
    )
    parser.add_argument(
        "--gap-months", type=int, default=2_000, help="months per gap group (single part)"
    )
    parser.add_argument("--quick", action="store_true", help="a few versions (smoke run)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    versions = 2 if args.quick else args.versions
    verify_versions = 1 if args.quick else args.verify_versions
    runs = 2 if args.quick else args.runs
    cap = 12 if args.quick else args.cap
    parts = set(args.parts.split(","))
    years = args.years_of_use
    print(machine_header("benchmarks/sim_chart_years.py", list(argv or sys.argv[1:]), args.seed))
    results: dict[str, Any] = {
        "seed": args.seed,
        "window": WINDOW,
        "design_horizon": DESIGN_HORIZON,
        "rows": [],
    }
    started = time.perf_counter()
    edge = shifted(promised(), TOLERANCE, fpr_too=False)
    alarm_rows = (
        (("16 (no score sums)", plain_month(edge)), ("34 (score sums)", scored_month(edge)))
        if "alarms" in parts
        else ()
    )
    print(
        f"\n## False alarms per year of use, TPR gaps at the edge (+-0.05) ({versions} versions "
        f"per row, {years} years each; window {WINDOW} months; limits designed over "
        f"{DESIGN_HORIZON} months)\n"
    )
    print(
        "| charts | year of use | any signal in the year | first signal in the year | "
        "first signal, given none before | design bound |"
    )
    print("|---|---|---|---|---|---|")
    for index, (name, draw) in enumerate(alarm_rows):
        t0 = time.perf_counter()
        rng = np.random.default_rng([args.seed, 1, index])
        found, record = rows(rng, versions, years, draw, verify_versions)
        per_year = []
        before = 0
        for y in range(years):
            any_hits = sum(f[y] for f in found)
            first_hits = sum(f[y] and not any(f[:y]) for f in found)
            at_risk = versions - before
            per_year.append(
                {"year": y + 1, "any": any_hits, "first": first_hits, "at_risk": at_risk}
            )
            given = wilson(first_hits, at_risk) if at_risk else "-"
            print(
                f"| {name} | {y + 1} | {wilson(any_hits, versions)} | "
                f"{wilson(first_hits, versions)} | {given} | {LEVEL} |",
                flush=True,
            )
            before += first_hits
        results["rows"].append(
            {
                "charts": record.charts,
                "versions": versions,
                "years": per_year,
                "exact_audits": record.exact_audits,
                "verified_versions": record.verified,
                "smallest_limit_ratio": record.smallest_ratio,
                "seconds": time.perf_counter() - t0,
            }
        )
    for part in results["rows"]:
        print(
            f"- {part['charts']} charts: {part['exact_audits']} earlier audits computed for "
            f"flagged groups; {part['verified_versions']} versions verified with every audit in "
            f"full (smallest ratio of a limit to the year's last {part['smallest_limit_ratio']:.3f}"
            f"); {part['seconds']:.1f} s"
        )
    results["chain"] = []
    if "chain" in parts:
        chain_table(results)
    results["windowed_model"] = []
    if "model" in parts:
        model_versions = 500 if args.quick else 20_000
        rates = windowed_model(np.random.default_rng([args.seed, 5]), model_versions, years)
        results["windowed_model"] = rates
        print(
            f"\n## Model check: 16 independent gap charts with i.i.d. design increments "
            f"({model_versions:,} versions)\n"
        )
        print("| year of use | any signal in the year |")
        print("|---|---|")
        for y, rate in enumerate(rates, start=1):
            print(f"| {y} | {rate:.4f} |")
    if "single" in parts:
        single_month_table(
            results,
            args.seed,
            200 if args.quick else args.null_months,
            50 if args.quick else args.gap_months,
        )
    results["detection"] = []
    if "detection" in parts:
        detection_table(results, args.seed, runs, cap)
    results["seconds"] = time.perf_counter() - started
    print(f"\nrun time {results['seconds']:.1f} s")
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


def chain_table(results: dict[str, Any]) -> None:
    print(
        "\n## The chain's view: 16 gap charts at the expected volumes, sum over charts of "
        "P(a chart from zero signals within H months)\n"
    )
    print("| H (months) | sum over the 16 charts |")
    print("|---|---|")
    totals, below = chain_view()
    for horizon, total in totals:
        results["chain"].append({"months": horizon, "sum": total})
        print(f"| {horizon} | {total:.4f} |")
    results["below_limits"] = below
    print(
        "\nLimits of the below charts at the expected volumes: "
        + ", ".join(f"{g} {h:.2f}" for g, h in below.items())
    )


def windowed_model(rng: np.random.Generator, versions: int, years: int) -> list[float]:
    """Per year of use: the share of versions in which any of the 16 gap charts signals, when
    each chart's months are i.i.d. draws of the in-control increment its limit was designed
    on (at the expected volumes) and the charts are independent; each audit recomputes the
    chart over the latest WINDOW months. A model check of the design, cheap enough for many
    versions; the full simulation above draws the counts instead."""
    truth = promised()
    n_ref = round(VOLUME * SHARES[REFERENCE] * COVERAGE * PREVALENCE[REFERENCE])
    r = truth[REFERENCE].tpr
    months = YEAR * years
    any_signal = np.zeros((versions, years), dtype=bool)
    for g in SHARES:
        if g == REFERENCE:
            continue
        n = round(VOLUME * SHARES[g] * COVERAGE * PREVALENCE[g])
        for d in designs(CheckKind.PARITY, TOLERANCE):
            step = coarsened(in_control_step(d, n, n_ref, r), STEP_POINTS)
            h = limit_for(step, LEVEL / 16)
            w = rng.choice(step.values, p=step.probabilities, size=(versions, months))
            for t in range(1, months + 1):
                x = np.cumsum(w[:, max(0, t - WINDOW) : t], axis=1)
                shown = x[:, -1] - np.minimum(x.min(axis=1), 0.0)
                any_signal[:, (t - 1) // YEAR] |= shown >= h
    return [float(v) for v in any_signal.mean(axis=0)]


def single_month_table(
    results: dict[str, Any], seed: int, in_control_months: int, gap_months: int
) -> None:
    """The single-month test (``version_checks`` + ``decide``, Holm) at the monthly level
    whose yearly false-alarm rate at the edge is each of a few rates, and its median months to
    the first breach of a group with the TPR gap of the detection table. Months are
    independent, so the months to the first breach are geometric with the monthly breach
    chance ``q`` of the gap scenario: median ``ceil(ln 0.5 / ln(1 - q))``."""
    edge = shifted(promised(), TOLERANCE, fpr_too=False)
    null = smallest_adjusted_p(np.random.default_rng([seed, 6]), in_control_months, edge)
    gap_p: dict[str, np.ndarray] = {}
    for index, group in enumerate((MID, LARGEST)):
        truth = promised()
        truth[group] = Truth(COMMON_TPR - 2 * TOLERANCE, truth[group].fpr)
        rng = np.random.default_rng([seed, 7, index])
        values = np.empty(gap_months)
        for i in range(gap_months):
            cells = draw_cells(rng, VOLUME, truth)
            checks = version_checks(1, DOC, cells, settings_for(cells), CONTEXT)
            values[i] = smallest_p(decide(checks, AuditPlan(level=LEVEL))[0], group)
        gap_p[group] = values
    print(
        f"\n## Single-month test at matched yearly rates ({in_control_months:,} in-control "
        f"months at the edge; {gap_months:,} months per group with the gap)\n"
    )
    print(
        "| yearly false-alarm rate | monthly level | group | monthly breach chance "
        "| median months |"
    )
    print("|---|---|---|---|---|")
    results["single_month"] = []
    for yearly in (0.0184, 0.025, 0.05):
        share = 1.0 - (1.0 - yearly) ** (1.0 / YEAR)
        level = float(np.quantile(null, share, method="inverted_cdf"))
        for group, values in gap_p.items():
            q = float(np.mean(values <= level))
            median = math.ceil(math.log(0.5) / math.log1p(-q)) if q > 0 else math.inf
            results["single_month"].append(
                {"yearly": yearly, "level": level, "group": group, "q": q, "median": median}
            )
            print(f"| {yearly} | {level:.4g} | {cell_text(group)} | {q:.4f} | {median} |")


def detection_table(results: dict[str, Any], seed: int, runs: int, cap: int) -> None:
    print(
        f"\n## Detection: one group's TPR {2 * TOLERANCE:g} below the reference's, sustained "
        f"(16 charts; {runs} runs per group; censored at {cap} months; months to the first "
        "signal of the group's charts, median (quartiles))\n"
    )
    print("| group | share | TPR cases / month (mean) | charts |")
    print("|---|---|---|---|")
    for index, group in enumerate((SMALLEST, MID, LARGEST)):
        t0 = time.perf_counter()
        rng = np.random.default_rng([seed, 3, index])
        record = DetectionRecord()
        found = [detection_delay(rng, group, cap, record, r == 0) for r in range(runs)]
        positives = VOLUME * SHARES[group] * COVERAGE * PREVALENCE[group]
        censored = sum(v > cap for v in found)
        results["detection"].append(
            {
                "group": group,
                "runs": runs,
                "cap": cap,
                "chart": [None if v > cap else int(v) for v in found],
                "exact_months": record.exact_months,
                "months": record.months,
                "smallest_limit_ratio": record.smallest_ratio,
                "seconds": time.perf_counter() - t0,
            }
        )
        print(
            f"| {cell_text(group)} | {SHARES[group]:.1%} | {positives:.1f} | "
            f"{quantiles(found, cap)}; {censored}/{runs} censored |",
            flush=True,
        )
    for part in results["detection"]:
        print(
            f"- {part['group']}: {part['exact_months']} of {part['months']} months computed in "
            f"full; smallest limit ratio in the verified run {part['smallest_limit_ratio']:.3f}; "
            f"{part['seconds']:.1f} s"
        )


if __name__ == "__main__":
    sys.exit(main())

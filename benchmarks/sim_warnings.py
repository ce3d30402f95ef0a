"""Error rates and power of the daily warnings before outcomes arrive, measured by simulation
(issue "evidence over time", warnings before outcomes).

Calls ``day_warnings`` (``service/audit/early_warning.py``) on simulated days of the demo's nine
groups (``benchmarks/sim_scenario.py``, score model there). The policy acts on a case when its
score is at or above its group's cut, the cut that gives the group the scenario's action rate
in the population. Each simulated policy has its own calibration sample of 20,000 rows drawn
from the same population: the document carries its counts as two-sample promises
(``out_of_sample``), its score deciles as ``targets.score_edges`` and each group's rows per bin
as ``score_counts``, as a derived document does. A day's cases are drawn from the same
population (so its score distribution and action rates equal the calibration baseline's), their
scores binned at the edges as the day's query bins them; the cut is applied to the day's scores.

- **False warnings**: days and years (365 days of one policy) of a policy in control, at about
  65, 500 and 5,000 decisions a day: the probability of any warning in a day and in a year
  (design bound: the plan's level 0.05 a year, by Bonferroni over the days at level/365), with
  how often the population stability index (a description beside the test, no gate) passes 0.1
  and 0.25 in a tested group, how often each action-rate test's own p-value is at or below the
  daily level (its share of the family, before Holm), and the time a day takes.
- **Power**: one group (millbrook|es) whose every score is multiplied by 1.3 (clipped at 1) on a
  day, everything else in control, the day scaled so that the group has the given number of
  cases: the probability that the day warns on that group (score drift, action rate, either),
  with the same day unshifted for contrast, and the time a day takes.

Every day's drift tests draw from ``[seed, part, row, policy, day]`` (``day_warnings``'s seed).

    .venv/bin/python benchmarks/sim_warnings.py [--seed N] [--years 300] [--power-days 1000]
        [--part all|null|power] [--volumes 65 500 5000] [--quick] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

sys.path.insert(0, str(Path(__file__).resolve().parent))

from scipy.special import expit
from scipy.stats import norm
from sim_scenario import (
    CALIBRATION_ROWS,
    DEFAULT_SEED,
    GROUPS,
    MID,
    PREVALENCE,
    SCORE_DIGITS,
    SCORE_LOCATION,
    SCORE_SD,
    SHARES,
    document,
    draw_outcomes,
    draw_scores,
    machine_header,
    promised,
    wilson,
)

from service.audit.early_warning import DAYS_PER_YEAR, DayCounts, DayWarnings, day_warnings
from service.audit.realized import CellCounts
from service.audit.verdicts import DEFAULT_MIN_COUNT
from service.audit.version_settings import resolve_settings
from service.policy.derive_document import score_edges
from service.policy.document import PolicyDocument
from service.stats.drift import PSI_MAJOR, PSI_MODERATE

LEVEL = 0.05
DAILY_VOLUMES = (65, 500, 5000)
"""Decisions a day: about the demo's 2,000 a month, and two larger services."""
POWER_CASES = (20, 50, 100, 200, 500, 1000, 2000)
"""Cases of the shifted group in the day."""
SHIFT = 1.3
POLICY_DAYS = 50
"""Days of the power simulation that share one simulated policy (calibration sample)."""
IntArray = npt.NDArray[np.int64]

CUT: dict[str, float] = {
    g: round(
        float(expit(SCORE_LOCATION[g] + SCORE_SD[g] * norm.isf(t.action_rate(PREVALENCE[g])))),
        SCORE_DIGITS,
    )
    for g, t in promised().items()
}
"""Each group's cut: the score above which the scenario's share of the group's population
lies (its action rate: prevalence x TPR + (1 - prevalence) x FPR)."""


@dataclass(frozen=True)
class Policy:
    """A simulated version: its document and its score bins' inner edges."""

    document: PolicyDocument
    edges: npt.NDArray[np.float64]


def draw_policy(rng: np.random.Generator) -> Policy:
    """A document whose promises and score baseline come from a calibration sample of 20,000
    rows of the population (every outcome known)."""
    counts = rng.multinomial(CALIBRATION_ROWS, [SHARES[g] for g in GROUPS])
    scores = {g: draw_scores(rng, g, int(n)) for g, n in zip(GROUPS, counts, strict=True)}
    edges = np.asarray(score_edges(np.concatenate(list(scores.values()))), dtype=np.float64)
    calibration: dict[str, dict[str, int]] = {}
    score_counts: dict[str, list[int]] = {}
    for g, s in scores.items():
        y = draw_outcomes(rng, s)
        acted = s >= CUT[g]
        calibration[g] = {
            "n": int(s.size),
            "positives": int(y.sum()),
            "tp": int(np.sum(acted & (y == 1))),
            "fp": int(np.sum(acted & (y == 0))),
        }
        score_counts[g] = [int(v) for v in binned(s, edges)]
    raw = document(calibration).model_dump(mode="json")
    raw["targets"]["score_edges"] = [float(e) for e in edges]
    for g in GROUPS:
        raw["targets"]["groups"][g]["score_counts"] = score_counts[g]
    return Policy(PolicyDocument.model_validate(raw), edges)


def binned(scores: npt.NDArray[np.float64], edges: npt.NDArray[np.float64]) -> IntArray:
    """Cases per bin as the day's query bins them: bin i holds edge_{i-1} <= s < edge_i."""
    bins = np.searchsorted(edges, scores, side="right")
    out: IntArray = np.bincount(bins, minlength=edges.size + 1).astype(np.int64)
    return out


def day_counts(
    policy: Policy,
    rng: np.random.Generator,
    volume: int,
    sizes: Mapping[str, int] | None = None,
    factor: Mapping[str, float] | None = None,
) -> DayCounts:
    """One day: cases per group ``Multinomial(volume, shares)`` (``sizes`` fixes some), scores
    from the population (times ``factor`` for the groups named there), actions by the cuts."""
    counts = rng.multinomial(volume, [SHARES[g] for g in GROUPS])
    cells: dict[str, CellCounts] = {}
    bins: dict[str, list[int]] = {}
    for g, n_drawn in zip(GROUPS, counts, strict=True):
        n = int(sizes[g]) if sizes is not None and g in sizes else int(n_drawn)
        if n == 0:
            continue
        s = draw_scores(rng, g, n, 1.0 if factor is None else factor.get(g, 1.0))
        cells[g] = CellCounts(n=n, actions=int(np.sum(s >= CUT[g])))
        bins[g] = [int(v) for v in binned(s, policy.edges)]
    settings = resolve_settings(policy.document, cells, None, None)
    return DayCounts(1, policy.document, settings, cells, bins)


@dataclass
class DayTally:
    """Counts over simulated days (and years) of one volume."""

    days: int = 0
    tests: int = 0
    any_warning: int = 0
    drift_warning: int = 0
    action_warning: int = 0
    tested_groups: int = 0
    psi_moderate: int = 0
    psi_major: int = 0
    years: int = 0
    years_warned: int = 0
    draws: int = 0
    seconds: float = 0.0
    warned_groups: dict[str, int] = field(default_factory=dict)
    action_tests: dict[str, int] = field(default_factory=dict)
    action_raw_hits: dict[str, int] = field(default_factory=dict)

    def add(self, w: DayWarnings, seconds: float) -> bool:
        self.days += 1
        self.tests += w.tests
        self.seconds += seconds
        drift = [r for r in w.drift if r.status == "drift"]
        actions = [a for a in w.actions if a.warning]
        self.drift_warning += bool(drift)
        self.action_warning += bool(actions)
        self.any_warning += w.warnings > 0
        for r in w.drift:
            if r.psi is not None:
                self.tested_groups += 1
                self.psi_moderate += r.psi >= PSI_MODERATE
                self.psi_major += r.psi >= PSI_MAJOR
                self.draws += r.draws or 0
        for a in w.actions:
            if a.check.evidence is not None:
                key = f"{a.check.kind.value}/{a.check.group}"
                self.action_tests[key] = self.action_tests.get(key, 0) + 1
                hit = a.check.evidence.p_outside <= w.level
                self.action_raw_hits[key] = self.action_raw_hits.get(key, 0) + hit
        for name in [f"drift/{r.group}" for r in drift] + [
            f"action/{a.check.group}" for a in actions
        ]:
            self.warned_groups[name] = self.warned_groups.get(name, 0) + 1
        return w.warnings > 0


def null_years(
    rng: np.random.Generator, years: int, volume: int, seed: Sequence[int], every: int = 0
) -> DayTally:
    """``years`` policies in control, 365 days each; every ``every`` years (0: never) prints
    the tally so far (a long run can be cut short and still report what it measured)."""
    t = DayTally()
    for year in range(years):
        policy = draw_policy(rng)
        warned = False
        for day in range(DAYS_PER_YEAR):
            counts = day_counts(policy, rng, volume)
            t0 = time.perf_counter()
            w = day_warnings([counts], DEFAULT_MIN_COUNT, seed=[*seed, year, day])
            warned |= t.add(w, time.perf_counter() - t0)
        t.years += 1
        t.years_warned += warned
        if every and t.years % every == 0:
            print(
                f"  so far ({volume:,} a day): {t.years} policy-years, {t.years_warned} with a "
                f"warning ({wilson(t.years_warned, t.years)}); {t.days:,} days, "
                f"{t.any_warning} with a warning; draws per drift test "
                f"{t.draws / max(1, t.tested_groups):.0f}; {1000 * t.seconds / t.days:.1f} ms a "
                f"day; warnings {t.warned_groups}; action-rate tests at or below the daily "
                f"level {sum(t.action_raw_hits.values())} of {sum(t.action_tests.values())}",
                flush=True,
            )
    return t


def power_row(
    rng: np.random.Generator, days: int, cases: int, factor: float, seed: Sequence[int]
) -> dict[str, Any]:
    """``days`` days in which MID has ``cases`` cases with scores times ``factor``; the rest of
    the day is the demo's structure scaled to match. Counts the warnings on MID."""
    volume = max(1, round(cases / SHARES[MID]))
    out = {"drift": 0, "action": 0, "either": 0, "psi_moderate": 0, "psi_major": 0, "mc": 0}
    policy = draw_policy(rng)
    day_seconds = 0.0
    for day in range(days):
        if day and day % POLICY_DAYS == 0:
            policy = draw_policy(rng)
        counts = day_counts(policy, rng, volume, sizes={MID: cases}, factor={MID: factor})
        t0 = time.perf_counter()
        w = day_warnings([counts], DEFAULT_MIN_COUNT, seed=[*seed, day])
        day_seconds += time.perf_counter() - t0
        (row,) = [r for r in w.drift if r.group == MID]
        drift = row.status == "drift"
        action = any(a.warning for a in w.actions if a.check.group == MID)
        out["drift"] += drift
        out["action"] += action
        out["either"] += drift or action
        if row.psi is not None and row.p_value is not None:
            out["psi_moderate"] += row.psi >= PSI_MODERATE
            out["psi_major"] += row.psi >= PSI_MAJOR
            out["mc"] += row.p_value <= LEVEL
    return {
        "cases": cases,
        "volume": volume,
        "factor": factor,
        "days": days,
        "seconds_per_day": day_seconds / max(1, days),
        **out,
    }


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="base seed")
    parser.add_argument("--years", type=int, default=300, help="policy-years per daily volume")
    parser.add_argument("--power-days", type=int, default=1000, help="days per power row")
    parser.add_argument(
        "--part",
        choices=("all", "null", "power"),
        default="all",
        help="run only the false warnings or only the power tables (e.g. in two processes)",
    )
    parser.add_argument(
        "--volumes",
        type=int,
        nargs="+",
        choices=DAILY_VOLUMES,
        default=list(DAILY_VOLUMES),
        help="daily volumes of the false-warning table (each row keeps its own seed)",
    )
    parser.add_argument(
        "--report-every", type=int, default=0, help="print the tally every N policy-years"
    )
    parser.add_argument("--quick", action="store_true", help="a few days each (smoke run)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    years = 1 if args.quick else args.years
    power_days = 10 if args.quick else args.power_days
    print(machine_header("benchmarks/sim_warnings.py", list(argv or sys.argv[1:]), args.seed))
    started = time.perf_counter()
    results: dict[str, Any] = {"seed": args.seed, "null": [], "power": []}
    print(f"\ncuts: { {g: CUT[g] for g in GROUPS} }")

    null_volumes = args.volumes if args.part in ("all", "null") else []
    power_cases = POWER_CASES if args.part in ("all", "power") else ()
    print(
        f"\n## False warnings: a policy in control ({years} policy-years of {DAYS_PER_YEAR} days "
        f"per row; level {LEVEL}/{DAYS_PER_YEAR} a day)\n"
    )
    print(
        "| decisions / day | days | tests / day | any warning in a day | drift warning | "
        "action-rate warning | any warning in a year | design bound (year) | tested group-days "
        "with PSI >= 0.1 | with PSI >= 0.25 | draws per drift test | ms per day |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|---|---|")
    for volume in null_volumes:
        index = DAILY_VOLUMES.index(volume)
        t0 = time.perf_counter()
        t = null_years(
            np.random.default_rng([args.seed, 1, index]),
            years,
            volume,
            [args.seed, 1, index],
            args.report_every,
        )
        row = {"volume": volume, **t.__dict__, "seconds": time.perf_counter() - t0}
        results["null"].append(row)
        tested = max(1, t.tested_groups)
        print(
            f"| {volume:,} | {t.days:,} | {t.tests / t.days:.1f} | {wilson(t.any_warning, t.days)} "
            f"| {t.drift_warning / t.days:.5f} | {t.action_warning / t.days:.5f} | "
            f"{wilson(t.years_warned, t.years)} | {LEVEL} | {t.psi_moderate / tested:.4f} | "
            f"{t.psi_major / tested:.4f} | {t.draws / tested:.0f} | "
            f"{1000 * t.seconds / t.days:.1f} |",
            flush=True,
        )

    print(
        f"\n## Power: {MID}'s scores multiplied by {SHIFT:g} (clipped at 1) on one day "
        f"({power_days} days per row; the rest in control; {POLICY_DAYS} days per simulated "
        "policy)\n"
    )
    print(
        "| group cases | day volume | scores x | PSI >= 0.1 | PSI >= 0.25 | Monte Carlo test "
        "p <= 0.05 (unadjusted) | drift warning | action-rate warning | either | s per day |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|")
    index = 0
    for cases in power_cases:
        for factor in (1.0, SHIFT):
            t0 = time.perf_counter()
            row = power_row(
                np.random.default_rng([args.seed, 2, index]),
                power_days,
                cases,
                factor,
                [args.seed, 2, index],
            )
            index += 1
            row["seconds"] = time.perf_counter() - t0
            results["power"].append(row)
            n = row["days"]
            print(
                f"| {cases:,} | {row['volume']:,} | {factor:g} | {row['psi_moderate'] / n:.3f} | "
                f"{row['psi_major'] / n:.3f} | {row['mc'] / n:.3f} | "
                f"{wilson(row['drift'], n)} | {wilson(row['action'], n)} | "
                f"{wilson(row['either'], n)} | {row['seconds_per_day']:.2f} |",
                flush=True,
            )
    elapsed = time.perf_counter() - started
    results["seconds"] = elapsed
    print(f"\nrun time {elapsed:.1f} s")
    for row in results["null"]:
        print(
            f"- false warnings, {row['volume']:,} a day: {row['seconds']:.1f} s; warnings by "
            f"kind and group (days): {row['warned_groups']}"
        )
        shares = {
            k: f"{row['action_raw_hits'][k]}/{n} ({row['action_raw_hits'][k] / n:.2e})"
            for k, n in sorted(row["action_tests"].items())
        }
        print(
            f"  action-rate tests with their own p-value <= {LEVEL}/{DAYS_PER_YEAR} "
            f"({LEVEL / DAYS_PER_YEAR:.2e}): {shares}"
        )
    print(f"- power: {sum(r['seconds'] for r in results['power']):.1f} s")
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())

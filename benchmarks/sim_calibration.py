"""Error rates of the monthly calibration family, measured by simulation (issue "evidence over
time", calibration within groups).

Calls ``calibration_rows`` (``service/audit/evidence_rows.py``) on simulated months of the
demo's nine groups (``benchmarks/sim_scenario.py``, score model there): each case with an
outcome has a score drawn like the demo's and an outcome drawn from it, and the month's
``ScoreSums`` are summed as the audit's query sums them. For every group with at least 20
outcomes the family holds Spiegelhalter's test and the observed-minus-expected test, adjusted
together (Holm, or Benjamini-Yekutieli) at the plan's level 0.05; a group ``departs`` when a
test rejects after adjustment.

- **Size**: months with calibrated scores (every outcome Bernoulli(score)): the probability that
  any group departs, at 2,000 and 20,000 decisions a month; design bound: the level.
- **Power**: one group (millbrook|es) whose outcome odds are 1.5 times its scores' (every
  outcome Bernoulli(1.5 s / (1 - s + 1.5 s))), everything else calibrated, the month scaled so
  that the group has the given number of cases: the probability that it departs (Holm and
  Benjamini-Yekutieli), which test rejects, and a single unadjusted test for contrast.

    .venv/bin/python benchmarks/sim_calibration.py [--seed N] [--months 5000]
        [--months-large 2000] [--power-months 1000] [--quick] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sim_scenario import (
    COVERAGE,
    DEFAULT_SEED,
    MID,
    SHARES,
    document,
    draw_scored_month,
    machine_header,
    promised,
    wilson,
)

from service.audit.evidence_rows import calibration_rows
from service.audit.published_counts import CountVisibility
from service.audit.realized import CellCounts, ScoreSums
from service.audit.snapshot_model import CalibrationRow
from service.audit.verdicts import DEFAULT_MIN_COUNT
from service.audit.version_counts import VersionCounts
from service.policy.document import AuditPlan

LEVEL = 0.05
VOLUMES = (2000, 20000)
POWER_CASES = (50, 100, 192, 384, 1000, 2000, 5000)
"""Cases of the drifting group per month (88% of them with an outcome); 192 and 384 are its
share of 2,000 and 4,000 decisions."""
ODDS = 1.5
HOLM = AuditPlan(level=LEVEL, multiplicity="holm")
BY = AuditPlan(level=LEVEL, multiplicity="benjamini-yekutieli")
DOC = document()


def calibration_family(
    cells: Mapping[str, CellCounts], sums: Mapping[str, ScoreSums], plan: AuditPlan
) -> dict[str, CalibrationRow]:
    """The month's calibration rows by group, as the audit computes them (internal view: the
    statuses do not depend on suppression)."""
    vis = CountVisibility(cells, {}, False, {g: ss.bin_counts for g, ss in sums.items()})
    version = VersionCounts(1, DOC, cells, scores=sums)
    rows, _ = calibration_rows(version, vis, plan, True, DEFAULT_MIN_COUNT)
    return {r.group: r for r in rows}


def departs(rows: Mapping[str, CalibrationRow]) -> set[str]:
    return {g for g, r in rows.items() if r.status == "departs"}


def size_row(rng: np.random.Generator, months: int, volume: int) -> dict[str, Any]:
    """``months`` calibrated months: how often any group departs, by each method."""
    holm = by = tested = 0
    by_group: dict[str, int] = {}
    for _ in range(months):
        cells, sums = draw_scored_month(rng, volume, promised())
        rows = calibration_family(cells, sums, HOLM)
        tested += sum(r.spiegelhalter is not None for r in rows.values())
        out = departs(rows)
        holm += bool(out)
        for g in out:
            by_group[g] = by_group.get(g, 0) + 1
        by += bool(departs(calibration_family(cells, sums, BY)))
    return {
        "volume": volume,
        "months": months,
        "tested_per_month": tested / months,
        "holm": holm,
        "by": by,
        "by_group": by_group,
    }


def power_row(rng: np.random.Generator, months: int, cases: int) -> dict[str, Any]:
    """``months`` months in which MID's outcome odds are ODDS times its scores' and MID has
    ``cases`` cases; the rest of the month is the demo's structure scaled to match."""
    volume = round(cases / SHARES[MID])
    counts = {
        "tested": 0,
        "holm": 0,
        "by": 0,
        "spiegelhalter": 0,
        "observed_expected": 0,
        "unadjusted": 0,
    }
    outcomes = positives = expected = 0.0
    for _ in range(months):
        cells, sums = draw_scored_month(
            rng, volume, promised(), odds={MID: ODDS}, sizes={MID: cases}
        )
        rows = calibration_family(cells, sums, HOLM)
        row = rows.get(MID)
        p = sums[MID].power if MID in sums else None
        if p is not None:
            outcomes += p.n
            positives += p.sum_y
            expected += p.sum_p
        if row is None or row.spiegelhalter is None or row.observed_expected is None:
            continue
        counts["tested"] += 1
        counts["holm"] += row.status == "departs"
        counts["spiegelhalter"] += row.spiegelhalter.p_adjusted <= LEVEL
        counts["observed_expected"] += row.observed_expected.p_adjusted <= LEVEL
        counts["unadjusted"] += row.observed_expected.p_value <= LEVEL
        counts["by"] += MID in departs(calibration_family(cells, sums, BY))
    return {
        "cases": cases,
        "volume": volume,
        "months": months,
        "outcomes": outcomes / months,
        "positives": positives / months,
        "expected": expected / months,
        **counts,
    }


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="base seed")
    parser.add_argument("--months", type=int, default=5000, help="months at 2,000 a month")
    parser.add_argument("--months-large", type=int, default=2000, help="months at 20,000 a month")
    parser.add_argument("--power-months", type=int, default=1000, help="months per group size")
    parser.add_argument("--quick", action="store_true", help="a few months each (smoke run)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    months = 20 if args.quick else args.months
    months_large = 5 if args.quick else args.months_large
    power_months = 10 if args.quick else args.power_months
    print(machine_header("benchmarks/sim_calibration.py", list(argv or sys.argv[1:]), args.seed))
    started = time.perf_counter()
    results: dict[str, Any] = {"seed": args.seed, "size": [], "power": []}

    print(
        f"\n## Size: any group departs in a month of calibrated scores (level {LEVEL}; "
        f"coverage {COVERAGE:.0%}; at least {DEFAULT_MIN_COUNT} outcomes per tested group)\n"
    )
    print(
        "| volume | months | tested groups / month | any group departs, Holm | "
        "any group departs, B-Y | design bound |"
    )
    print("|---|---|---|---|---|---|")
    for index, volume in enumerate(VOLUMES):
        t0 = time.perf_counter()
        n = months if volume == VOLUMES[0] else months_large
        row = size_row(np.random.default_rng([args.seed, 1, index]), n, volume)
        row["seconds"] = time.perf_counter() - t0
        results["size"].append(row)
        print(
            f"| {volume:,} | {n:,} | {row['tested_per_month']:.1f} | {wilson(row['holm'], n)} | "
            f"{wilson(row['by'], n)} | {LEVEL} |",
            flush=True,
        )

    print(
        f"\n## Power: {MID}'s outcome odds {ODDS:g} times its scores', one month "
        f"({power_months} months per row; the rest calibrated)\n"
    )
    print(
        "| group cases | month volume | outcomes (mean) | positives (mean) | expected by the "
        "scores (mean) | departs, Holm | departs, B-Y | Spiegelhalter rejects, Holm | "
        "observed-expected rejects, Holm | unadjusted observed-expected test |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|")
    for index, cases in enumerate(POWER_CASES):
        t0 = time.perf_counter()
        row = power_row(np.random.default_rng([args.seed, 2, index]), power_months, cases)
        row["seconds"] = time.perf_counter() - t0
        results["power"].append(row)
        n = row["months"]
        print(
            f"| {cases:,} | {row['volume']:,} | {row['outcomes']:.0f} | {row['positives']:.1f} | "
            f"{row['expected']:.1f} | {wilson(row['holm'], n)} | {wilson(row['by'], n)} | "
            f"{row['spiegelhalter'] / n:.3f} | {row['observed_expected'] / n:.3f} | "
            f"{row['unadjusted'] / n:.3f} |",
            flush=True,
        )
    elapsed = time.perf_counter() - started
    results["seconds"] = elapsed
    print(f"\nrun time {elapsed:.1f} s")
    for row in results["size"]:
        print(
            f"- size, {row['volume']:,} a month: {row['seconds']:.1f} s; months with each "
            f"group departing (Holm): {row['by_group']}"
        )
    for row in results["power"]:
        print(f"- power, {row['cases']:,} cases: {row['seconds']:.1f} s")
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Error rates of the monthly verdicts, measured by simulation (issue "honest monthly verdicts").

Calls the audit's pure functions (``resolve_settings``, ``version_checks`` in
``service/audit/version_checks.py``, ``decide`` in ``service/audit/verdicts.py``) on simulated
months of the demo's nine groups (``benchmarks/sim_scenario.py``): an equal-opportunity
policy, tolerance 0.05, audit level 0.05, outcome coverage 88%. Each simulated month is
independent; a two-sample month draws its own calibration sample of 20,000 rows first.

- **Size of the breach test**: the share of months with any ``breach`` when the policy keeps its
  promise (true rates = promised, TPR gaps 0) and when every checked quantity of every
  non-reference group sits at the edge of the tolerance (TPR and FPR moved by +0.05 and -0.05
  in turn, so the TPR gap, the promised TPR, FPR and action rate are all 0.05 off), by Holm
  and by Benjamini-Yekutieli, with Wilson 95% intervals; and what share of the same months the
  old rule (point estimate outside the band) would have alerted on.
- **False holds**: the share of months with any ``holds`` on a check whose true quantity is at
  the edge or at twice the tolerance from the promise.
- **Power**: one group (millbrook|es) with a real TPR gap of -0.10 in one month, everything
  else in control, the month scaled so that the group has 50 to 5,000 cases: the probability
  that the month shows ``breach`` on its TPR gap (Holm, Benjamini-Yekutieli, and a single
  unadjusted test for contrast), and on any of its checks.

    .venv/bin/python benchmarks/sim_verdicts.py [--seed N] [--months 2000] [--power-months 1000]
        [--quick] [--json out.json]
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

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sim_scenario import (
    CALIBRATION_ROWS,
    COMMON_TPR,
    COVERAGE,
    DEFAULT_SEED,
    MID,
    NON_REFERENCE,
    PREVALENCE,
    REFERENCE,
    SHARES,
    TOLERANCE,
    Truth,
    document,
    draw_calibration,
    draw_cells,
    machine_header,
    promised,
    shifted,
    wilson,
)

from service.audit.verdicts import (
    DEFAULT_MIN_COUNT,
    Check,
    CheckKind,
    MonthContext,
    Status,
    decide,
)
from service.audit.version_checks import version_checks
from service.audit.version_settings import resolve_settings
from service.policy.document import AuditPlan

LEVEL = 0.05
VOLUMES = (2000, 4000)
POWER_CASES = (50, 100, 192, 384, 500, 1000, 2000, 5000)
"""Cases of the gap group per month; 192 and 384 are its share of 2,000 and 4,000."""
CONTEXT = MonthContext(min_count=DEFAULT_MIN_COUNT, decide_outcomes=True)
HOLM = AuditPlan(level=LEVEL, multiplicity="holm")
BY = AuditPlan(level=LEVEL, multiplicity="benjamini-yekutieli")


@dataclass
class Tally:
    """Counts over simulated months of one scenario."""

    months: int = 0
    tested: int = 0
    breach_holm: int = 0
    breach_by: int = 0
    false_holds_holm: int = 0
    false_holds_by: int = 0
    old_rule: int = 0
    group: dict[str, int] = field(default_factory=dict)

    def add(self, name: str, hit: bool) -> None:
        self.group[name] = self.group.get(name, 0) + int(hit)


def month_checks(
    rng: np.random.Generator,
    volume: int,
    truth: Mapping[str, Truth],
    two_sample: bool,
    sizes: Mapping[str, int] | None = None,
) -> list[Check]:
    """One simulated month's checks (tested, not yet decided), as the audit builds them."""
    calibration = draw_calibration(rng, CALIBRATION_ROWS, promised()) if two_sample else None
    doc = document(calibration)
    cells = draw_cells(rng, volume, truth, sizes=sizes)
    settings = resolve_settings(doc, cells, None, None)
    if settings.reference_group != REFERENCE:
        raise RuntimeError(f"reference {settings.reference_group!r}, expected {REFERENCE!r}")
    return version_checks(1, doc, cells, settings, CONTEXT)


def outside_band(check: Check) -> bool:
    """The old ``watch`` rule: the point estimate lies outside the promised band."""
    assert check.estimate is not None
    high = check.band.high
    return check.estimate < check.band.low or (high is not None and check.estimate > high)


def run_null(
    rng: np.random.Generator,
    months: int,
    volume: int,
    truth: Mapping[str, Truth],
    two_sample: bool,
    off_groups: Sequence[str],
) -> Tally:
    """``months`` months; a ``holds`` on a check of a group in ``off_groups`` is false."""
    t = Tally()
    for _ in range(months):
        checks = month_checks(rng, volume, truth, two_sample)
        holm, family = decide(checks, HOLM)
        by, _ = decide(checks, BY)
        t.months += 1
        t.tested += family.tests
        t.breach_holm += any(c.status is Status.BREACH for c in holm)
        t.breach_by += any(c.status is Status.BREACH for c in by)
        t.false_holds_holm += any(c.status is Status.HOLDS and c.group in off_groups for c in holm)
        t.false_holds_by += any(c.status is Status.HOLDS and c.group in off_groups for c in by)
        t.old_rule += any(outside_band(c) for c in checks if c.evidence is not None)
    return t


def run_power(rng: np.random.Generator, months: int, cases: int) -> Tally:
    """``months`` months in which MID's TPR is 0.10 below everyone else's and MID has
    ``cases`` cases; the rest of the month is the demo's structure scaled to match."""
    volume = round(cases / SHARES[MID])
    truth = promised()
    truth[MID] = Truth(COMMON_TPR - 2 * TOLERANCE, truth[MID].fpr)
    t = Tally()
    for _ in range(months):
        checks = month_checks(rng, volume, truth, False, sizes={MID: cases})
        holm, _ = decide(checks, HOLM)
        by, _ = decide(checks, BY)
        t.months += 1

        def gap(cs: list[Check]) -> Check:
            (c,) = [c for c in cs if c.kind is CheckKind.PARITY and c.group == MID]
            return c

        tested = gap(holm).evidence is not None
        t.add("tested", tested)
        t.add("holm", gap(holm).status is Status.BREACH)
        t.add("by", gap(by).status is Status.BREACH)
        raw = gap(checks).evidence
        t.add("unadjusted", raw is not None and raw.p_outside <= LEVEL)
        t.add("any_holm", any(c.group == MID and c.status is Status.BREACH for c in holm))
    return t


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="base seed")
    parser.add_argument("--months", type=int, default=2000, help="months per null scenario")
    parser.add_argument("--power-months", type=int, default=1000, help="months per group size")
    parser.add_argument("--quick", action="store_true", help="a few months each (smoke run)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    months = 20 if args.quick else args.months
    power_months = 20 if args.quick else args.power_months
    print(machine_header("benchmarks/sim_verdicts.py", list(argv or sys.argv[1:]), args.seed))
    started = time.perf_counter()

    scenarios = [
        (volume, two_sample, kind)
        for volume in VOLUMES
        for two_sample in (False, True)
        for kind in ("in control", "at the edge", "twice the tolerance")
    ]
    truths = {
        "in control": (promised(), ()),
        "at the edge": (shifted(promised(), TOLERANCE, fpr_too=True), NON_REFERENCE),
        "twice the tolerance": (shifted(promised(), 2 * TOLERANCE, fpr_too=True), NON_REFERENCE),
    }
    results: dict[str, Any] = {"seed": args.seed, "months": months, "size": [], "power": []}
    print(
        f"\n## Size of the breach test and false holds ({months} months per row; level {LEVEL};"
        f" coverage {COVERAGE:.0%})\n"
    )
    print(
        "| volume | promises | truth | tested checks / month | any breach, Holm | "
        "any breach, B-Y | any false holds, Holm | any false holds, B-Y | old rule alerts |"
    )
    print("|---|---|---|---|---|---|---|---|---|")
    for index, (volume, two_sample, kind) in enumerate(scenarios):
        truth, off = truths[kind]
        rng = np.random.default_rng([args.seed, 1, index])
        t = run_null(rng, months, volume, truth, two_sample, off)
        promises = "two-sample" if two_sample else "exact"
        in_control = kind != "twice the tolerance"
        row = {
            "volume": volume,
            "promises": promises,
            "truth": kind,
            "months": t.months,
            "tested_per_month": t.tested / t.months,
            "breach_holm": t.breach_holm,
            "breach_by": t.breach_by,
            "false_holds_holm": t.false_holds_holm if off else None,
            "false_holds_by": t.false_holds_by if off else None,
            "old_rule": t.old_rule,
        }
        results["size"].append(row)
        print(
            f"| {volume:,} | {promises} | {kind} | {t.tested / t.months:.1f} | "
            f"{wilson(t.breach_holm, t.months) if in_control else '(not an error)'} | "
            f"{wilson(t.breach_by, t.months) if in_control else '(not an error)'} | "
            f"{wilson(t.false_holds_holm, t.months) if off else '-'} | "
            f"{wilson(t.false_holds_by, t.months) if off else '-'} | "
            f"{wilson(t.old_rule, t.months) if in_control else '-'} |",
            flush=True,
        )

    print(
        f"\n## Power: millbrook|es with a TPR gap of -{2 * TOLERANCE:g}, one month "
        f"({power_months} months per row; exact promises; the rest in control)\n"
    )
    print(
        "| group cases | month volume | group positives (mean) | reference positives (mean) | "
        "TPR gap tested | breach, Holm | breach, B-Y | unadjusted test | any breach of the "
        "group, Holm |"
    )
    print("|---|---|---|---|---|---|---|---|---|")
    for index, cases in enumerate(POWER_CASES):
        rng = np.random.default_rng([args.seed, 2, index])
        t = run_power(rng, power_months, cases)
        volume = round(cases / SHARES[MID])
        pos_g = cases * COVERAGE * PREVALENCE[MID]
        pos_r = volume * SHARES[REFERENCE] * COVERAGE * PREVALENCE[REFERENCE]
        n = t.months
        g = t.group
        results["power"].append({"cases": cases, "volume": volume, "months": n, **g})
        print(
            f"| {cases:,} | {volume:,} | {pos_g:.0f} | {pos_r:,.0f} | {g['tested'] / n:.2f} | "
            f"{wilson(g['holm'], n)} | {wilson(g['by'], n)} | {g['unadjusted'] / n:.3f} | "
            f"{g['any_holm'] / n:.3f} |",
            flush=True,
        )

    control = [r for r in results["size"] if r["truth"] == "in control"]
    print("\nOld rule (an alert when a point estimate lies outside the band), in-control months:")
    for r in control:
        print(
            f"- {r['volume']:,} decisions/month, {r['promises']} promises: "
            f"{r['old_rule'] / r['months']:.2%} of months alerted (new rule, any breach by "
            f"Holm: {r['breach_holm'] / r['months']:.2%})"
        )
    elapsed = time.perf_counter() - started
    results["seconds"] = elapsed
    print(f"\nrun time {elapsed:.1f} s")
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Size of the monthly breach test when the promises are real cross-fitted promises (issue
"evidence over time", second part: what the extra spread of cross-fitted promises does).

For each of ``--policies`` calibration samples of 20,000 rows from the demo generator (seeds
``--seed + 1``, ... as in ``sim_promises.py``), an equal-opportunity policy is derived exactly
as ``sim_promises.py`` derives it (``prepare`` + ``solve``, promises cross-fitted, the
document from ``build_document``, with its two-sample promises ``out_of_sample``), and its
promises bootstrapped as ``evenhand derive`` does (``bootstrap_errors``, ``--resamples``
resamples) for their ``standard_errors``. Each derived
policy's TRUE rates are its rules' expected rates on ``--truth-rows`` fresh rows of the same
generator. In the generator a case's language is drawn independently of its score and outcome
given its community, so every group's truth is computed on all fresh rows of its community
(``Population.rates``), a third to ten times the rows of the group itself.

Months are then drawn from the truth (``n ~ Multinomial(volume, shares)``, outcome coverage 88%,
positives from the community's true prevalence, ``tp`` and ``fp`` from the group's true TPR
and FPR, actions among the cases without an outcome at its true action rate) and audited with
the derived document (``version_checks`` + ``decide``, Holm, level 0.05), in two scenarios:

- **truth**: every group's rates are its rules' true rates, so every promise check's true
  quantity (realized minus promised, with the promise standing for the rate it estimates, the
  true rate of the deployed rule) is 0;
- **at the edge**: every group's TPR and FPR (and so its action rate) moved by +0.05 and -0.05
  in turn (groups in key order, the reference included), so every promise check's true
  quantity is exactly at the edge of the tolerance: the worst case for the breach test.

An error is a ``breach`` on a check whose true quantity is inside its band or on its edge: every
promise check, and a parity check whose true TPR gap is at most the tolerance (most derived
policies have true gaps beyond it, ``sim_promises.py``; a breach of those is right). The
same months are audited three ways: the document as derived (the promise checks widened by
the design effect of the standard errors), the same without ``standard_errors`` (the promise a
binomial sample of its counts, as before the fix) and with EXACT promises (the true rates as
fixed numbers, no ``out_of_sample``), where the exact binomial tests keep the level.
The months of one policy share its promise errors, so intervals are over policies (the mean of
the per-policy shares, +- 1.96 standard errors), not over months.

    .venv/bin/python benchmarks/sim_promise_size.py [--seed N] [--policies 100] [--months 10]
        [--truth-rows 4000000] [--resamples 100] [--workers 1] [--quick] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import sys
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sim_promises import (
    CHUNK,
    CRITERION,
    IDENTITY,
    ROWS,
    SETTINGS,
    TRUTH_SEED,
    Population,
    calibration_data,
)
from sim_scenario import COVERAGE, DEFAULT_SEED, SHARES, TOLERANCE, machine_header

from service.audit.realized import CellCounts
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
from service.policy.crossfit import DEFAULT_FOLDS, DEFAULT_FOLDS_SEED, assign_folds, cross_fit
from service.policy.derive import solve
from service.policy.derive_document import build_document
from service.policy.document import GROUP_SEPARATOR, AuditPlan, PolicyDocument, resolve_rule_key
from service.policy.promise_spread import bootstrap_errors
from service.policy.units import DeriveError, prepare
from service.stats.proportions import wilson_interval

LEVEL = 0.05
VOLUMES = (2000, 20_000, 200_000)
SCENARIOS = ("truth", "at the edge")
RATES = ("tpr", "fpr", "action_rate")
CONTEXT = MonthContext(min_count=DEFAULT_MIN_COUNT, decide_outcomes=True)
PLAN = AuditPlan(level=LEVEL, multiplicity="holm")
INSIDE = 1e-9
"""A true quantity counts as inside its band when it passes the edge by at most this."""


@dataclass(frozen=True)
class Rates:
    tpr: float
    fpr: float
    prevalence: float

    @property
    def action_rate(self) -> float:
        return self.prevalence * self.tpr + (1.0 - self.prevalence) * self.fpr


@dataclass(frozen=True)
class Derived:
    """A derived policy: its document (two-sample promises with bootstrap standard errors),
    the same without the standard errors (the promise as a binomial sample of its counts, as
    before), the same with exact promises at the true rates, and every group's true rates."""

    seed: int
    two_sample: PolicyDocument
    binomial: PolicyDocument
    exact: PolicyDocument
    truth: dict[str, Rates]


def community_populations(rows: int) -> dict[str, Population]:
    """Fresh rows of the demo generator pooled by community (seeds from TRUTH_SEED)."""
    scores: dict[str, list[np.ndarray]] = {}
    outcomes: dict[str, list[np.ndarray]] = {}
    done, j = 0, 0
    while done < rows:
        size = min(CHUNK, rows - done)
        data = calibration_data(size, TRUTH_SEED + j)
        for code, key in enumerate(data.group_keys):
            community = key.split(GROUP_SEPARATOR)[0]
            mine = data.group_codes == code
            scores.setdefault(community, []).append(data.scores[mine])
            outcomes.setdefault(community, []).append(data.outcomes[mine])
        done, j = done + size, j + 1
    return {
        c: Population.of(np.concatenate(scores[c]), np.concatenate(outcomes[c])) for c in scores
    }


def derive(seed: int, truth: Mapping[str, Population], resamples: int = 100) -> Derived:
    data = calibration_data(ROWS, seed)
    prepared = prepare(data, SETTINGS)
    solution = solve(prepared, CRITERION, TOLERANCE)
    folds = assign_folds(data, DEFAULT_FOLDS, DEFAULT_FOLDS_SEED)
    cross = cross_fit(prepared, [CRITERION], folds, DEFAULT_FOLDS, TOLERANCE)[CRITERION]
    if isinstance(cross, DeriveError):
        raise cross
    spread = bootstrap_errors(prepared, CRITERION, TOLERANCE, DEFAULT_FOLDS, resamples=resamples)
    doc = build_document(prepared, solution, cross, IDENTITY, spread)
    assert doc.targets is not None
    rates: dict[str, Rates] = {}
    for key in doc.targets.groups:
        rule_key = resolve_rule_key(doc, key)
        assert rule_key is not None
        population = truth[key.split(GROUP_SEPARATOR)[0]]
        r = population.rates(doc.rules[rule_key])
        n_pos, n_neg = len(population.positives), len(population.negatives)
        rates[key] = Rates(r["tpr"], r["fpr"], n_pos / (n_pos + n_neg))
    raw = doc.model_dump(mode="json")
    binomial = json.loads(json.dumps(raw))
    binomial["targets"].pop("resamples")
    for target in binomial["targets"]["groups"].values():
        target.pop("standard_errors")
    for key, target in raw["targets"]["groups"].items():
        target.update(tpr=rates[key].tpr, fpr=rates[key].fpr, action_rate=rates[key].action_rate)
        target.pop("out_of_sample")
        target.pop("standard_errors")
    return Derived(
        seed,
        doc,
        PolicyDocument.model_validate(binomial),
        PolicyDocument.model_validate(raw),
        rates,
    )


def at_the_edge(truth: Mapping[str, Rates]) -> dict[str, Rates]:
    """Every group's TPR and FPR moved by +TOLERANCE and -TOLERANCE in turn (key order)."""
    out = {}
    for i, key in enumerate(sorted(truth)):
        d = TOLERANCE if i % 2 == 0 else -TOLERANCE
        t = truth[key]
        out[key] = Rates(t.tpr + d, t.fpr + d, t.prevalence)
    return out


def draw_month(
    rng: np.random.Generator, volume: int, truth: Mapping[str, Rates]
) -> dict[str, CellCounts]:
    keys = sorted(truth)
    counts = rng.multinomial(volume, [SHARES[k] for k in keys])
    cells: dict[str, CellCounts] = {}
    for key, n in zip(keys, counts, strict=True):
        if n == 0:
            continue
        t = truth[key]
        observed = int(rng.binomial(n, COVERAGE))
        positives = int(rng.binomial(observed, t.prevalence))
        tp = int(rng.binomial(positives, t.tpr))
        fp = int(rng.binomial(observed - positives, t.fpr))
        hidden = int(rng.binomial(n - observed, t.action_rate))
        cells[key] = CellCounts(
            n=int(n), actions=tp + fp + hidden, observed=observed, positives=positives, tp=tp, fp=fp
        )
    return cells


def false_breaches(
    decided: Sequence[Check], truth: Mapping[str, Rates], reference: str
) -> tuple[bool, dict[str, bool]]:
    """(any false breach, any false breach of a promise check per rate). Every promise check is
    at most at its edge by construction; a parity check is false when its true gap is."""
    by_rate = dict.fromkeys(RATES, False)
    anything = False
    for c in decided:
        if c.status is not Status.BREACH:
            continue
        if c.kind is CheckKind.PROMISE:
            by_rate[c.metric] = True
            anything = True
        elif c.kind is CheckKind.PARITY:
            gap = truth[c.group].tpr - truth[reference].tpr
            anything |= abs(gap) <= TOLERANCE + INSIDE
    return anything, by_rate


def audit(
    doc: PolicyDocument, cells: Mapping[str, CellCounts], truth: Mapping[str, Rates]
) -> tuple[bool, dict[str, bool]]:
    settings = resolve_settings(doc, cells, None, None)
    assert settings.reference_group is not None
    decided, _ = decide(version_checks(1, doc, cells, settings, CONTEXT), PLAN)
    return false_breaches(decided, truth, settings.reference_group)


def wilson(shares: Sequence[float], months: int) -> str:
    """Share of all months, with its Wilson 95% interval (months taken as independent)."""
    hits = round(sum(shares) * months)
    total = len(shares) * months
    low, high = wilson_interval(hits, total)
    return f"{hits / total:.4f} [{low:.4f}, {high:.4f}]"


def interval(shares: Sequence[float]) -> str:
    """Mean of per-policy shares with a normal 95% interval over policies."""
    a = np.asarray(shares, dtype=float)
    mean = float(a.mean())
    half = 1.959963984540054 * float(a.std(ddof=1)) / math.sqrt(a.size) if a.size > 1 else 0.0
    return f"{mean:.4f} [{max(0.0, mean - half):.4f}, {min(1.0, mean + half):.4f}]"


_SHARED: dict[str, Any] = {}
"""The fresh rows and settings every derivation reads (set before the worker processes fork)."""


def _derive_one(seed: int) -> Derived | str:
    """One derived policy, or why it could not be derived."""
    t0 = time.perf_counter()
    try:
        out: Derived | str = derive(seed, _SHARED["populations"], _SHARED["resamples"])
    except (DeriveError, RuntimeError) as exc:
        out = f"{type(exc).__name__}: {exc}"
    print(f"derived seed {seed} in {time.perf_counter() - t0:.1f} s", file=sys.stderr, flush=True)
    return out


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="base seed")
    parser.add_argument("--policies", type=int, default=100, help="derived policies")
    parser.add_argument("--months", type=int, default=10, help="months per policy and row")
    parser.add_argument("--truth-rows", type=int, default=4_000_000, help="fresh rows")
    parser.add_argument(
        "--resamples", type=int, default=100, help="bootstrap resamples per derived policy"
    )
    parser.add_argument("--workers", type=int, default=1, help="processes deriving policies")
    parser.add_argument("--quick", action="store_true", help="a few policies (smoke run)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    policies = 3 if args.quick else args.policies
    months = 2 if args.quick else args.months
    truth_rows = 200_000 if args.quick else args.truth_rows
    resamples = 5 if args.quick else args.resamples
    print(machine_header("benchmarks/sim_promise_size.py", list(argv or sys.argv[1:]), args.seed))
    started = time.perf_counter()
    populations = community_populations(truth_rows)
    truth_seconds = time.perf_counter() - started
    derived: list[Derived] = []
    failed: list[dict[str, Any]] = []
    seeds = [args.seed + 1 + i for i in range(policies)]
    _SHARED["populations"] = populations
    _SHARED["resamples"] = resamples
    if args.workers > 1:
        with multiprocessing.get_context("fork").Pool(args.workers) as pool:
            outcomes = pool.map(_derive_one, seeds, chunksize=1)
    else:
        outcomes = [_derive_one(seed) for seed in seeds]
    for seed, outcome in zip(seeds, outcomes, strict=True):
        if isinstance(outcome, str):
            failed.append({"seed": seed, "error": outcome})
        else:
            derived.append(outcome)
    derive_seconds = time.perf_counter() - started - truth_seconds
    print(
        f"\n{len(derived)} of {policies} calibration samples of {ROWS:,} rows derived; truth "
        f"from {truth_rows:,} fresh rows pooled by community"
    )
    for f in failed:
        print(f"- generate({ROWS}, seed={f['seed']}): {f['error']}")
    results: dict[str, Any] = {
        "seed": args.seed,
        "policies": len(derived),
        "months": months,
        "resamples": resamples,
        "failed": failed,
        "rows": [],
    }
    print(
        f"\n## Any false breach in a month (Holm, level {LEVEL}; {months} months per policy and "
        f"row, {len(derived)} policies, {resamples} bootstrap resamples each; share of months "
        "[Wilson 95%], and the mean of per-policy shares [normal 95% interval over policies])\n"
    )
    print(
        "| volume | truth | widened by the design effect: any false breach [Wilson] | "
        "[over policies] | of a TPR promise | of an FPR promise | of an action-rate promise | "
        "binomial promises (before): any false breach [Wilson] | [over policies] | "
        "exact promises (the true rates): any false breach [Wilson] | design bound |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    index = 0
    for volume in VOLUMES:
        for scenario in SCENARIOS:
            t0 = time.perf_counter()
            rng = np.random.default_rng([args.seed, 1, index])
            index += 1
            shares: dict[str, list[float]] = {k: [] for k in ("any", *RATES, "binomial", "exact")}
            for d in derived:
                truth = d.truth if scenario == "truth" else at_the_edge(d.truth)
                tally = dict.fromkeys(shares, 0)
                for _ in range(months):
                    cells = draw_month(rng, volume, truth)
                    anything, by_rate = audit(d.two_sample, cells, truth)
                    tally["any"] += anything
                    for rate in RATES:
                        tally[rate] += by_rate[rate]
                    tally["binomial"] += audit(d.binomial, cells, truth)[0]
                    tally["exact"] += audit(d.exact, cells, truth)[0]
                for k in shares:
                    shares[k].append(tally[k] / months)
            row = {
                "volume": volume,
                "truth": scenario,
                "per_policy": shares,
                "seconds": time.perf_counter() - t0,
            }
            results["rows"].append(row)
            print(
                f"| {volume:,} | {scenario} | {wilson(shares['any'], months)} | "
                f"{interval(shares['any'])} | {wilson(shares['tpr'], months)} | "
                f"{wilson(shares['fpr'], months)} | {wilson(shares['action_rate'], months)} | "
                f"{wilson(shares['binomial'], months)} | {interval(shares['binomial'])} | "
                f"{wilson(shares['exact'], months)} | {LEVEL} |",
                flush=True,
            )
    elapsed = time.perf_counter() - started
    results["seconds"] = {"truth": truth_seconds, "derive": derive_seconds, "total": elapsed}
    print(
        f"\nrun time {elapsed:.1f} s (fresh rows {truth_seconds:.1f} s, deriving "
        f"{derive_seconds:.1f} s)"
    )
    for row in results["rows"]:
        print(f"- {row['volume']:,} a month, {row['truth']}: {row['seconds']:.1f} s")
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())

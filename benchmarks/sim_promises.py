"""Errors of a derived policy's promised rates, in sample and cross-fitted (issue "evidence over
time", second part).

For each of ``--samples`` calibration samples of 20,000 rows from the demo generator
(``service/demo/fernhollow.py`` ``generate``, seeds ``--seed + 1``, ``--seed + 2``, ...), an
equal-opportunity policy is derived as the demo derives it (costs 1 and 4, tolerance 0.05,
groups under 800 rows use their parent community's rule, 5 cross-fitting folds): rules fitted
on all rows (``prepare`` + ``solve``), promises cross-fitted (``assign_folds`` +
``cross_fit`` + ``build_document``, the document's ``targets``). The in-sample promises, the
old behaviour, are the fitted rules' expected rates on the rows they were fitted on (the
solution's per-group counts, checked here against a direct computation).

Each derived policy's TRUE rates come from ``--truth-rows`` fresh rows of the same generator
(seeds from 1,000,000,000 up, disjoint from the calibration seeds, drawn once and shared by every
policy): a group's true TPR is the mean of P(action | score) over its positives, and so on.
Reported per group and rate: promised minus true over the samples (mean with a 95% interval,
median, 10th and 90th percentiles, standard deviation), beside the standard error the audit's
two-sample test gives a cross-fitted promise (a proportion over its out-of-sample
denominator; root mean square over the samples), and the true TPR gaps between the groups the
promise covers.

With ``--bootstrap-samples M`` the first M samples also bootstrap their promises' standard
errors as ``evenhand derive`` does (``bootstrap_spreads``, ``--resamples`` resamples, seed
as the derive default), by both estimators from the same resamples: the spread of the
resampled promise (``promise``, the first estimator) and the spread of the resampled
promise's error against its own rules' rate on the original rows (``error``, the default).
A table then sets their root mean square over those M samples beside the binomial standard
error and the MEASURED standard deviation of promise minus truth over all samples: the
standard error the audit should be given is that measured one.

    .venv/bin/python benchmarks/sim_promises.py [--seed N] [--samples 500]
        [--truth-rows 10000000] [--bootstrap-samples 0] [--resamples 40] [--quick]
        [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sim_scenario import DEFAULT_SEED, SHARES, TOLERANCE, cell_text, machine_header

from service.demo.fernhollow import generate
from service.policy.crossfit import DEFAULT_FOLDS, DEFAULT_FOLDS_SEED, assign_folds, cross_fit
from service.policy.derive import solve
from service.policy.derive_document import PolicyIdentity, build_document
from service.policy.document import GROUP_SEPARATOR, PolicyDocument, Rule, resolve_rule_key
from service.policy.promise_spread import ERROR_METHOD, PROMISE_METHOD, bootstrap_spreads
from service.policy.targets import Criterion
from service.policy.units import CalibrationData, DeriveError, DeriveSettings, prepare

CRITERION = Criterion.EQUAL_OPPORTUNITY
ROWS = 20_000
TRUTH_SEED = 1_000_000_000
CHUNK = 1_000_000
SETTINGS = DeriveSettings(
    cost_fp=1.0, cost_fn=4.0, favourable="action", min_group_size=800, fallback="parent"
)
IDENTITY = PolicyIdentity(
    name="sim-follow-up",
    description="",
    score_meaning="P(readmission within 30 days)",
    action_label="offer nurse follow-up",
    no_action_label="standard discharge",
)
RATES = ("tpr", "fpr", "action_rate")
ABOVE = 1e-9
"""A gap counts as above the tolerance when it passes it by more than this (the fit meets
the tolerance up to rounding)."""
FloatArray = npt.NDArray[np.float64]


def calibration_data(rows: int, seed: int) -> CalibrationData:
    d = generate(rows, seed=seed)
    keys = [f"{c}{GROUP_SEPARATOR}{lang}" for c, lang in zip(d.community, d.language, strict=True)]
    known = sorted(set(keys))
    code_of = {k: i for i, k in enumerate(known)}
    codes = np.fromiter((code_of[k] for k in keys), dtype=np.intp, count=len(keys))
    return CalibrationData(
        d.score.astype(np.float64), d.outcome, codes, known, ["community", "language"]
    )


@dataclass(frozen=True)
class Population:
    """One group's rows, positives and negatives apart, each with its scores sorted, so that a
    step rule's expected actions are a few binary searches."""

    positives: FloatArray
    negatives: FloatArray

    @staticmethod
    def of(scores: FloatArray, outcomes: npt.NDArray[np.int8]) -> Population:
        return Population(np.sort(scores[outcomes == 1]), np.sort(scores[outcomes == 0]))

    def rates(self, rule: Rule) -> dict[str, float]:
        """Expected TPR, FPR and action rate of ``rule``: sum over steps of the probability
        added at the step times the rows at or above its start."""
        tp = fp = 0.0
        previous = 0.0
        for step in rule.steps:
            added = step.probability - previous
            previous = step.probability
            tp += added * (len(self.positives) - np.searchsorted(self.positives, step.start))
            fp += added * (len(self.negatives) - np.searchsorted(self.negatives, step.start))
        n_pos, n_neg = len(self.positives), len(self.negatives)
        return {"tpr": tp / n_pos, "fpr": fp / n_neg, "action_rate": (tp + fp) / (n_pos + n_neg)}


def populations(data: CalibrationData) -> dict[str, Population]:
    return {
        key: Population.of(data.scores[data.group_codes == g], data.outcomes[data.group_codes == g])
        for g, key in enumerate(data.group_keys)
    }


def truth_populations(rows: int) -> tuple[dict[str, Population], dict[str, float]]:
    """The fresh sample's groups, and a bound on the standard error of each group's true TPR
    (sqrt(1 / (4 positives)): the mean of a [0, 1] quantity)."""
    parts: list[CalibrationData] = []
    done, j = 0, 0
    while done < rows:
        size = min(CHUNK, rows - done)
        parts.append(calibration_data(size, TRUTH_SEED + j))
        done, j = done + size, j + 1
    out: dict[str, Population] = {}
    for key in parts[0].group_keys:
        rows_of = [p.group_codes == p.group_keys.index(key) for p in parts]
        scores = np.concatenate([p.scores[r] for p, r in zip(parts, rows_of, strict=True)])
        outcomes = np.concatenate([p.outcomes[r] for p, r in zip(parts, rows_of, strict=True)])
        out[key] = Population.of(scores, outcomes)
    return out, {k: float(np.sqrt(0.25 / len(p.positives))) for k, p in out.items()}


@dataclass(frozen=True)
class Derived:
    in_sample: dict[str, dict[str, float]]
    cross_fitted: dict[str, dict[str, float]]
    binomial_sd: dict[str, dict[str, float]]
    """The standard error the audit's two-sample test gives each cross-fitted promise: that of
    a proportion over the out-of-sample denominator."""
    true: dict[str, dict[str, float]]
    outside: frozenset[str]
    reference: str
    spreads: dict[str, dict[str, dict[str, float | None]]] | None = None
    """Bootstrap standard errors by estimator, group and rate (with --bootstrap-samples)."""


def derive_one(seed: int, truth: dict[str, Population], resamples: int = 0) -> Derived:
    data = calibration_data(ROWS, seed)
    prepared = prepare(data, SETTINGS)
    solution = solve(prepared, CRITERION, TOLERANCE)
    folds = assign_folds(data, DEFAULT_FOLDS, DEFAULT_FOLDS_SEED)
    cross = cross_fit(prepared, [CRITERION], folds, DEFAULT_FOLDS, TOLERANCE)[CRITERION]
    if isinstance(cross, DeriveError):
        raise cross
    doc: PolicyDocument = build_document(prepared, solution, cross, IDENTITY)
    assert doc.targets is not None
    own = populations(data)
    in_sample: dict[str, dict[str, float]] = {}
    cross_fitted: dict[str, dict[str, float]] = {}
    binomial_sd: dict[str, dict[str, float]] = {}
    true: dict[str, dict[str, float]] = {}
    for result in solution.groups:
        key = result.key
        c = result.counts
        in_sample[key] = {
            "tpr": float(c.tpr[0]),
            "fpr": float(c.fpr[0]),
            "action_rate": float((c.tp[0] + c.fp[0]) / c.n[0]),
        }
        rule_key = resolve_rule_key(doc, key)
        assert rule_key is not None and rule_key in doc.rules, (key, rule_key)
        rule = doc.rules[rule_key]
        direct = own[key].rates(rule)
        for name in RATES:
            if abs(direct[name] - in_sample[key][name]) > 1e-9:
                raise RuntimeError(
                    f"sample {seed}, {key}: in-sample {name} {in_sample[key][name]} from the "
                    f"fit, {direct[name]} directly"
                )
        target = doc.targets.groups[key]
        cross_fitted[key] = {name: float(getattr(target, name)) for name in RATES}
        counts = target.out_of_sample
        assert counts is not None
        denominators = {
            "tpr": counts.positives,
            "fpr": counts.n - counts.positives,
            "action_rate": counts.n,
        }
        binomial_sd[key] = {
            name: float(np.sqrt(max(0.0, v * (1 - v)) / max(1, denominators[name])))
            for name, v in cross_fitted[key].items()
        }
        true[key] = truth[key].rates(rule)
    outside = frozenset(k for k, t in doc.targets.groups.items() if t.outside_promise)
    reference = max(doc.targets.groups, key=lambda k: (doc.targets.groups[k].n or 0, k))
    spreads = None
    if resamples:
        found = bootstrap_spreads(
            prepared,
            CRITERION,
            TOLERANCE,
            DEFAULT_FOLDS,
            methods=(PROMISE_METHOD, ERROR_METHOD),
            resamples=resamples,
        )
        spreads = {m: found[m].standard_errors for m in found}
    return Derived(in_sample, cross_fitted, binomial_sd, true, outside, reference, spreads)


def summary(values: Sequence[float]) -> dict[str, float]:
    a = np.asarray(values, dtype=float)
    sd = float(a.std(ddof=1)) if len(a) > 1 else float("nan")
    half = 1.959963984540054 * sd / np.sqrt(len(a))
    return {
        "mean": float(a.mean()),
        "mean_low": float(a.mean() - half),
        "mean_high": float(a.mean() + half),
        "median": float(np.median(a)),
        "p10": float(np.quantile(a, 0.1)),
        "p90": float(np.quantile(a, 0.9)),
        "sd": sd,
    }


def fmt(s: dict[str, float]) -> list[str]:
    return [
        f"{s['mean']:+.4f} [{s['mean_low']:+.4f}, {s['mean_high']:+.4f}]",
        f"{s['median']:+.4f}",
        f"{s['p10']:+.4f} to {s['p90']:+.4f}",
        f"{s['sd']:.4f}",
    ]


def rms(values: Sequence[float | None]) -> float:
    """Root mean square of the defined values (NaN if none)."""
    kept = [v for v in values if v is not None]
    return float(np.sqrt(np.mean(np.square(kept)))) if kept else float("nan")


def standard_error_table(
    derived: Sequence[Derived], booted: Sequence[Derived], groups: Sequence[str], resamples: int
) -> list[dict[str, Any]]:
    """Print and return, per rate and group, the binomial standard error, the two bootstrap
    estimators' (root mean square over the bootstrapped samples) and the measured standard
    deviation of promise minus truth (over all samples)."""
    print(
        f"\n## Standard error of a cross-fitted promise: bootstrap ({resamples} resamples, root "
        f"mean square over {len(booted)} samples) against the measured sd of promise minus "
        f"truth ({len(derived)} samples)\n"
    )
    print(
        "| rate | group | binomial SE | bootstrap of the promise (before) | bootstrap of the "
        "error (now) | measured sd | before / measured | now / measured |"
    )
    print("|---|---|---|---|---|---|---|---|")
    rows: list[dict[str, Any]] = []
    for name in RATES:
        for key in groups:
            measured = float(
                np.std([d.cross_fitted[key][name] - d.true[key][name] for d in derived], ddof=1)
            )
            binomial = rms([d.binomial_sd[key][name] for d in booted])
            by = {
                m: rms([d.spreads[m][key][name] for d in booted if d.spreads is not None])
                for m in (PROMISE_METHOD, ERROR_METHOD)
            }
            rows.append(
                {"rate": name, "group": key, "binomial": binomial, "measured": measured, **by}
            )
            print(
                f"| {name} | {cell_text(key)} | {binomial:.4f} | {by[PROMISE_METHOD]:.4f} | "
                f"{by[ERROR_METHOD]:.4f} | {measured:.4f} | "
                f"{by[PROMISE_METHOD] / measured:.2f} | {by[ERROR_METHOD] / measured:.2f} |"
            )
    return rows


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="base seed")
    parser.add_argument("--samples", type=int, default=500, help="calibration samples")
    parser.add_argument("--truth-rows", type=int, default=10_000_000, help="fresh rows")
    parser.add_argument(
        "--bootstrap-samples", type=int, default=0, help="samples that also bootstrap"
    )
    parser.add_argument("--resamples", type=int, default=40, help="resamples per bootstrap")
    parser.add_argument("--quick", action="store_true", help="a few samples (smoke run)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    samples = 3 if args.quick else args.samples
    truth_rows = 200_000 if args.quick else args.truth_rows
    boot_samples = min(samples, args.bootstrap_samples)
    resamples = min(5, args.resamples) if args.quick else args.resamples
    print(machine_header("benchmarks/sim_promises.py", list(argv or sys.argv[1:]), args.seed))
    started = time.perf_counter()
    truth, truth_se = truth_populations(truth_rows)
    truth_seconds = time.perf_counter() - started
    derived: list[Derived] = []
    failed: list[dict[str, Any]] = []
    for i in range(samples):
        seed = args.seed + 1 + i
        try:
            derived.append(derive_one(seed, truth, resamples if i < boot_samples else 0))
        except (DeriveError, RuntimeError) as exc:
            # Reported below and left out of the figures; not retried with another seed.
            failed.append({"seed": seed, "error": f"{type(exc).__name__}: {exc}"})
    derive_seconds = time.perf_counter() - started - truth_seconds
    groups = sorted(truth, key=lambda k: -SHARES[k])
    results: dict[str, Any] = {
        "seed": args.seed,
        "attempted": samples,
        "samples": len(derived),
        "truth_rows": truth_rows,
        "truth_se_bound": truth_se,
        "failed": failed,
        "errors": [],
        "gaps": [],
    }
    print(
        f"\n{samples} calibration samples of {ROWS:,} rows; truth from {truth_rows:,} fresh rows "
        f"(standard error of a group's true TPR at most {max(truth_se.values()):.4f})"
    )
    print(f"samples that did not derive: {len(failed)} of {samples}")
    for f in failed:
        print(f"- generate({ROWS}, seed={f['seed']}): {f['error']}")
    samples = len(derived)
    for name in RATES:
        print(f"\n## Promised minus true {name}, over {samples} calibration samples\n")
        print(
            "| group | share | outside the promise | in sample: mean [95%] | median | "
            "10th to 90th pct | sd | cross-fitted: mean [95%] | median | 10th to 90th pct | sd | "
            "binomial sd of the promise |"
        )
        print("|---|---|---|---|---|---|---|---|---|---|---|---|")
        for key in groups:
            ins = summary([d.in_sample[key][name] - d.true[key][name] for d in derived])
            out = summary([d.cross_fitted[key][name] - d.true[key][name] for d in derived])
            outside = sum(key in d.outside for d in derived)
            # Root mean square over the samples of the sd the two-sample test assumes.
            assumed = float(np.sqrt(np.mean([d.binomial_sd[key][name] ** 2 for d in derived])))
            results["errors"].append(
                {
                    "rate": name,
                    "group": key,
                    "in_sample": ins,
                    "cross_fitted": out,
                    "binomial_sd": assumed,
                }
            )
            print(
                f"| {cell_text(key)} | {SHARES[key]:.1%} | {outside}/{samples} | "
                + " | ".join(fmt(ins) + fmt(out))
                + f" | {assumed:.4f} |"
            )
    print(f"\n## True TPR gaps of the derived policies out of sample ({samples} samples)\n")
    print(
        "| gap | groups | mean | median | 10th to 90th pct | largest | share above the "
        f"tolerance {TOLERANCE:g} |"
    )
    print("|---|---|---|---|---|---|---|")
    for label, which, kind in (
        ("largest minus smallest TPR, in sample", "covered", "in_sample"),
        ("largest minus smallest TPR, cross-fitted promise", "covered", "cross_fitted"),
        ("largest minus smallest TPR, true", "covered", "true"),
        ("largest distance to the reference's TPR, true", "covered", "true-ref"),
        ("largest minus smallest TPR, true", "all", "true"),
    ):
        values = []
        for d in derived:
            keys = [k for k in groups if which == "all" or k not in d.outside]
            source = d.true if kind.startswith("true") else getattr(d, kind)
            tprs = {k: source[k]["tpr"] for k in keys}
            if kind == "true-ref":
                values.append(max(abs(v - tprs[d.reference]) for v in tprs.values()))
            else:
                values.append(max(tprs.values()) - min(tprs.values()))
        s = summary(values)
        above = int(sum(v > TOLERANCE + ABOVE for v in values))
        results["gaps"].append({"gap": label, "groups": which, **s, "above": above})
        groups_text = "inside the promise" if which == "covered" else "all nine"
        print(
            f"| {label} | {groups_text} | {s['mean']:.4f} | {s['median']:.4f} | "
            f"{s['p10']:.4f} to {s['p90']:.4f} | {max(values):.4f} | {above}/{samples} |"
        )
    booted = [d for d in derived if d.spreads is not None]
    if booted:
        results["standard_errors"] = standard_error_table(derived, booted, groups, resamples)
    elapsed = time.perf_counter() - started
    results["seconds"] = {"truth": truth_seconds, "derive": derive_seconds, "total": elapsed}
    print(
        f"\nrun time {elapsed:.1f} s (fresh rows {truth_seconds:.1f} s, deriving and "
        f"evaluating {derive_seconds:.1f} s)"
    )
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""The invented scenario the error-rate simulations share: the demo's nine groups, their shares,
prevalences and rates, and how a month's (or a calibration sample's) counts are drawn.

Not a benchmark itself (``run_all.py`` runs ``bench_*.py`` only). The figures come from the
Fernhollow demo: group shares are the generator's community shares times its language shares
(``service/demo/fernhollow.py``); prevalences and false positive rates are those of
``policies/fernhollow-follow-up.json`` as it stood at d2246e4, before it was re-derived with
cross-fitted promises (equal opportunity, rounded to three digits); the true positive rate is
the one that policy equalises (0.579) for every group. Outcome
coverage is 88% (the demo loses about 12% to follow-up), missing completely at random.

A month's counts for group ``g`` with true rates ``(tpr, fpr)``:
``n_g ~ Multinomial(volume, shares)``, ``observed ~ Bin(n_g, coverage)``,
``positives ~ Bin(observed, prevalence_g)``, ``tp ~ Bin(positives, tpr)``,
``fp ~ Bin(observed - positives, fpr)``, and actions = ``tp + fp`` plus
``Bin(n_g - observed, action rate)`` among the rows without an outcome.
"""

from __future__ import annotations

import math
import os
import platform
import subprocess
import sys
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from service.audit.realized import CellCounts  # noqa: E402
from service.demo.fernhollow import _COMMUNITY_SHARE, _LANGUAGE_SHARE, COMMUNITIES, LANGUAGES  # noqa: E402
from service.policy.document import PolicyDocument  # noqa: E402
from service.stats.proportions import wilson_interval  # noqa: E402

DEFAULT_SEED = 20261205
TOLERANCE = 0.05
COVERAGE = 0.88
CALIBRATION_ROWS = 20_000
COMMON_TPR = 0.579

GROUPS: tuple[str, ...] = tuple(f"{c}|{lang}" for c in COMMUNITIES for lang in LANGUAGES)
SHARES: dict[str, float] = {
    f"{c}|{lang}": float(_COMMUNITY_SHARE[i]) * _LANGUAGE_SHARE[c][j]
    for i, c in enumerate(COMMUNITIES)
    for j, lang in enumerate(LANGUAGES)
}
PREVALENCE: dict[str, float] = {
    "quarry-hill|en": 0.117,
    "quarry-hill|es": 0.111,
    "quarry-hill|other": 0.110,
    "millbrook|en": 0.173,
    "millbrook|es": 0.187,
    "millbrook|other": 0.167,
    "saltmarsh|en": 0.241,
    "saltmarsh|es": 0.259,
    "saltmarsh|other": 0.263,
}
FPR: dict[str, float] = {
    "quarry-hill|en": 0.250,
    "quarry-hill|es": 0.180,
    "quarry-hill|other": 0.223,
    "millbrook|en": 0.245,
    "millbrook|es": 0.249,
    "millbrook|other": 0.253,
    "saltmarsh|en": 0.329,
    "saltmarsh|es": 0.329,
    "saltmarsh|other": 0.308,
}
REFERENCE = "quarry-hill|en"
"""The largest calibration group: the audit's default reference (``resolve_settings``)."""
SMALLEST, MID, LARGEST = "quarry-hill|other", "millbrook|es", "millbrook|en"
"""The smallest group (2.5% of decisions), a mid-size one (9.6%) and the largest one that is
not the reference (19.2%)."""
NON_REFERENCE: tuple[str, ...] = tuple(g for g in GROUPS if g != REFERENCE)


@dataclass(frozen=True, slots=True)
class Truth:
    """A group's true rates in a month (or in the calibration population)."""

    tpr: float
    fpr: float

    def action_rate(self, prevalence: float) -> float:
        return prevalence * self.tpr + (1.0 - prevalence) * self.fpr


def promised() -> dict[str, Truth]:
    """The rates the policy promises (and, in control, delivers): TPR 0.579 for everyone."""
    return {g: Truth(COMMON_TPR, FPR[g]) for g in GROUPS}


def shifted(base: Mapping[str, Truth], by: float, fpr_too: bool) -> dict[str, Truth]:
    """Every non-reference group's TPR (and FPR, with ``fpr_too``) moved by ``+by`` and
    ``-by`` in turn (groups in ``NON_REFERENCE`` order), the reference left as it is."""
    out = dict(base)
    for i, g in enumerate(NON_REFERENCE):
        d = by if i % 2 == 0 else -by
        t = base[g]
        out[g] = Truth(t.tpr + d, t.fpr + d if fpr_too else t.fpr)
    return out


def draw_cells(
    rng: np.random.Generator,
    volume: int,
    truth: Mapping[str, Truth],
    coverage: float = COVERAGE,
    sizes: Mapping[str, int] | None = None,
    only: tuple[str, ...] = GROUPS,
) -> dict[str, CellCounts]:
    """One month's counts (see the module docstring); ``sizes`` fixes a group's case count,
    ``only`` keeps some groups."""
    counts = rng.multinomial(volume, [SHARES[g] for g in GROUPS])
    cells: dict[str, CellCounts] = {}
    for g, n_drawn in zip(GROUPS, counts, strict=True):
        n = int(sizes[g]) if sizes is not None and g in sizes else int(n_drawn)
        if n == 0 or g not in only:
            continue
        t = truth[g]
        observed = int(rng.binomial(n, coverage))
        positives = int(rng.binomial(observed, PREVALENCE[g]))
        tp = int(rng.binomial(positives, t.tpr))
        fp = int(rng.binomial(observed - positives, t.fpr))
        hidden = int(rng.binomial(n - observed, t.action_rate(PREVALENCE[g])))
        cells[g] = CellCounts(
            n=n, actions=tp + fp + hidden, observed=observed, positives=positives, tp=tp, fp=fp
        )
    return cells


def draw_calibration(
    rng: np.random.Generator, rows: int, truth: Mapping[str, Truth]
) -> dict[str, dict[str, int]]:
    """Out-of-sample calibration counts (every outcome known) of ``rows`` rows per group."""
    counts = rng.multinomial(rows, [SHARES[g] for g in GROUPS])
    out: dict[str, dict[str, int]] = {}
    for g, n in zip(GROUPS, counts, strict=True):
        positives = int(rng.binomial(n, PREVALENCE[g]))
        tp = int(rng.binomial(positives, truth[g].tpr))
        fp = int(rng.binomial(n - positives, truth[g].fpr))
        out[g] = {"n": int(n), "positives": positives, "tp": tp, "fp": fp}
    return out


def document(
    calibration: Mapping[str, Mapping[str, int]] | None = None,
    multiplicity: str = "holm",
    level: float = 0.05,
) -> PolicyDocument:
    """An equal-opportunity policy over the nine groups, tolerance 0.05.

    Without ``calibration`` the targets are exact numbers (the promised rates); with it each
    group's targets are the calibration counts' ratios and carry them as ``out_of_sample``.
    The rules are irrelevant to the verdicts (they work on counts) and are plain cuts.
    """
    groups: dict[str, dict[str, Any]] = {}
    for g, t in promised().items():
        if calibration is None:
            n = round(SHARES[g] * CALIBRATION_ROWS)
            groups[g] = {
                "n": n,
                "prevalence": PREVALENCE[g],
                "action_rate": t.action_rate(PREVALENCE[g]),
                "tpr": t.tpr,
                "fpr": t.fpr,
            }
            continue
        c = calibration[g]
        negatives = c["n"] - c["positives"]
        groups[g] = {
            "n": c["n"],
            "prevalence": c["positives"] / c["n"],
            "action_rate": (c["tp"] + c["fp"]) / c["n"],
            "tpr": c["tp"] / c["positives"] if c["positives"] else 0.0,
            "fpr": c["fp"] / negatives if negatives else 0.0,
            "out_of_sample": dict(c),
        }
    cut = {"steps": [{"from": 0.2, "probability": 1.0}]}
    return PolicyDocument.model_validate(
        {
            "name": "sim-follow-up",
            "score_meaning": "P(readmission within 30 days)",
            "action_label": "offer nurse follow-up",
            "no_action_label": "standard discharge",
            "favourable": "action",
            "costs": {"false_positive": 1, "false_negative": 4},
            "groups": {
                "attributes": ["community", "language"],
                "known": list(GROUPS),
                "fallback": {"use_parent": True},
            },
            "rules": {c: cut for c in COMMUNITIES},
            "targets": {"criterion": "equal-opportunity", "tolerance": TOLERANCE, "groups": groups},
            "audit": {"level": level, "multiplicity": multiplicity},
        }
    )


def cell_text(group: str) -> str:
    """A group key for a markdown table cell (its ``|`` escaped)."""
    return group.replace("|", "\\|")


def wilson(k: int, n: int) -> str:
    """``share [low, high]`` with the Wilson 95% interval, as text."""
    if n == 0:
        return "-"
    low, high = wilson_interval(k, n)
    return f"{k / n:.4f} [{low:.4f}, {high:.4f}]"


def quantiles(values: list[float], cap: float) -> str:
    """Median and quartiles as ``median (q1 to q3)``; values above ``cap`` are censored (no
    event within ``cap``), and a quantile among them prints as ``>cap``."""
    if not values:
        return "-"
    arr = np.sort(np.asarray(values, dtype=float))

    def q(p: float) -> str:
        # The order statistic at ceil(p n): well defined with censored values on top.
        v = arr[max(0, math.ceil(p * len(arr)) - 1)]
        return f">{cap:g}" if v > cap else f"{v:g}"

    return f"{q(0.5)} ({q(0.25)} to {q(0.75)})"


def machine_header(script: str, argv: list[str], seed: int) -> str:
    """What ran, where and when: printed first by every simulation script."""
    try:
        commit = subprocess.run(
            ["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=False,
        ).stdout.strip()
    except OSError:
        commit = "?"
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    return (
        f"# {script} {' '.join(argv)}\n"
        f"# date {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}, tree {commit}, "
        f"seed {seed}\n"
        f"# {os.cpu_count()} cores ({cpu}), load average {load:.2f}, Python "
        f"{platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}"
    )

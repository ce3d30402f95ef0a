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
import numpy.typing as npt
import scipy
from scipy.optimize import brentq

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from service.audit.realized import BINS, CellCounts, ScoreSums  # noqa: E402
from service.demo.fernhollow import (  # noqa: E402
    _COMMUNITY_SHARE,
    _LANGUAGE_SHARE,
    _SCORE_NOISE_SD,
    COMMUNITIES,
    LANGUAGES,
)
from service.policy.document import PolicyDocument  # noqa: E402
from service.stats.calibration import PowerSums  # noqa: E402
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


# The score model of the simulations with scores. The demo generator's score for community c is
# sigmoid(b_c + k_c (L - b_c + N(0, s_c^2))) with L - b_c ~ N(0, 1) and k_c = 1 / (1 + s_c^2), so
# its logit is normal with sd 1 / sqrt(1 + s_c^2) (0.94, 0.91 and 0.67). Each group keeps its
# community's spread, with the location that makes its mean score the group's prevalence above.
SCORE_DIGITS = 4
"""Scores are rounded to four digits, as the demo generator rounds them."""
_NODES, _WEIGHTS = np.polynomial.hermite_e.hermegauss(80)


def _mean_score(location: float, sd: float) -> float:
    """E[sigmoid(location + sd Z)], Z standard normal (Gauss-Hermite quadrature)."""
    values = 1.0 / (1.0 + np.exp(-(location + sd * _NODES)))
    return float(np.sum(_WEIGHTS * values) / np.sum(_WEIGHTS))


SCORE_SD: dict[str, float] = {
    g: float(1.0 / math.sqrt(1.0 + _SCORE_NOISE_SD[COMMUNITIES.index(g.split("|")[0])] ** 2))
    for g in GROUPS
}
SCORE_LOCATION: dict[str, float] = {
    g: float(brentq(lambda m, g=g: _mean_score(m, SCORE_SD[g]) - PREVALENCE[g], -10.0, 10.0))
    for g in GROUPS
}
FloatArray = npt.NDArray[np.float64]


def draw_scores(rng: np.random.Generator, group: str, n: int, factor: float = 1.0) -> FloatArray:
    """``n`` scores of ``group``: sigmoid of a normal logit (above), rounded to four digits;
    with ``factor`` every score is multiplied by it, rounded again and clipped at 1."""
    logits = SCORE_LOCATION[group] + SCORE_SD[group] * rng.standard_normal(n)
    scores: FloatArray = np.round(1.0 / (1.0 + np.exp(-logits)), SCORE_DIGITS)
    if factor != 1.0:
        scores = np.minimum(np.round(scores * factor, SCORE_DIGITS), 1.0)
    return scores


def draw_outcomes(
    rng: np.random.Generator, scores: FloatArray, odds: float = 1.0
) -> npt.NDArray[np.int8]:
    """Outcomes with the scores' odds times ``odds``: Bernoulli(``odds s / (1 - s + odds s)``);
    ``odds`` 1 is a calibrated score."""
    q = scores if odds == 1.0 else odds * scores / (1.0 - scores + odds * scores)
    return (rng.random(scores.size) < q).astype(np.int8)


def score_sums(scores: FloatArray, outcomes: npt.NDArray[np.int8]) -> ScoreSums:
    """The sums the audit's query gives for these cases (``service/audit/score_sums.py``): power
    sums, sum ln(1 + s), sum ln(1 - s / 2), and per ten-wide bin (``floor(10 s)``, a score of 1
    in the top bin) the cases, positives and score sum. Scores outside [0, 1] count nowhere."""
    keep = (scores >= 0.0) & (scores <= 1.0)
    s, y = scores[keep], outcomes[keep]
    bins = np.where(s >= 1.0, BINS - 1, np.floor(s * BINS)).astype(np.int64)
    return ScoreSums(
        power=PowerSums.from_rows(s, y),
        log_double=float(np.sum(np.log1p(s))),
        log_half=float(np.sum(np.log1p(-0.5 * s))),
        bin_counts=[int(v) for v in np.bincount(bins, minlength=BINS)],
        bin_positives=[int(v) for v in np.bincount(bins, weights=y, minlength=BINS)],
        bin_score_sums=[float(v) for v in np.bincount(bins, weights=s, minlength=BINS)],
    )


def draw_scored_month(
    rng: np.random.Generator,
    volume: int,
    truth: Mapping[str, Truth],
    odds: Mapping[str, float] | None = None,
    sizes: Mapping[str, int] | None = None,
    only: tuple[str, ...] = GROUPS,
) -> tuple[dict[str, CellCounts], dict[str, ScoreSums]]:
    """One month's counts with the score sums of each group's cases with an outcome.

    As :func:`draw_cells`, except that each case with an outcome draws a score
    (:func:`draw_scores`) and its outcome from it (:func:`draw_outcomes`, with the group's
    ``odds``, 1 unless given), so the group's positives are the month's outcomes of its scores
    (with calibrated scores the positives are ``Bin(observed, prevalence)`` as in
    :func:`draw_cells`). Actions follow the true TPR and FPR given the outcome; the cases
    without an outcome are acted on at the in-control action rate.
    """
    counts = rng.multinomial(volume, [SHARES[g] for g in GROUPS])
    cells: dict[str, CellCounts] = {}
    sums: dict[str, ScoreSums] = {}
    for g, n_drawn in zip(GROUPS, counts, strict=True):
        n = int(sizes[g]) if sizes is not None and g in sizes else int(n_drawn)
        if n == 0 or g not in only:
            continue
        t = truth[g]
        observed = int(rng.binomial(n, COVERAGE))
        scores = draw_scores(rng, g, observed)
        outcomes = draw_outcomes(rng, scores, 1.0 if odds is None else odds.get(g, 1.0))
        positives = int(outcomes.sum())
        tp = int(rng.binomial(positives, t.tpr))
        fp = int(rng.binomial(observed - positives, t.fpr))
        hidden = int(rng.binomial(n - observed, t.action_rate(PREVALENCE[g])))
        cells[g] = CellCounts(
            n=n, actions=tp + fp + hidden, observed=observed, positives=positives, tp=tp, fp=fp
        )
        if observed:
            sums[g] = score_sums(scores, outcomes)
    return cells, sums


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

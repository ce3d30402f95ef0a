"""Synthetic discharges for Fernhollow Community Health, a fictional regional health system.

After a hospital discharge, patients at high predicted risk of readmission within 30 days are
offered a nurse follow-up visit. The generator gives the three communities different
readmission prevalences and makes the risk score noisier for ``saltmarsh``, so that a single
cut treats the groups differently and the parity trade-offs are visible. Everything is drawn
from one ``numpy.random.Generator`` seeded with ``seed``: the same seed gives the same rows.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import numpy.typing as npt

DEFAULT_SEED = 20261201
COMMUNITIES = ("quarry-hill", "millbrook", "saltmarsh")
LANGUAGES = ("en", "es", "other")

_COMMUNITY_SHARE = np.array([0.5, 0.32, 0.18])
# Baseline log-odds of readmission per community: prevalences of roughly 12%, 18% and 26%.
_COMMUNITY_LOGIT = np.array([-2.35, -1.85, -1.35])
# Noise added to the model's view of the risk: the score is least informative for saltmarsh.
_SCORE_NOISE_SD = np.array([0.35, 0.45, 1.1])
_LANGUAGE_SHARE = {
    "quarry-hill": [0.85, 0.1, 0.05],
    "millbrook": [0.6, 0.3, 0.1],
    "saltmarsh": [0.55, 0.3, 0.15],
}


@dataclass(frozen=True)
class Discharges:
    case_id: list[str]
    community: list[str]
    language: list[str]
    score: npt.NDArray[np.float64]
    outcome: npt.NDArray[np.int8]
    discharged_at: list[datetime]

    def __len__(self) -> int:
        return len(self.case_id)


def _sigmoid(x: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    out: npt.NDArray[np.float64] = 1.0 / (1.0 + np.exp(-x))
    return out


def generate(
    n: int,
    seed: int = DEFAULT_SEED,
    month_start: datetime = datetime(2026, 10, 1, tzinfo=UTC),
    id_prefix: str = "FCH",
) -> Discharges:
    """``n`` discharges spread uniformly over the 30 days from ``month_start``."""
    if n < 0:
        raise ValueError("n must be >= 0")
    rng = np.random.default_rng(seed)
    community_idx = rng.choice(len(COMMUNITIES), size=n, p=_COMMUNITY_SHARE)
    language_idx = np.empty(n, dtype=np.intp)
    for c, name in enumerate(COMMUNITIES):
        rows = np.flatnonzero(community_idx == c)
        language_idx[rows] = rng.choice(len(LANGUAGES), size=len(rows), p=_LANGUAGE_SHARE[name])
    # Individual risk: community baseline plus a patient-level spread.
    true_logit = _COMMUNITY_LOGIT[community_idx] + rng.normal(0.0, 1.0, size=n)
    outcome = (rng.random(n) < _sigmoid(true_logit)).astype(np.int8)
    # The model sees the risk through noise; shrinking keeps the noisy score roughly calibrated.
    noise_sd = _SCORE_NOISE_SD[community_idx]
    shrink = 1.0 / (1.0 + noise_sd**2)
    base = _COMMUNITY_LOGIT[community_idx]
    seen_logit = base + shrink * (true_logit - base + rng.normal(0.0, noise_sd))
    score = np.round(_sigmoid(seen_logit), 4)
    offsets = np.sort(rng.random(n)) * 30 * 24 * 3600
    return Discharges(
        case_id=[f"{id_prefix}-{i + 1:07d}" for i in range(n)],
        community=[COMMUNITIES[c] for c in community_idx],
        language=[LANGUAGES[i] for i in language_idx],
        score=score,
        outcome=outcome,
        discharged_at=[month_start + timedelta(seconds=float(s)) for s in offsets],
    )


def write_csv(discharges: Discharges, path: Path) -> None:
    """One row per discharge: case_id, community, language, score, readmitted, discharged_at."""
    with path.open("w", newline="", encoding="utf-8") as f:
        writer = csv.writer(f)
        writer.writerow(
            ["case_id", "community", "language", "score", "readmitted", "discharged_at"]
        )
        for i in range(len(discharges)):
            writer.writerow(
                [
                    discharges.case_id[i],
                    discharges.community[i],
                    discharges.language[i],
                    f"{discharges.score[i]:.4f}",
                    int(discharges.outcome[i]),
                    discharges.discharged_at[i].isoformat(),
                ]
            )

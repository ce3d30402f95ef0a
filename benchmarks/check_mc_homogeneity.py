"""Size of the daily drift test itself: ``homogeneity_mc_test`` under the proper null.

Both samples come from one distribution (a baseline of 8,567 rows and a day of ``--day`` cases
over the ten bins of one group's calibration table in docs/error-rates.md): the share of days
whose Monte Carlo p-value is at or below ``--alpha`` (with ``max_draws = ceil(2 / alpha)``, as
the daily warnings size it) must be at most ``alpha``. Not a test, no asserts.

Run: ``.venv/bin/python benchmarks/check_mc_homogeneity.py --alpha 1e-4 --days 200000``.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from service.stats.drift import homogeneity_mc_test

BINS = [1412, 1250, 1147, 1018, 887, 751, 648, 608, 492, 354]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--alpha", type=float, default=1e-3)
    parser.add_argument("--days", type=int, default=50_000)
    parser.add_argument("--day", type=int, default=28, help="cases a day")
    parser.add_argument("--seed", type=int, default=20261205)
    args = parser.parse_args()
    shares = np.array(BINS, dtype=np.float64) / sum(BINS)
    rng = np.random.default_rng(args.seed)
    draws = math.ceil(2 / args.alpha)
    hits = 0
    for i in range(args.days):
        base = rng.multinomial(sum(BINS), shares)
        day = rng.multinomial(args.day, shares)
        test = homogeneity_mc_test(list(base), list(day), max_draws=draws, seed=[args.seed, i])
        hits += test.p_value <= args.alpha
    print(
        f"alpha {args.alpha:g}, {args.days:,} days of {args.day} cases: {hits} at or below it "
        f"({hits / args.days:.2e}); the level allows {args.alpha * args.days:.1f}"
    )


if __name__ == "__main__":
    main()

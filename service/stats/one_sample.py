"""One observed rate k / n against a FIXED promised rate p0, band [p0 - margin, p0 + margin].

Exact binomial tests, X ~ Binomial(n, p):

- inside (TOST, Schuirmann 1987, J Pharmacokinet Biopharm 15:657-680, with exact one-sided
  tests): the larger of P(X <= k | p = hi), the p-value of H0: p >= hi vs less, and
  P(X >= k | p = lo), the p-value of H0: p <= lo vs greater;
- outside: min(1, 2 * min(P(X >= k | p = hi), P(X <= k | p = lo))), the one-sided tests of
  H0: p <= hi vs greater and H0: p >= lo vs less with Bonferroni over the two directions;
  ``side`` is the direction of the smaller of the two (ties -> "above").

Here lo = p0 - margin and hi = p0 + margin. An edge at or beyond 0 or 1 leaves no outside
region on its side (a rate cannot exceed 1 or fall below 0): the outside test on that side
has p-value 1, and the inside test on that side has p-value 0, since its null hypothesis
("the rate lies beyond this edge") is impossible. So the band [0.9, 1] is shown to hold by
the lower test alone, and a band covering all of [0, 1] always holds.
"""

from __future__ import annotations

import math
import operator

from service.stats.distributions import binom_cdf, binom_sf
from service.stats.margins import MarginEvidence, Side


def rate_evidence(k: int, n: int, center: float, margin: float) -> MarginEvidence:
    """Evidence that the rate behind ``k`` successes in ``n`` trials lies inside, or outside,
    the band [center - margin, center + margin]."""
    k = _integer("k", k)
    n = _integer("n", n)
    if not (0 <= k <= n and n >= 1):
        raise ValueError(f"need 0 <= k <= n and n >= 1, got {k} of {n}")
    if not 0.0 <= center <= 1.0:
        raise ValueError(f"need 0 <= center <= 1, got {center}")
    if not (margin > 0.0 and math.isfinite(margin)):
        raise ValueError(f"need a finite margin > 0, got {margin}")
    low, high = center - margin, center + margin

    if high >= 1.0:
        inside_high, above = 0.0, 1.0
    else:
        inside_high = float(binom_cdf(k, n, high))  # H0: p >= high, vs less
        above = float(binom_sf(k - 1, n, high))  # H0: p <= high, vs greater
    if low <= 0.0:
        inside_low, below = 0.0, 1.0
    else:
        inside_low = float(binom_sf(k - 1, n, low))  # H0: p <= low, vs greater
        below = float(binom_cdf(k, n, low))  # H0: p >= low, vs less

    side: Side = "above" if above <= below else "below"
    return MarginEvidence(
        p_inside=min(1.0, max(inside_low, inside_high)),
        p_outside=min(1.0, 2.0 * min(above, below)),
        side=side,
        estimate=k / n,
    )


def _integer(name: str, value: int) -> int:
    if isinstance(value, bool):
        raise ValueError(f"{name} must be an integer count, got {value!r}")
    try:
        return operator.index(value)
    except TypeError:
        raise ValueError(f"{name} must be an integer count, got {value!r}") from None

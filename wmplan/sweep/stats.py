"""Binomial rate intervals for sweep summaries and stress tests.

Wilson score interval (Wilson, JASA 22 (1927) 209-212)::

    centre = (p + z^2 / 2n) / (1 + z^2 / n)
    half   = z * sqrt(p (1 - p) / n + z^2 / 4n^2) / (1 + z^2 / n),    z = Phi^-1(1 - alpha / 2)

It keeps its coverage near the nominal level for small counts and rates near 0, where the textbook normal
(Wald) interval collapses to a point (Brown, Cai, DasGupta 2001).
"""

from __future__ import annotations

from statistics import NormalDist


def wilson_interval(successes: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion (the evaluation's implementation, with plain floats).

    Args:
        successes: number of events k (0 <= k <= n).
        trials: number of trials n; with n = 0 nothing is known and the interval is (0, 1).
        confidence: two-sided confidence level in (0, 1).

    Returns:
        (lower, upper), both within [0, 1].
    """
    k, n = int(successes), int(trials)
    if n < 0 or not 0 <= k <= max(n, 0):
        raise ValueError(f"need 0 <= successes <= trials, got successes={successes!r}, trials={trials!r}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie in (0, 1), got {confidence!r}")
    if n == 0:
        return 0.0, 1.0
    # Imported here: it brings scipy.stats (half a second), which sweep worker processes never need.
    from wmplan.evaluate.stats import wilson_interval as _wilson

    lo, hi = _wilson(k, n, z=NormalDist().inv_cdf(0.5 + confidence / 2.0))
    return (0.0 if k == 0 else max(0.0, float(lo))), (1.0 if k == n else min(1.0, float(hi)))

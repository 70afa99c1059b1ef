"""The counter-based random draws of :mod:`wmplan.rng`, compiled, one number at a time (for the engine's kernel).

Same hash (the splitmix64 finaliser, Steele, Lea, Flood, OOPSLA 2014), same combination of counters and same
streams as :func:`wmplan.rng.combine` / :func:`wmplan.rng.uniform`: a uniform variate drawn here equals the one
numpy draws bit for bit (tests/sim/test_rng.py). Truncated normals use the same inverse-transform method as
:func:`wmplan.rng.truncated_normal`, with the normal CDF from ``erfc`` and its inverse by Wichura's algorithm AS 241
(Applied Statistics 37, 1988), where numpy code uses scipy's ``ndtr`` / ``ndtri``: the two agree to about 1e-15
(both are accurate to a few units in the last place), which is the only difference between a scene stepped here
and one drawn by numpy code.

All counters are uint64 (negative integers wrap as two's complement, as ``astype(np.uint64)`` does).
"""

from __future__ import annotations

import math

import numpy as np

from wmplan.sim._jit import jit

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_H0 = np.uint64(0x243F6A8885A308D3)
_S30, _S27, _S31, _S11 = np.uint64(30), np.uint64(27), np.uint64(31), np.uint64(11)
_INV53 = 1.0 / float(1 << 53)
_SQRT2 = math.sqrt(2.0)


@jit
def mix64(z):
    """splitmix64 finaliser of one uint64 (wrapping arithmetic)."""
    z = z + _GOLDEN
    z = (z ^ (z >> _S30)) * _M1
    z = (z ^ (z >> _S27)) * _M2
    return z ^ (z >> _S31)


@jit
def fold(h, part):
    """One step of :func:`wmplan.rng.combine`: ``mix64(h ^ part)``."""
    return mix64(h ^ np.uint64(part))


@jit
def combine2(a, b):
    """The counter hash of two 64-bit integers (``fold`` from the fixed start value)."""
    return fold(fold(_H0, a), b)


@jit
def combine3(a, b, c):
    """The counter hash of three 64-bit integers, ``combine2`` folded once more."""
    return fold(combine2(a, b), c)


@jit
def combine4(a, b, c, d):
    """The counter hash of four 64-bit integers, ``combine3`` folded once more."""
    return fold(combine3(a, b, c), d)


@jit
def combine5(a, b, c, d, e):
    """The counter hash of five 64-bit integers, ``combine4`` folded once more."""
    return fold(combine4(a, b, c, d), e)


@jit
def to_unit(h):
    """A hash as a uniform variate in [0, 1) (53 bits)."""
    return float(h >> _S11) * _INV53


@jit
def std_normal_cdf(z):
    """Phi(z) = erfc(-z / sqrt 2) / 2."""
    return 0.5 * math.erfc(-z / _SQRT2)


@jit
def std_normal_quantile(p):
    """Phi^-1(p) for 0 < p < 1 by Wichura's AS 241 (PPND16), accurate to about 1e-16."""
    q = p - 0.5
    if abs(q) <= 0.425:
        r = 0.180625 - q * q
        num = (
            (
                (
                    (
                        (
                            ((2.5090809287301226727e3 * r + 3.3430575583588128105e4) * r + 6.7265770927008700853e4) * r
                            + 4.5921953931549871457e4
                        )
                        * r
                        + 1.3731693765509461125e4
                    )
                    * r
                    + 1.9715909503065514427e3
                )
                * r
                + 1.3314166789178437745e2
            )
            * r
            + 3.3871328727963666080e0
        ) * q
        den = (
            (
                (
                    (
                        ((5.2264952788528545610e3 * r + 2.8729085735721942674e4) * r + 3.9307895800092710610e4) * r
                        + 2.1213794301586595867e4
                    )
                    * r
                    + 5.3941960214247511077e3
                )
                * r
                + 6.8718700749205790830e2
            )
            * r
            + 4.2313330701600911252e1
        ) * r + 1.0
        return num / den
    r = p if q <= 0.0 else 1.0 - p
    r = math.sqrt(-math.log(r))
    if r <= 5.0:
        r = r - 1.6
        num = (
            (
                (
                    (
                        ((7.7454501427834140764e-4 * r + 2.2723844989269184583e-2) * r + 2.4178072517745061177e-1) * r
                        + 1.2704582524523683826e0
                    )
                    * r
                    + 3.6478483247632046050e0
                )
                * r
                + 5.7694972214606914055e0
            )
            * r
            + 4.6303378461565452959e0
        ) * r + 1.4234371107496835773e0
        den = (
            (
                (
                    (
                        ((1.0507500716444168432e-9 * r + 5.4759380849953449460e-4) * r + 1.5198666563616457197e-2) * r
                        + 1.4810397642748007459e-1
                    )
                    * r
                    + 6.8976733498510000455e-1
                )
                * r
                + 1.6763848301838038494e0
            )
            * r
            + 2.0531916266377588219e0
        ) * r + 1.0
    else:
        r = r - 5.0
        num = (
            (
                (
                    (
                        ((2.0103343992922881327e-7 * r + 2.7115555687434875782e-5) * r + 1.2426609473880784386e-3) * r
                        + 2.6532189526576123093e-2
                    )
                    * r
                    + 2.9656057182850489123e-1
                )
                * r
                + 1.7848265399172913358e0
            )
            * r
            + 5.4637849111641143699e0
        ) * r + 6.6579046435011037772e0
        den = (
            (
                (
                    (
                        ((2.0442631033899397856e-15 * r + 1.4215117583164458887e-7) * r + 1.8463183175100546818e-5) * r
                        + 7.8686913114561325910e-4
                    )
                    * r
                    + 1.4875361290850614853e-2
                )
                * r
                + 1.3692988092273580531e-1
            )
            * r
            + 5.9983220655588793769e-1
        ) * r + 1.0
    x = num / den
    return -x if q < 0.0 else x


@jit
def clip(v, lo, hi):
    """min(max(v, lo), hi), as numpy's clip."""
    return min(max(v, lo), hi)


@jit
def truncated_normal(mean, std, low, high, u):
    """Normal(mean, std) truncated to [low, high] from one uniform u, as :func:`wmplan.rng.truncated_normal`."""
    if not std > 0.0:
        return clip(mean, low, high)
    a = std_normal_cdf((low - mean) / std)
    b = std_normal_cdf((high - mean) / std)
    p = clip(a + u * (b - a), 1e-300, 1.0 - 1e-16)
    return clip(mean + std * std_normal_quantile(p), low, high)

"""Small probabilities of failure: plain Monte Carlo, and adaptive importance sampling by the cross-entropy method.

We want p = P_f(S(X) >= gamma), X drawn from a nominal density f, for a score S that is rarely that high.

Plain Monte Carlo draws N samples from f and counts; its interval is Wilson's (``wmplan.intervals``). To see a
few failures at p = 1e-4 it needs tens of thousands of samples.

Importance sampling draws from a proposal g instead and weights each sample by W = f(X) / g(X)::

    p_IS = (1/N) sum_i H_i W_i                    H_i = 1{S(X_i) >= gamma}; unbiased for any g > 0 where f H > 0
    se   = sd_i(H_i W_i) / sqrt(N)                95% interval p_IS +- 1.96 se (normal approximation, clipped at 0)
    ESS  = (sum_i H_i W_i)^2 / sum_i (H_i W_i)^2  (Kish): how many equally weighted failures the estimate is worth;
                                                  near 1 means one sample dominates

A sample may also carry a fraction H_i in [0, 1] instead of an indicator: the failure rate among several
episodes run for it (conditional Monte Carlo over the traffic seeds; E[H | X] = P(failure | X), so the estimate
stays unbiased, and the samples X_i stay independent, so the standard error above stays valid).

The proposal comes from the multilevel cross-entropy method (Rubinstein & Kroese, *The Cross-Entropy Method*, 2004;
De Boer et al., "A tutorial on the cross-entropy method", 2005). Within a parametric family f(.; v), start at the
nominal parameters u and repeat: draw n samples from f(.; v), set the level gamma_t to the (1 - rho) sample quantile
of S (at most gamma), and refit v to the samples with S >= gamma_t, weighted by W = f(X; u) / f(X; v)::

    v <- argmax_v  sum_i 1{S(X_i) >= gamma_t} W_i log f(X_i; v)      (times H_i once gamma_t = gamma)

(weighted maximum likelihood: a weighted mean, and for Gaussians a weighted variance). Stop once gamma_t reaches
gamma; the last fit is the proposal of a final, separate importance-sampling stage (only that stage enters the
estimate, so it stays unbiased).

Families: independent Gaussians (mean and standard deviation per coordinate) and independent exponentials (mean
per coordinate). A Gaussian proposal narrower than the nominal inflates the weights' second moment by
E_f[f/g] = s / sqrt(2 - 1/s^2) per coordinate (s = proposal std / nominal std; infinite for s <= 1/sqrt(2)):
1.59 at s = 0.75, so 10x over five coordinates. The standard deviations of a fit are therefore floored
(``std_floor``, in units of the nominal's) at 1 by default: the cross-entropy method moves the proposal's mean, and
may widen it, but does not narrow it.

How much importance sampling over X can gain when each sample's value is a failure rate h(X) measured from m
episodes (conditional Monte Carlo): the variance per episode is m Var_g(v W) with v = k / m, k ~ Binomial(m, h(X)),
and its binomial part alone is E_f[h (1 - h) f / g] >= (E_f[sqrt(h)])^2 (1 - max h), reached by g proportional to
f sqrt(h) (Cauchy-Schwarz). Plain Monte Carlo's is p (1 - p). So the gain is bounded by about
p / (E_f[sqrt(h)])^2 unless h comes close to 1 somewhere: if failures stay rare for every X (they hinge on the
traffic seed more than on X), importance sampling over X cannot beat plain Monte Carlo by much, whatever the
proposal. Worked numbers (numerical integration, h = min(1, p0 exp(beta x)), x standard normal, m = 4, best
Gaussian proposal N(mu, 1)): p0 = 1e-3, beta = 1 -> p = 1.7e-3, gain 1.3; beta = 2 -> p = 7.1e-3, gain 2.5;
p0 = 1e-4, beta = 3 -> p = 5.8e-3, gain 5.7. A tenfold gain needs X that make failure likely, not merely likelier.

Defensive mixture (Hesterberg, "Weighted average importance sampling and defensive mixture distributions",
Technometrics 1995, from memory): the final stage may draw from alpha f + (1 - alpha) g instead of g. Then every
weight is at most 1 / alpha, and the estimator's variance is at most about 1 / alpha times plain Monte Carlo's, even
when the cross-entropy levels went astray (a noisy score, failures that barely depend on the sampled variables).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from statistics import NormalDist

import numpy as np

from wmplan.intervals import wilson_interval

ScoreFn = Callable[[np.ndarray], "np.ndarray | tuple[np.ndarray, np.ndarray]"]
"""``score(x (N, D)) -> scores (N,)``, failure meaning score >= gamma; or ``-> (scores, values)`` where ``values``
(N,) in [0, 1] is what each sample contributes to the estimate (zero below gamma), e.g. the fraction of failed
episodes among several run for one sample. Plain scores mean ``values = 1{score >= gamma}``."""

Z95 = NormalDist().inv_cdf(0.975)


@dataclass(frozen=True)
class GaussianFamily:
    """Independent Gaussians, ``mean`` and ``std`` of shape (D,)."""

    mean: np.ndarray
    std: np.ndarray

    @staticmethod
    def standard(dim: int) -> GaussianFamily:
        """The standard normal in ``dim`` dimensions (the nominal distribution of scenario knobs)."""
        return GaussianFamily(np.zeros(dim), np.ones(dim))

    @property
    def dim(self) -> int:
        """Number of coordinates."""
        return int(np.asarray(self.mean).shape[0])

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """(n, D) samples."""
        return self.mean + self.std * rng.standard_normal((n, self.dim))

    def log_pdf(self, x: np.ndarray) -> np.ndarray:
        """(N,) log density of rows of ``x`` (N, D)."""
        z = (x - self.mean) / self.std
        return np.sum(-0.5 * z * z - np.log(self.std) - 0.5 * math.log(2 * math.pi), axis=-1)

    def fit(self, x: np.ndarray, w: np.ndarray, *, nominal: GaussianFamily, std_floor: float) -> GaussianFamily:
        """Weighted maximum likelihood: weighted mean and variance of rows of ``x`` (N, D), weights ``w`` (N,)."""
        w = w / w.sum()
        mean = w @ x
        var = w @ (x - mean) ** 2
        return GaussianFamily(mean, np.maximum(np.sqrt(var), std_floor * nominal.std))

    def blend(self, other: GaussianFamily, alpha: float) -> GaussianFamily:
        """``alpha * other + (1 - alpha) * self`` in (mean, std): the smoothed update."""
        return GaussianFamily(alpha * other.mean + (1 - alpha) * self.mean, alpha * other.std + (1 - alpha) * self.std)

    def describe(self) -> dict:
        """The distribution as a JSON-ready dict."""
        return {"family": "gaussian", "mean": [float(v) for v in self.mean], "std": [float(v) for v in self.std]}


@dataclass(frozen=True)
class ExponentialFamily:
    """Independent exponentials on [0, inf) with ``mean`` of shape (D,)."""

    mean: np.ndarray

    @property
    def dim(self) -> int:
        """Number of coordinates."""
        return int(np.asarray(self.mean).shape[0])

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` draws, (n, D)."""
        return rng.exponential(self.mean, size=(n, self.dim))

    def log_pdf(self, x: np.ndarray) -> np.ndarray:
        """Log density at ``x`` (N, D) -> (N,)."""
        return np.sum(-x / self.mean - np.log(self.mean), axis=-1)

    def fit(self, x: np.ndarray, w: np.ndarray, *, nominal: ExponentialFamily, std_floor: float) -> ExponentialFamily:
        """Weighted mean (the CE update of an exponential family; ``std_floor`` does not apply)."""
        return ExponentialFamily((w / w.sum()) @ x)

    def blend(self, other: ExponentialFamily, alpha: float) -> ExponentialFamily:
        """The distribution ``alpha * other + (1 - alpha) * self`` (parameters blended: CE smoothing)."""
        return ExponentialFamily(alpha * other.mean + (1 - alpha) * self.mean)

    def describe(self) -> dict:
        """The distribution as a JSON-ready dict."""
        return {"family": "exponential", "mean": [float(v) for v in self.mean]}


@dataclass(frozen=True)
class DefensiveMixture:
    """``alpha * nominal + (1 - alpha) * proposal``: weights against the nominal are at most 1 / alpha."""

    nominal: GaussianFamily | ExponentialFamily
    proposal: GaussianFamily | ExponentialFamily
    alpha: float

    @property
    def dim(self) -> int:
        """Number of coordinates."""
        return self.proposal.dim

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` draws, (n, D)."""
        from_nominal = rng.random(n) < self.alpha
        return np.where(from_nominal[:, None], self.nominal.sample(n, rng), self.proposal.sample(n, rng))

    def log_pdf(self, x: np.ndarray) -> np.ndarray:
        """Log density at ``x`` (N, D) -> (N,)."""
        return np.logaddexp(
            math.log(self.alpha) + self.nominal.log_pdf(x), math.log1p(-self.alpha) + self.proposal.log_pdf(x)
        )

    def describe(self) -> dict:
        """The distribution as a JSON-ready dict."""
        return {"family": "defensive mixture", "alpha": self.alpha, "proposal": self.proposal.describe()}


Family = GaussianFamily | ExponentialFamily


@dataclass(frozen=True)
class PlainMCResult:
    """Plain Monte Carlo: ``failures`` of ``n`` samples, Wilson 95% interval."""

    estimate: float
    ci95: tuple[float, float]
    failures: int
    n: int

    def as_dict(self) -> dict:
        """The result as a JSON-ready dict."""
        return {"estimate": self.estimate, "ci95": list(self.ci95), "failures": self.failures, "n": self.n}


@dataclass(frozen=True)
class CELevel:
    """One level of the multilevel cross-entropy method."""

    gamma: float
    n: int
    elite: int
    proposal: dict


@dataclass(frozen=True)
class ISResult:
    """Importance-sampling estimate from a cross-entropy proposal.

    Attributes:
        estimate: p_IS from the final stage.
        ci95: normal-approximation 95% interval, clipped at 0; (0, inf) if the final stage saw no failure.
        std_error: standard error of the estimate.
        ess: Kish effective sample size of the failing samples' weights (0 if none).
        failures: failing samples in the final stage.
        n_final: samples of the final stage.
        num_evaluations: score evaluations in all (levels and final stage).
        reached: whether a level reached gamma before the final stage.
        levels: the cross-entropy levels.
        proposal: the final stage's proposal.
    """

    estimate: float
    ci95: tuple[float, float]
    std_error: float
    ess: float
    failures: int
    n_final: int
    num_evaluations: int
    reached: bool
    levels: tuple[CELevel, ...] = field(default_factory=tuple)
    proposal: Family | DefensiveMixture | None = None

    @property
    def relative_error(self) -> float:
        """Standard error over the estimate (inf at an estimate of 0)."""
        return self.std_error / self.estimate if self.estimate > 0 else math.inf

    def as_dict(self) -> dict:
        """The result as a JSON-ready dict."""
        hi = self.ci95[1]
        return {
            "estimate": self.estimate,
            "ci95": [self.ci95[0], hi if math.isfinite(hi) else None],
            "std_error": self.std_error,
            "relative_error": self.relative_error if self.estimate > 0 else None,
            "ess": self.ess,
            "failures": self.failures,
            "n_final": self.n_final,
            "num_evaluations": self.num_evaluations,
            "reached": self.reached,
            "levels": [
                {"gamma": lv.gamma, "n": lv.n, "elite": lv.elite, "proposal": lv.proposal} for lv in self.levels
            ],
            "proposal": None if self.proposal is None else self.proposal.describe(),
        }


def evaluate(score: ScoreFn, x: np.ndarray, gamma: float) -> tuple[np.ndarray, np.ndarray]:
    """(scores, values), both (N,), from a score function of either form (see :data:`ScoreFn`)."""
    out = score(x)
    if isinstance(out, tuple):
        s, h = (np.asarray(a, dtype=np.float64) for a in out)
        if np.any((h > 0) & (s < gamma)) or np.any((h < 0) | (h > 1)):
            raise ValueError("score values must lie in [0, 1] and be 0 wherever the score is below gamma")
        return s, h
    s = np.asarray(out, dtype=np.float64)
    return s, (s >= gamma).astype(np.float64)


def plain_monte_carlo(
    score: ScoreFn, nominal: Family, gamma: float, n: int, *, rng: np.random.Generator
) -> PlainMCResult:
    """Estimate P(S(X) >= gamma), X ~ nominal, by counting failures among ``n`` samples."""
    x = nominal.sample(n, rng)
    s, _ = evaluate(score, x, gamma)
    k = int(np.count_nonzero(s >= gamma))
    return PlainMCResult(estimate=k / n, ci95=wilson_interval(k, n), failures=k, n=n)


def log_weights(x: np.ndarray, nominal: Family, proposal: Family) -> np.ndarray:
    """log f(x) - log g(x), (N,)."""
    return nominal.log_pdf(x) - proposal.log_pdf(x)


def is_estimate(values: np.ndarray, log_w: np.ndarray) -> tuple[float, float, float]:
    """(estimate, standard error, ESS of the failing samples) from values (failure indicators, or fractions) and
    log weights, both (N,)."""
    n = len(values)
    iw = np.where(values > 0, values * np.exp(np.where(values > 0, log_w, 0.0)), 0.0)
    est = float(iw.mean())
    se = float(iw.std(ddof=1) / math.sqrt(n)) if n > 1 else math.inf
    s1, s2 = float(iw.sum()), float((iw * iw).sum())
    ess = s1 * s1 / s2 if s2 > 0 else 0.0
    return est, se, ess


def cross_entropy_levels(
    score: ScoreFn,
    nominal: Family,
    gamma: float,
    *,
    n_per_level: int,
    rho: float = 0.1,
    max_levels: int = 20,
    smoothing: float = 1.0,
    std_floor: float = 1.0,
    rng: np.random.Generator,
    on_samples: Callable[[np.ndarray, np.ndarray, int], None] | None = None,
) -> tuple[Family, tuple[CELevel, ...], bool, int]:
    """The multilevel cross-entropy method: move the proposal toward {S >= gamma}.

    Args:
        score: vectorised score; failure is ``score >= gamma``.
        nominal: the nominal density f(.; u).
        gamma: failure threshold.
        n_per_level: samples per level.
        rho: elite fraction (the level is the (1 - rho) sample quantile of the scores).
        max_levels: most levels; stops earlier when a level reaches gamma.
        smoothing: alpha of the smoothed update v <- alpha v_new + (1 - alpha) v (1: no smoothing).
        std_floor: smallest standard deviation of a Gaussian fit, in units of the nominal's.
        rng: the only source of randomness.
        on_samples: called with (samples (n, D), scores (n,), level index) after each level's evaluations (the
            failure search keeps what it finds through this).

    Returns:
        (proposal, levels, reached, number of score evaluations).
    """
    if not 0.0 < rho < 1.0:
        raise ValueError(f"rho must lie in (0, 1), got {rho!r}")
    if n_per_level < 2 or n_per_level * rho < 1:
        raise ValueError(f"n_per_level ({n_per_level}) * rho ({rho}) must give at least one elite sample")
    proposal = nominal
    levels: list[CELevel] = []
    evaluations = 0
    reached = False
    for t in range(max_levels):
        x = proposal.sample(n_per_level, rng)
        s, h = evaluate(score, x, gamma)
        evaluations += n_per_level
        if on_samples is not None:
            on_samples(x, s, t)
        gamma_t = min(gamma, float(np.quantile(s, 1.0 - rho, method="inverted_cdf")))
        elite = s >= gamma_t
        log_w = log_weights(x[elite], nominal, proposal)
        # At the final level the weights carry the values too: the fit then targets g* proportional to f * value.
        w = np.exp(log_w - log_w.max()) * (h[elite] if gamma_t >= gamma else 1.0)
        fitted = proposal.fit(x[elite], w, nominal=nominal, std_floor=std_floor)  # type: ignore[arg-type]
        proposal = proposal.blend(fitted, smoothing)  # type: ignore[arg-type]
        levels.append(CELevel(gamma=gamma_t, n=n_per_level, elite=int(elite.sum()), proposal=proposal.describe()))
        if gamma_t >= gamma:
            reached = True
            break
    return proposal, tuple(levels), reached, evaluations


def cross_entropy_is(
    score: ScoreFn,
    nominal: Family,
    gamma: float,
    *,
    n_per_level: int,
    n_final: int,
    rho: float = 0.1,
    max_levels: int = 20,
    smoothing: float = 1.0,
    std_floor: float = 1.0,
    defensive: float = 0.0,
    rng: np.random.Generator,
    on_samples: Callable[[np.ndarray, np.ndarray, int], None] | None = None,
) -> ISResult:
    """P(S(X) >= gamma), X ~ nominal, by cross-entropy levels then a final importance-sampling stage.

    Arguments as :func:`cross_entropy_levels`; ``n_final`` samples for the final stage (``on_samples`` sees them
    with level index -1); ``defensive``: the nominal's share alpha of the final stage's mixture (0: none).
    """
    proposal, levels, reached, evaluations = cross_entropy_levels(
        score,
        nominal,
        gamma,
        n_per_level=n_per_level,
        rho=rho,
        max_levels=max_levels,
        smoothing=smoothing,
        std_floor=std_floor,
        rng=rng,
        on_samples=on_samples,
    )
    return importance_sample(
        score,
        nominal,
        proposal,
        gamma,
        n_final,
        rng=rng,
        levels=levels,
        reached=reached,
        prior_evaluations=evaluations,
        on_samples=on_samples,
        defensive=defensive,
    )


def importance_sample(
    score: ScoreFn,
    nominal: Family,
    proposal: Family,
    gamma: float,
    n: int,
    *,
    rng: np.random.Generator,
    levels: tuple[CELevel, ...] = (),
    reached: bool = True,
    prior_evaluations: int = 0,
    on_samples: Callable[[np.ndarray, np.ndarray, int], None] | None = None,
    defensive: float = 0.0,
) -> ISResult:
    """The final stage: ``n`` samples from ``proposal`` (mixed with a share ``defensive`` of the nominal),
    weighted toward ``nominal``."""
    if not 0.0 <= defensive < 1.0:
        raise ValueError(f"defensive must lie in [0, 1), got {defensive!r}")
    if defensive > 0.0:
        proposal = DefensiveMixture(nominal, proposal, defensive)  # type: ignore[assignment]
    x = proposal.sample(n, rng)
    s, h = evaluate(score, x, gamma)
    if on_samples is not None:
        on_samples(x, s, -1)
    est, se, ess = is_estimate(h, log_weights(x, nominal, proposal))
    k = int(np.count_nonzero(h > 0))
    ci = (max(0.0, est - Z95 * se), est + Z95 * se) if k > 0 else (0.0, math.inf)
    return ISResult(
        estimate=est,
        ci95=ci,
        std_error=se,
        ess=ess,
        failures=k,
        n_final=n,
        num_evaluations=prior_evaluations + n,
        reached=reached,
        levels=levels,
        proposal=proposal,
    )

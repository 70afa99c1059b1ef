"""Reference tests of ``wmplan.plan.samplers``: smooth sampling, the cross-entropy method and MPPI.

Sources (the tags [S], [M], [D], [C] are explained at the top of docs/references.md):
- CEM: Rubinstein 1999 [M] (docs/references.md#rubinstein-1999-cem); De Boer, Kroese, Mannor, Rubinstein, "A
  tutorial on the cross-entropy method", Ann. Oper. Res. 134 (2005) [S]; large-sample elite statistics and the
  (x - 3)^2 convergence setting are the derived [D] values of docs/references.md#de-boer-2005-cem-tutorial.
- MPPI: Williams et al., "Information theoretic MPC for model-based reinforcement learning", ICRA 2017 [S]; the
  weight check values and the Gaussian closed form are [D] values of docs/references.md#williams-2017-it-mpc;
  torch.softmax is the reference library for the weights (docs/references.md#lib-torch).
- AR(1) noise: stationary variance sigma_n^2 / (1 - s^2) and autocorrelation s^k (Box & Jenkins, *Time Series
  Analysis*, from memory [M]: docs/references.md#box-jenkins-time-series; also derived here from the recursion [D]).
- Effective sample size 1 / sum w^2 (Kish's formula): common practice [C].

Monte-Carlo checks use a tolerance of 5 standard errors computed from the samples, and each also asserts that the
tolerance is small enough for the check to be able to fail (docs/references.md#practice-monte-carlo-tolerance).
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import scipy.stats
import torch

from wmplan.errors import ConfigError
from wmplan.plan import samplers as S


def gen(seed: int) -> torch.Generator:
    return torch.Generator().manual_seed(seed)


def quadratic_cost(target: float):
    def cost(x: torch.Tensor) -> torch.Tensor:  # (B*, C, H, A) -> (B*, C)
        return ((x - target) ** 2).sum(dim=(-2, -1))

    return cost


def draw(mean, std, num: int, *, smoothing: float = 0.0, generator: torch.Generator) -> torch.Tensor:
    """Smooth samples as the planner draws them: mean + std * (L n), L = ar1_filter_matrix, n ~ N(0, 1).

    mean (B*, H, A); std a scalar, (A,) or (B*, H, A); returns (B*, C, H, A)."""
    mean = torch.as_tensor(mean, dtype=torch.float32)
    std = torch.as_tensor(std, dtype=torch.float32)
    *batch, horizon, action_dim = mean.shape
    white = torch.randn((*batch, num, horizon, action_dim), generator=generator)
    noise = S.ar1_filter_matrix(horizon, smoothing) @ white
    return mean.unsqueeze(-3) + (std.unsqueeze(-3) if std.ndim >= 2 else std) * noise


def cem_loop(
    cost_fn,
    mean,
    std,
    *,
    num: int,
    elites: int,
    iterations: int,
    generator: torch.Generator,
    low=None,
    high=None,
    smoothing: float = 0.0,
) -> torch.Tensor:
    """Iterate the planner's CEM update (draw, clip, score, refit) and return the final mean."""
    std = torch.broadcast_to(torch.as_tensor(std, dtype=torch.float32), mean.shape)
    for _ in range(iterations):
        x = draw(mean, std, num, smoothing=smoothing, generator=generator)
        if low is not None:
            x = torch.minimum(torch.maximum(x, low), high)
        mean, std = S.cem_update(x, cost_fn(x), elites, mean, std)
    return mean


def mppi_loop(cost_fn, mean, std, *, num: int, iterations: int, lam: float, generator: torch.Generator):
    """Iterate the planner's MPPI update with a fixed spread; returns the final mean and each step's ESS."""
    ess = []
    for _ in range(iterations):
        x = draw(mean, std, num, generator=generator)
        costs = cost_fn(x)
        w = S.mppi_weights(costs, lam)
        ess.append(1.0 / (w * w).sum(-1))  # effective sample size (Kish's formula)
        mean = S.mppi_update(mean, x, costs, lam)
    return mean, torch.stack(ess)


# --- smooth sampling ------------------------------------------------------------------------------------------


@pytest.mark.parametrize("smoothing", [0.0, 0.5, 0.9])
def test_ar1_filter_gives_ar1_correlation(smoothing):
    """L L^T equals the AR(1) correlation matrix s^|i-j| (unit variance at every step).

    Source: the AR(1) recursion e_t = s e_{t-1} + sqrt(1 - s^2) n_t with e_0 = n_0 [D], textbook stationary
    variance and autocorrelation s^k (Box & Jenkins, from memory [M], docs/references.md#box-jenkins-time-series).
    """
    horizon = 7
    filt = S.ar1_filter_matrix(horizon, smoothing).double()
    idx = np.arange(horizon)
    expected = smoothing ** np.abs(idx[:, None] - idx[None, :])
    np.testing.assert_allclose((filt @ filt.T).numpy(), expected, rtol=0, atol=1e-6)
    assert torch.equal(filt, torch.tril(filt))  # causal: a step never depends on later noise


@pytest.mark.parametrize(("seed", "smoothing"), [(0, 0.0), (1, 0.8)])
def test_sampler_marginal_std_and_lag1_correlation(seed, smoothing):
    """Unbounded samples have the requested per-step std and lag-1 correlation s (AR(1), [M]/[D]).

    Tolerances: 5 standard errors; SE of a sample std about std / sqrt(2n) for normal data, SE of a sample
    correlation about (1 - r^2) / sqrt(n) (large-sample normal theory, from memory [M]).
    """
    num = 100_000
    mean = torch.tensor([[0.5, -0.1], [1.0, 0.0], [0.0, 0.2], [-1.0, 0.1]])  # (H=4, A=2)
    std = torch.tensor([2.0, 0.3])  # (A,)
    x = draw(mean, std, num, smoothing=smoothing, generator=gen(seed)).double()  # (C, H, A)
    assert x.shape == (num, 4, 2)
    np.testing.assert_allclose(x.mean(0).numpy(), mean.numpy(), atol=5 * 2.0 / math.sqrt(num))
    got_std = x.std(0)  # (H, A)
    se_std = std.double() / math.sqrt(2 * num)
    assert torch.all((got_std - std.double()).abs() < 5 * se_std)
    z = (x - x.mean(0)) / got_std
    lag1 = (z[:, 1:] * z[:, :-1]).mean(0)  # (H-1, A)
    se_corr = (1 - smoothing**2) / math.sqrt(num)
    assert torch.all((lag1 - smoothing).abs() < 5 * se_corr)


def test_batched_sampling_shapes():
    """Leading batch axes of the mean carry through: (B, H, A) -> (B, C, H, A)."""
    x = draw(torch.zeros(3, 5, 2), torch.ones(3, 5, 2), 11, generator=gen(0))
    assert x.shape == (3, 11, 5, 2)


def test_shift_warm_start_by_hand():
    """The plan moves one step earlier; the new last step repeats the old one or is zero (hand example)."""
    mean = torch.tensor([[1.0, 0.1], [2.0, 0.2], [3.0, 0.3]])
    assert torch.equal(S.shift_warm_start(mean, "last"), torch.tensor([[2.0, 0.2], [3.0, 0.3], [3.0, 0.3]]))
    assert torch.equal(S.shift_warm_start(mean, "zero"), torch.tensor([[2.0, 0.2], [3.0, 0.3], [0.0, 0.0]]))
    batched = S.shift_warm_start(torch.stack([mean, -mean]))
    assert torch.equal(batched[1], -S.shift_warm_start(mean))


# --- CEM ------------------------------------------------------------------------------------------------------


def test_cem_update_by_hand():
    """Elites = lowest costs; mean and MLE std of the elites; smoothing and the std floor (hand computation).

    Source: De Boer et al. 2005 tutorial [S] (update and smoothing rule:
    docs/references.md#de-boer-2005-cem-tutorial).
    """
    samples = torch.tensor([[[0.0]], [[1.0]], [[2.0]], [[10.0]]])  # (C=4, H=1, A=1)
    costs = torch.tensor([3.0, 1.0, 0.5, 7.0])
    mean, std = S.cem_update(samples, costs, 2, torch.tensor([[4.0]]), torch.tensor([[2.0]]))
    assert mean.item() == pytest.approx(1.5)  # elites 2 and 1
    assert std.item() == pytest.approx(0.5)  # MLE std of {1, 2}
    mean, std = S.cem_update(samples, costs, 2, torch.tensor([[4.0]]), torch.tensor([[2.0]]), alpha=0.25)
    assert mean.item() == pytest.approx(0.25 * 1.5 + 0.75 * 4.0)
    assert std.item() == pytest.approx(0.25 * 0.5 + 0.75 * 2.0)
    _, std = S.cem_update(samples, costs, 2, torch.tensor([[4.0]]), torch.tensor([[2.0]]), min_std=0.8)
    assert std.item() == pytest.approx(0.8)


def test_cem_update_nan_cost_is_never_an_elite():
    """A NaN cost ranks worst (contract)."""
    samples = torch.tensor([[[0.0]], [[1.0]], [[2.0]]])
    mean, _ = S.cem_update(samples, torch.tensor([float("nan"), 1.0, 2.0]), 1, torch.zeros(1, 1), torch.ones(1, 1))
    assert mean.item() == 1.0


def test_cem_update_batched_equals_loop():
    """The batched update equals a plain loop over the batch (docs/references.md#practice-equivalence-test)."""
    g = gen(3)
    samples = torch.randn(4, 30, 6, 2, generator=g)
    costs = torch.randn(4, 30, generator=g)
    old_mean, old_std = torch.randn(4, 6, 2, generator=g), torch.rand(4, 6, 2, generator=g)
    mean, std = S.cem_update(samples, costs, 5, old_mean, old_std, alpha=0.7, min_std=0.05)
    for b in range(4):
        order = torch.argsort(costs[b])[:5]
        elites = samples[b, order]
        ref_mean = 0.7 * elites.mean(0) + 0.3 * old_mean[b]
        ref_std = torch.clamp(0.7 * elites.std(0, correction=0) + 0.3 * old_std[b], min=0.05)
        torch.testing.assert_close(mean[b], ref_mean)
        torch.testing.assert_close(std[b], ref_std)


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4])
def test_cem_converges_on_1d_quadratic(seed):
    """(x - 3)^2 from mu0 = 0, sigma0 = 10, N = 200, 20 elites, 30 iterations, no smoothing: |mu - 3| < 1e-3.

    Source: the convergence check [D] of docs/references.md#de-boer-2005-cem-tutorial.
    """
    mean = cem_loop(
        quadratic_cost(3.0), torch.zeros(1, 1), 10.0, num=200, elites=20, iterations=30, generator=gen(seed)
    )
    assert abs(mean.item() - 3.0) < 1e-3


def test_cem_update_iterated_batched_and_bounded():
    """Batched CEM on a 2-D action sequence with bounds: each batch entry converges to its own optimum, clipped.

    Source: the convergence check [D] of docs/references.md#de-boer-2005-cem-tutorial; a target outside the
    box has its optimum at the bound (convexity of the quadratic, [C]).
    """
    target = torch.tensor([[[1.0, -0.2]], [[5.0, 0.3]]])  # (B=2, H=1, A=2); the 5.0 lies beyond high
    mean = cem_loop(
        lambda x: ((x - target[:, None]) ** 2).sum(dim=(-2, -1)),
        torch.zeros(2, 4, 2),
        torch.tensor([3.0, 0.5]),
        num=300,
        elites=30,
        iterations=40,
        low=torch.tensor([-3.0, -0.5]),
        high=torch.tensor([3.0, 0.5]),
        smoothing=0.5,
        generator=gen(11),
    )
    expected = torch.tensor([[1.0, -0.2], [3.0, 0.3]])[:, None, :].expand(2, 4, 2)
    torch.testing.assert_close(mean, expected, atol=1e-3, rtol=0)


def _batched_elite_stats(cost_fn, rho: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """CEM update of N(0, 1) samples on 20 independent batches; returns elite means and stds, (20,) each."""
    batches, num = 20, 100_000
    x = draw(torch.zeros(batches, 1, 1), 1.0, num, generator=gen(seed))  # (B, C, 1, 1)
    costs = cost_fn(x[..., 0, 0])  # (B, C)
    mean, std = S.cem_update(x, costs, int(rho * num), torch.zeros(batches, 1, 1), torch.ones(batches, 1, 1))
    return mean.reshape(-1).double().numpy(), std.reshape(-1).double().numpy()


def _assert_mc_close(values: np.ndarray, expected: float, max_rel_tol: float) -> None:
    """Batch mean within 5 standard errors (from the spread across batches) of the expected value."""
    se = values.std(ddof=1) / math.sqrt(values.size)
    assert 5 * se < max_rel_tol * abs(expected), "tolerance too loose for the check to mean anything"
    assert abs(values.mean() - expected) < 5 * se


@pytest.mark.parametrize(("rho", "table_value"), [(0.1, 0.07247), (0.2, 0.14564)])
def test_cem_elite_std_ratio_at_bowl_minimiser(rho, table_value):
    """Sampling N(0, sigma^2) at the minimiser of x^2: elite std / sigma -> sqrt(1 - 2 z phi(z) / (2 Phi(z) - 1)).

    z = Phi^-1(1/2 + rho/2); 0.07247 at rho = 0.1 and 0.14564 at rho = 0.2 ([D],
    docs/references.md#de-boer-2005-cem-tutorial).
    20 independent batches of 100,000 samples in one batched call; tolerance 5 standard errors of the batch mean.
    """
    z = scipy.stats.norm.ppf(0.5 + rho / 2)
    closed_form = math.sqrt(1 - 2 * z * scipy.stats.norm.pdf(z) / (2 * scipy.stats.norm.cdf(z) - 1))
    assert closed_form == pytest.approx(table_value, abs=5e-6)
    _, stds = _batched_elite_stats(lambda x: x**2, rho, seed=21)
    _assert_mc_close(stds, closed_form, max_rel_tol=0.02)


def test_cem_elite_shift_for_monotone_cost():
    """Cost monotone in x (optimum far away): elite mean shift sigma phi(z) / rho and elite std ratio
    sqrt(1 + z phi(z)/rho - (phi(z)/rho)^2), z = Phi^-1(1 - rho): 1.75498 and 0.41126 at rho = 0.1.

    Source: docs/references.md#de-boer-2005-cem-tutorial [D] (moments of the truncated normal); 20 batches of
    100,000, 5 SE.
    """
    rho = 0.1
    z = scipy.stats.norm.ppf(1 - rho)
    lam = scipy.stats.norm.pdf(z) / rho
    assert lam == pytest.approx(1.75498, abs=5e-6)
    std_ratio = math.sqrt(1 + z * lam - lam**2)
    assert std_ratio == pytest.approx(0.41126, abs=5e-6)
    means, stds = _batched_elite_stats(lambda x: -x, rho, seed=22)  # cost -x: elites are the largest samples
    _assert_mc_close(means, lam, max_rel_tol=0.02)
    _assert_mc_close(stds, std_ratio, max_rel_tol=0.02)


# --- MPPI -----------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("lam", "expected"),
    [
        (1.0, [0.665241, 0.244728, 0.090031]),
        (0.1, [0.9999546, 4.53979e-5, 2.06106e-9]),
        (10.0, [0.367165, 0.332225, 0.300610]),
    ],
)
def test_mppi_weights_check_values(lam, expected):
    """S = [1, 2, 3]: [D] values of docs/references.md#williams-2017-it-mpc, and equality with
    torch.softmax(-S / lambda)."""
    costs = torch.tensor([1.0, 2.0, 3.0])
    w = S.mppi_weights(costs, lam)
    np.testing.assert_allclose(w.numpy(), expected, rtol=1e-5)
    torch.testing.assert_close(w, torch.softmax(-costs / lam, dim=-1), rtol=1e-6, atol=0)


@pytest.mark.parametrize("seed", [0, 1])
def test_mppi_weights_equal_softmax_batched(seed):
    """Random batched costs: weights equal torch.softmax(-S / lambda) (reference library) and sum to 1."""
    costs = 50 * torch.rand(4, 64, generator=gen(seed))
    for lam in (0.3, 1.0, 7.0):
        w = S.mppi_weights(costs, lam)
        torch.testing.assert_close(w, torch.softmax(-costs / lam, dim=-1), rtol=1e-5, atol=1e-7)
        torch.testing.assert_close(w.sum(-1), torch.ones(4))


def test_mppi_weights_stable_and_handle_infinities():
    """Huge costs do not overflow; +inf and NaN get weight 0; all +inf gives uniform weights (contract)."""
    w = S.mppi_weights(torch.tensor([1e6, 1e6 + 1.0]), 1.0)
    np.testing.assert_allclose(w.numpy(), [1 / (1 + math.exp(-1)), math.exp(-1) / (1 + math.exp(-1))], rtol=1e-6)
    w = S.mppi_weights(torch.tensor([1.0, float("inf"), float("nan")]), 1.0)
    assert w.tolist() == [1.0, 0.0, 0.0]
    w = S.mppi_weights(torch.full((4,), float("inf")), 1.0)
    assert w.tolist() == [0.25] * 4


def _mppi_mean_and_se(mu: float, sigma: float, c: float, lam: float, num: int, seed: int) -> tuple[float, float]:
    u = draw(torch.full((1, 1), mu), sigma, num, generator=gen(seed))  # (C, 1, 1)
    costs = (u[:, 0, 0] - c) ** 2
    new_mean = S.mppi_update(torch.full((1, 1), mu), u, costs, lam).item()
    # Standard error of a self-normalised importance-sampling mean: sqrt(sum w^2 (u - m)^2) (delta method, [M]).
    w = S.mppi_weights(costs, lam).double()
    se = torch.sqrt((w**2 * (u[:, 0, 0].double() - new_mean) ** 2).sum()).item()
    return new_mean, se


@pytest.mark.parametrize(
    ("mu", "sigma", "c", "lam", "seed"),
    [(0.0, 1.0, 3.0, 2.0, 0), (0.0, 1.0, 3.0, 2.0, 1), (0.5, 2.0, -1.0, 0.5, 2)],
)
def test_mppi_mean_gaussian_closed_form(mu, sigma, c, lam, seed):
    """u ~ N(mu, sigma^2), S(u) = (u - c)^2: the MPPI mean -> (mu lambda/2 + c sigma^2) / (sigma^2 + lambda/2).

    1.5 for mu = 0, sigma = 1, c = 3, lambda = 2 ([D], docs/references.md#williams-2017-it-mpc); 200,000 samples,
    5 standard errors.
    """
    expected = (mu * lam / 2 + c * sigma**2) / (sigma**2 + lam / 2)
    if (mu, sigma, c, lam) == (0.0, 1.0, 3.0, 2.0):
        assert expected == 1.5
    got, se = _mppi_mean_and_se(mu, sigma, c, lam, 200_000, seed)
    assert 5 * se < 0.05
    assert abs(got - expected) < 5 * se


def test_mppi_update_iterated_reaches_the_minimiser():
    """Repeated MPPI updates with fixed sigma move a fraction sigma^2/(sigma^2 + lambda/2) of the way each time
    (closed form above, [D]), so they converge to c; the stationary error std is SE / sqrt(1 - kappa^2) with
    kappa = (lambda/2) / (sigma^2 + lambda/2) = 0.5 [D]. Tolerance: 5 such standard deviations, SE measured at c.
    """
    num, lam = 20_000, 2.0
    mean, ess = mppi_loop(
        quadratic_cost(3.0), torch.zeros(1, 1), 1.0, num=num, iterations=40, lam=lam, generator=gen(5)
    )
    _, se = _mppi_mean_and_se(3.0, 1.0, 3.0, lam, num, seed=6)
    tol = 5 * se / math.sqrt(1 - 0.5**2)
    assert tol < 0.05
    assert abs(mean.item() - 3.0) < tol
    assert torch.all(ess > 1) and torch.all(ess <= num)


def test_mppi_update_is_weighted_average_and_batched():
    """U + sum w (x - U) equals sum w x, per batch entry (algebra, since sum w = 1 [D]); loop equivalence."""
    g = gen(4)
    samples = torch.randn(3, 40, 5, 2, generator=g)
    costs = 10 * torch.rand(3, 40, generator=g)
    mean = torch.randn(3, 5, 2, generator=g)
    got = S.mppi_update(mean, samples, costs, 0.7)
    for b in range(3):
        w = torch.softmax(-costs[b] / 0.7, dim=0)
        torch.testing.assert_close(got[b], (w[:, None, None] * samples[b]).sum(0), rtol=1e-5, atol=1e-5)


# --- errors ---------------------------------------------------------------------------------------------------


def test_errors_name_the_argument():
    """Bad input raises a one-line ConfigError naming the argument, the value and the rule (DEVELOPERS.md,
    "Errors and files")."""
    with pytest.raises(ConfigError, match=re.escape("num_elites must be <= 4, got 5")):
        S.cem_update(torch.zeros(4, 1, 1), torch.zeros(4), 5, torch.zeros(1, 1), torch.ones(1, 1))
    with pytest.raises(ConfigError, match=re.escape("lam (MPPI temperature lambda) must be finite and > 0, got 0.0")):
        S.mppi_weights(torch.zeros(3), 0.0)
    with pytest.raises(ConfigError, match=re.escape("smoothing must lie in [0, 1), got 1.0")):
        S.ar1_filter_matrix(3, 1.0)
    with pytest.raises(ConfigError, match=re.escape("old_std has shape (3,), which does not broadcast to")):
        S.cem_update(torch.zeros(4, 1, 1), torch.zeros(4), 2, torch.zeros(1, 1), torch.ones(3))
    with pytest.raises(ConfigError, match=re.escape("costs has shape (3,); samples of shape (4, 1, 1) need")):
        S.cem_update(torch.zeros(4, 1, 1), torch.zeros(3), 2, torch.zeros(1, 1), torch.ones(1, 1))

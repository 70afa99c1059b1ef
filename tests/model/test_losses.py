"""Reference checks of the forward model's probability pieces: the KL between diagonal Gaussians, the Gaussian
negative log-likelihood of the training loss and of the assessment, best-of-K displacement errors and the energy
distance.

Reference values: the KL and NLL examples of docs/references.md#practice-gaussian-kl-nll and the trajectory metrics of
docs/references.md#practice-best-of-k, each derived [D] there and cross-checked against torch. Reference libraries:
``torch.distributions`` (Normal, Independent, MixtureSameFamily, kl_divergence), ``torch.nn.GaussianNLLLoss``
(docs/references.md#lib-torch) and ``scipy.stats.energy_distance`` (docs/references.md#lib-scipy).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
import torch
from torch.distributions import Categorical, Independent, MixtureSameFamily, Normal, kl_divergence

from tests.model.model_helpers import TOY_EGO, straight_batch
from wmplan.model.assess import ade_fde, energy_distance, mixture_nll
from wmplan.model.world_model import WorldModel, gaussian_kl

# --- KL between diagonal Gaussians (docs/references.md#practice-gaussian-kl-nll) --------------------------------


def _kl(mu_q, sigma_q, mu_p, sigma_p) -> torch.Tensor:
    """gaussian_kl called with standard deviations turned into log-variances."""
    t = lambda v: torch.tensor(v, dtype=torch.float64)  # noqa: E731
    return gaussian_kl(t(mu_q), 2 * torch.log(t(sigma_q)), t(mu_p), 2 * torch.log(t(sigma_p)))


@pytest.mark.parametrize(
    ("q", "p", "expected_sum"),
    [
        (([0.5, -1.0], [1.0, 0.5]), ([0.0, 0.0], [1.0, 1.0]), 0.9431472),
        (([0.5, -1.0], [1.0, 0.5]), ([1.0, 0.0], [2.0, 0.5]), 2.3493972),
        (([1.0, 0.0], [2.0, 0.5]), ([0.5, -1.0], [1.0, 0.5]), 2.9318528),
    ],
)
def test_gaussian_kl_check_values(q, p, expected_sum):
    """The three tabled KL values of docs/references.md#practice-gaussian-kl-nll ([D], 7 decimals) and the
    same pairs through ``torch.distributions.kl_divergence`` of ``Independent(Normal, 1)`` (the reference
    library)."""
    kl = _kl(*q, *p)
    assert float(kl.sum()) == pytest.approx(expected_sum, abs=5e-7)
    ref = kl_divergence(
        Independent(Normal(torch.tensor(q[0]), torch.tensor(q[1])), 1),
        Independent(Normal(torch.tensor(p[0]), torch.tensor(p[1])), 1),
    )
    assert float(kl.sum()) == pytest.approx(float(ref), rel=1e-6)


def test_gaussian_kl_per_dimension_and_vae_closed_form():
    """Per-dimension values [0.125, 0.8181472] against N(0, I) ([D],
    docs/references.md#practice-gaussian-kl-nll) and the VAE closed form -1/2 sum(1 + log s^2 - m^2 - s^2)
    (Kingma & Welling 2014, Appendix B; docs/references.md#kingma-welling-2014-vae)."""
    kl = _kl([0.5, -1.0], [1.0, 0.5], [0.0, 0.0], [1.0, 1.0])
    assert kl.tolist() == pytest.approx([0.125, 0.8181472], abs=5e-7)
    mu, var = torch.tensor([0.5, -1.0], dtype=torch.float64), torch.tensor([1.0, 0.25], dtype=torch.float64)
    vae = -0.5 * (1 + torch.log(var) - mu**2 - var)
    assert kl.tolist() == pytest.approx(vae.tolist(), abs=1e-12)


def test_gaussian_kl_matches_torch_distributions_on_random_pairs():
    """Elementwise against ``torch.distributions.kl_divergence(Normal, Normal)`` on 4096 random pairs (seeded),
    including log-variances at the model's clamp limits (-7, 7); float32, relative 1e-5 (reference library)."""
    g = torch.Generator().manual_seed(20240601)
    shape = (64, 8, 8)
    mu_q, mu_p = torch.randn(shape, generator=g) * 3, torch.randn(shape, generator=g) * 3
    lv_q, lv_p = torch.rand(shape, generator=g) * 14 - 7, torch.rand(shape, generator=g) * 14 - 7
    ours = gaussian_kl(mu_q, lv_q, mu_p, lv_p)
    ref = kl_divergence(Normal(mu_q, (0.5 * lv_q).exp()), Normal(mu_p, (0.5 * lv_p).exp()))
    torch.testing.assert_close(ours, ref, rtol=1e-5, atol=1e-6)
    same = gaussian_kl(mu_q, lv_q, mu_q, lv_q)
    assert float(same.abs().max()) < 1e-6  # KL of a distribution with itself is zero


# --- Gaussian negative log-likelihood (docs/references.md#practice-gaussian-kl-nll) -----------------------------

NLL_EXAMPLE = 1.7370857  # y = 1, mu = 0, sigma^2 = 4, full NLL ([D], docs/references.md#practice-gaussian-kl-nll)


def test_reference_nll_example_in_torch():
    """The NLL example through ``torch.nn.GaussianNLLLoss``: 1.7370857 with full=True, 0.8181472 without the
    1/2 log 2 pi constant ([D], docs/references.md#practice-gaussian-kl-nll; the loss takes the variance [S],
    docs/references.md#lib-torch)."""
    y, mu, var = torch.tensor([1.0]), torch.tensor([0.0]), torch.tensor([4.0])
    assert float(torch.nn.GaussianNLLLoss(full=True)(mu, y, var)) == pytest.approx(NLL_EXAMPLE, abs=5e-7)
    assert float(torch.nn.GaussianNLLLoss()(mu, y, var)) == pytest.approx(0.8181472, abs=5e-7)


def _fixed_variance_example(hz: int) -> tuple[WorldModel, dict]:
    """A tiny latent model whose decoder outputs a zero residual mean and a variance of 4 m^2 for every step and
    coordinate, whatever z, and a batch of 4 scenes whose one other vehicle ends up 1 m ahead of and 1 m to the left
    of its constant-velocity path at each of ``hz`` steps: the 10.3 example at every term."""
    from wmplan.model.config import ModelConfig
    from wmplan.model.nets import RESIDUAL_SCALE_M

    cfg = ModelConfig(
        history=2, horizon=hz, num_objects=1, d_model=8, num_heads=2, hidden=16, num_layers=1, latent_dim=2
    )
    model = WorldModel(cfg, TOY_EGO, generator=torch.Generator().manual_seed(5))
    last = model.decoder[-1]
    with torch.no_grad():
        last.weight.zero_()
        last.bias[: 2 * hz] = 0.0
        last.bias[2 * hz :] = math.log(4.0 / RESIDUAL_SCALE_M**2)  # raw log-variance; x RESIDUAL_SCALE_M^2 -> 4 m^2
    # A residual of 1 m at every step (straight_batch ramps future_dx/dy with elapsed fraction; undo the ramp).
    batch = straight_batch(4, 2, hz, future_dx_m=0.0, future_dy_m=0.0)
    batch["future"][..., 1, 0] += 1.0
    batch["future"][..., 1, 1] += 1.0
    return model, batch


@pytest.mark.parametrize("prior_weight", [0.0, 0.5])
def test_world_model_loss_nll_on_reference_example(prior_weight):
    """The likelihood term of ``WorldModel.loss`` on the NLL example: the decoder's last layer is set to output a
    zero residual mean and a variance of 4 m^2 for every step and coordinate, whatever z; the one other vehicle's
    true future is 1 m ahead of and 1 m to the left of its constant-velocity path at each of H steps. Then the
    loss's per-object NLL must be 2 H x 1.7370857 ([D], docs/references.md#practice-gaussian-kl-nll) and equal
    ``GaussianNLLLoss(full=True, reduction='sum')`` (reference library) on the decoder's outputs. With the hybrid
    prior term the prior-draw NLL is the same number (the decoder ignores z here)."""
    hz = 3
    model, batch = _fixed_variance_example(hz)
    _, metrics = model.loss(batch, prior_weight=prior_weight, generator=torch.Generator().manual_seed(6))
    assert metrics["loss/nll"] == pytest.approx(2 * hz * NLL_EXAMPLE, rel=1e-6)
    ref = torch.nn.GaussianNLLLoss(full=True, reduction="sum")(
        torch.zeros(2 * hz), torch.ones(2 * hz), torch.full((2 * hz,), 4.0)
    )
    assert metrics["loss/nll"] == pytest.approx(float(ref), rel=1e-6)
    if prior_weight > 0:
        assert metrics["loss/nll_prior"] == pytest.approx(2 * hz * NLL_EXAMPLE, rel=1e-6)
    else:
        assert "loss/nll_prior" not in metrics


def test_beta_nll_weights_each_term_by_its_variance_without_differentiating_it():
    """beta-NLL (Seitzer et al., ICLR 2022, eq. 5: each term times stop-gradient(sigma^(2 beta))) on the NLL example
    set-up above: variance 4 m^2 and a 1 m residual everywhere, beta = 0.5, so every term is weighted by 2 and the
    fitted likelihood is 2 x 2 H x 1.7370857 ([D], docs/references.md#seitzer-2022-beta-nll); the logged NLL stays
    the plain one. The gradient on each raw log-variance output is the weight times
    d NLL / d log var = 2 x 1/2 (1 - 1/4) = 0.75
    (derived); differentiating the weight too would add beta x 2 x 1.737 to it."""
    hz = 3
    model, batch = _fixed_variance_example(hz)
    last = model.decoder[-1]
    loss, metrics = model.loss(batch, kl_weight=0.0, nll_beta=0.5, generator=torch.Generator().manual_seed(6))
    assert metrics["loss/nll"] == pytest.approx(2 * hz * NLL_EXAMPLE, rel=1e-6)
    assert float(loss.detach()) == pytest.approx(2.0 * 2 * hz * NLL_EXAMPLE, rel=1e-6)
    grad = torch.autograd.grad(loss, last.bias)[0]
    torch.testing.assert_close(grad[2 * hz :], torch.full((2 * hz,), 0.75), rtol=1e-5, atol=0.0)


def test_mixture_nll_with_one_component_is_the_gaussian_nll():
    """``assess.mixture_nll`` with K = 1 equals ``GaussianNLLLoss(full=True, reduction='none')`` summed over the
    two coordinates, on random means, log-variances and targets (seeded; reference library); and on the NLL
    example it is 2 x 1.7370857 ([D], docs/references.md#practice-gaussian-kl-nll). Duplicating the component
    (K = 2, equal weights) leaves it unchanged."""
    g = torch.Generator().manual_seed(77)
    b, n, hz = 5, 3, 4
    mean = torch.randn(b, 1, n, hz, 2, generator=g, dtype=torch.float64)
    logvar = torch.rand(b, 1, n, hz, 2, generator=g, dtype=torch.float64) * 4 - 2
    true = torch.randn(b, n, hz, 2, generator=g, dtype=torch.float64)
    ours = mixture_nll(mean, logvar, true)
    ref = torch.nn.GaussianNLLLoss(full=True, reduction="none", eps=1e-12)(mean[:, 0], true, logvar[:, 0].exp()).sum(-1)
    torch.testing.assert_close(ours, ref)
    torch.testing.assert_close(mixture_nll(mean.expand(b, 2, n, hz, 2), logvar.expand(b, 2, n, hz, 2), true), ref)
    ex = mixture_nll(torch.zeros(1, 1, 1, 1, 2), torch.full((1, 1, 1, 1, 2), math.log(4.0)), torch.ones(1, 1, 1, 2))
    assert float(ex) == pytest.approx(2 * NLL_EXAMPLE, abs=1e-6)


def test_mixture_nll_against_torch_mixture_same_family():
    """K = 3 equal-weight mixture of diagonal 2-D Gaussians against ``torch.distributions.MixtureSameFamily``
    (Categorical, Independent(Normal, 1)).log_prob (reference library); seeded random components."""
    g = torch.Generator().manual_seed(78)
    b, k, n, hz = 4, 3, 2, 5
    mean = torch.randn(b, k, n, hz, 2, generator=g, dtype=torch.float64) * 2
    logvar = torch.rand(b, k, n, hz, 2, generator=g, dtype=torch.float64) * 3 - 1.5
    true = torch.randn(b, n, hz, 2, generator=g, dtype=torch.float64)
    comp = Independent(Normal(mean.movedim(1, -2), (0.5 * logvar.movedim(1, -2)).exp()), 1)  # batch (B,N,H,K)
    mix = MixtureSameFamily(Categorical(probs=torch.full((b, n, hz, k), 1.0 / k, dtype=torch.float64)), comp)
    torch.testing.assert_close(mixture_nll(mean, logvar, true), -mix.log_prob(true))


# --- best-of-K displacement errors (docs/references.md#practice-best-of-k) ---------------------------------------


def test_ade_fde_lane_change_example():
    """[D], docs/references.md#practice-best-of-k: truth a left lane change x = 0..10 m, y = 0..3.5 m over 6
    points; modes keep lane, the change at 90 % amplitude, and a right change: ADE = [1.75, 0.175, 3.5],
    FDE = [3.5, 0.35, 7.0], so minADE = 0.175 m and minFDE = 0.35 m. Shapes as ``ade_fde`` takes them:
    pred (B, K, H, N, 2)."""
    x = torch.linspace(0.0, 10.0, 6, dtype=torch.float64)
    y = torch.linspace(0.0, 3.5, 6, dtype=torch.float64)
    true = torch.stack([x, y], -1)  # (H, 2)
    modes = torch.stack([torch.stack([x, 0 * y], -1), torch.stack([x, 0.9 * y], -1), torch.stack([x, -y], -1)])
    pred = modes[None, :, :, None, :]  # (1, 3, 6, 1, 2)
    ade, fde, full = ade_fde(pred, true[None, :, None, :], torch.ones(1, 6, 1, dtype=torch.bool))
    assert float(ade) == pytest.approx(0.175, abs=1e-12)
    assert float(fde) == pytest.approx(0.35, abs=1e-12)
    assert bool(full.all())
    # Per mode (K = 1 each): the tabled ADE and FDE.
    for k, (a, f) in enumerate([(1.75, 3.5), (0.175, 0.35), (3.5, 7.0)]):
        ade_k, fde_k, _ = ade_fde(pred[:, k : k + 1], true[None, :, None, :], torch.ones(1, 6, 1, dtype=torch.bool))
        assert (float(ade_k), float(fde_k)) == pytest.approx((a, f), abs=1e-12)
    # An object missing at one step is not counted (its mask is False).
    valid = torch.ones(1, 6, 1, dtype=torch.bool)
    valid[0, 3, 0] = False
    assert not bool(ade_fde(pred, true[None, :, None, :], valid)[2].any())


# --- energy distance --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", [3, 4])
def test_energy_distance_against_scipy(seed):
    """On 1-D samples, ``assess.energy_distance`` equals the square of ``scipy.stats.energy_distance`` (scipy
    returns sqrt(2E|X-Y| - E|X-X'| - E|Y-Y'|), docs/references.md#szekely-rizzo-2013-energy-distance; reference
    library), for sets of different sizes; it is 0 for identical sets and > 0 for shifted ones."""
    rng = np.random.default_rng(seed)
    u = rng.normal(0.0, 1.0, 40)
    v = rng.normal(0.7, 1.5, 25)
    ours = energy_distance(torch.from_numpy(u)[:, None], torch.from_numpy(v)[:, None])
    assert float(ours) == pytest.approx(scipy.stats.energy_distance(u, v) ** 2, rel=1e-9)
    assert float(energy_distance(torch.from_numpy(u)[:, None], torch.from_numpy(u)[:, None])) == pytest.approx(
        0.0, abs=1e-12
    )
    assert float(ours) > 0.0


def test_energy_distance_batched_equals_one_by_one():
    """The leading axes are batch axes: a (S, n, d) call equals S separate calls (d = 30, trajectories of 15
    steps flattened, as ``assess`` uses it); seeded."""
    g = torch.Generator().manual_seed(9)
    x = torch.randn(3, 16, 30, generator=g, dtype=torch.float64)
    y = torch.randn(3, 12, 30, generator=g, dtype=torch.float64) + 0.5
    batched = energy_distance(x, y)
    singles = torch.stack([energy_distance(x[i], y[i]) for i in range(3)])
    torch.testing.assert_close(batched, singles)

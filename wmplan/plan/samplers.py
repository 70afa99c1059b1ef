"""The sampler updates of the planner: smooth Gaussian noise, the CEM and MPPI updates (torch, CPU, float32).

:class:`wmplan.plan.mpc.SamplingPlanner` draws its candidates with :func:`ar1_filter_matrix` and updates its
sampling distribution with :func:`cem_update` or :func:`mppi_update` once per decision (receding horizon, warm
started by :func:`shift_warm_start`); this module holds the one definition of each update.

Letters used in shapes: ``B*`` any number of leading batch axes (for example many episodes planned in one
call; absent in the simplest use), ``C`` candidate sequences, ``H`` horizon steps, ``A`` action dimensions
(``accel_mps2, steer_rad`` for the ego), ``E`` elites.

Methods:

- Smooth sampling: Gaussian noise filtered in time by a stationary first-order autoregressive (AR(1)) process,
  ``e_0 = n_0``, ``e_t = s e_{t-1} + sqrt(1 - s^2) n_t`` with ``n_t ~ N(0, 1)``. Every ``e_t`` has unit variance
  and ``corr(e_t, e_{t+k}) = s^k`` (the textbook AR(1) stationary variance ``sigma_n^2 / (1 - s^2)``), so the
  marginal standard deviation of a sample stays ``std`` whatever the smoothing ``s``.
- Cross-entropy method (Rubinstein 1999; De Boer, Kroese, Mannor, Rubinstein, "A tutorial on the cross-entropy
  method", Ann. Oper. Res. 134, 2005; Botev et al. 2013): keep the ``E`` lowest-cost samples, refit a diagonal
  Gaussian to them (maximum likelihood, so the standard deviation divides by ``E``), optionally smooth
  ``theta <- alpha theta_new + (1 - alpha) theta_old`` and floor the standard deviation.
- Model predictive path integral control (Williams et al., "Information theoretic MPC for model-based
  reinforcement learning", ICRA 2017): ``w_k = exp(-(S_k - min S) / lambda) / sum_j exp(-(S_j - min S) / lambda)``
  (= ``softmax(-S / lambda)``), ``U <- U + sum_k w_k eps_k``.

Nothing here draws random numbers or seeds anything: the planner draws the noise from its own generators.
"""

from __future__ import annotations

from typing import Literal

import torch
from torch import Tensor

from wmplan.errors import ConfigError

DTYPE = torch.float32
"""The dtype of every tensor this module returns."""


# --- input checks ---------------------------------------------------------------------------------------------


def _tensor(name: str, value: object) -> Tensor:
    """``value`` as a float32 CPU tensor, or a one-line ConfigError naming the argument."""
    try:
        out = torch.as_tensor(value, dtype=DTYPE)
    except (TypeError, ValueError, RuntimeError) as exc:
        raise ConfigError(f"{name}: cannot convert {type(value).__name__} to a float tensor ({exc})") from None
    return out


def _sequence_tensor(name: str, value: object) -> Tensor:
    out = _tensor(name, value)
    if out.ndim < 2:
        raise ConfigError(f"{name} has shape {tuple(out.shape)}; expected (B*, H, A) with at least 2 axes")
    return out


def _broadcast(name: str, value: Tensor, shape: torch.Size, expected: str) -> Tensor:
    try:
        return torch.broadcast_to(value, shape)
    except RuntimeError:
        raise ConfigError(
            f"{name} has shape {tuple(value.shape)}, which does not broadcast to {tuple(shape)}; expected {expected}"
        ) from None


def _check_count(name: str, value: int, minimum: int, maximum: int | None = None) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise ConfigError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if maximum is not None and value > maximum:
        raise ConfigError(f"{name} must be <= {maximum}, got {value!r}")


def _check_unit_interval(name: str, value: float, *, closed_right: bool) -> None:
    ok = 0.0 <= value <= 1.0 if closed_right else 0.0 <= value < 1.0
    if not ok:
        rule = "[0, 1]" if closed_right else "[0, 1)"
        raise ConfigError(f"{name} must lie in {rule}, got {value!r}")


# --- smooth sampling ------------------------------------------------------------------------------------------


def ar1_filter_matrix(horizon: int, smoothing: float) -> Tensor:
    """Lower-triangular matrix turning white noise into stationary unit-variance AR(1) noise.

    ``e = L @ n`` with ``n`` of shape (H, ...) i.i.d. N(0, 1) gives ``e_0 = n_0`` and
    ``e_t = s e_{t-1} + sqrt(1 - s^2) n_t``, so ``L @ L.T`` is the AR(1) correlation matrix ``s^|i - j|``.

    Args:
        horizon: H, number of time steps (>= 1).
        smoothing: s in [0, 1); 0 gives independent steps, values near 1 very smooth ones.

    Returns:
        L, shape (H, H), float32.
    """
    _check_count("horizon", horizon, 1)
    _check_unit_interval("smoothing", float(smoothing), closed_right=False)
    t = torch.arange(horizon, dtype=torch.float64)
    lag = t[:, None] - t[None, :]  # (H, H)
    power = torch.where(lag >= 0, torch.tensor(float(smoothing), dtype=torch.float64) ** lag.clamp(min=0), 0.0)
    scale = torch.full((horizon,), (1.0 - float(smoothing) ** 2) ** 0.5, dtype=torch.float64)
    scale[0] = 1.0  # the first step starts from the stationary distribution
    return (power * scale[None, :]).to(DTYPE)


def shift_warm_start(mean: Tensor, fill: Literal["last", "zero"] = "last") -> Tensor:
    """The previous plan advanced by one step, for the next receding-horizon decision.

    Args:
        mean: (B*, H, A) plan made at the previous decision; its step 0 has just been applied.
        fill: what the new final step holds: ``"last"`` repeats the old final step, ``"zero"`` puts zeros
            (no acceleration, straight wheels for the ego).

    Returns:
        (B*, H, A) float32: ``out[..., t, :] = mean[..., t + 1, :]`` for t < H - 1, then the fill.
    """
    mean = _sequence_tensor("mean", mean)
    if fill == "last":
        tail = mean[..., -1:, :]
    elif fill == "zero":
        tail = torch.zeros_like(mean[..., -1:, :])
    else:
        raise ConfigError(f"fill must be 'last' or 'zero', got {fill!r}")
    return torch.cat([mean[..., 1:, :], tail], dim=-2)


# --- CEM ------------------------------------------------------------------------------------------------------


def _costs(name: str, costs: object, samples: Tensor) -> Tensor:
    costs = _tensor(name, costs)
    if costs.shape != samples.shape[:-2]:
        raise ConfigError(
            f"{name} has shape {tuple(costs.shape)}; samples of shape {tuple(samples.shape)} need "
            f"costs of shape {tuple(samples.shape[:-2])} (B*, C)"
        )
    if bool((costs == -torch.inf).any()):
        raise ConfigError(f"{name} contains -inf; costs must be > -inf (use a large finite bonus instead)")
    # NaN can only come from a broken cost; rank it worst instead of letting it poison sorts and softmaxes.
    return torch.nan_to_num(costs, nan=torch.inf, posinf=torch.inf)


def select_elites(samples: Tensor, costs: Tensor, num_elites: int) -> Tensor:
    """The ``num_elites`` lowest-cost samples (ties broken by torch.topk).

    Args:
        samples: (B*, C, H, A).
        costs: (B*, C); NaN counts as +inf.
        num_elites: E, 1 <= E <= C.

    Returns:
        (B*, E, H, A), ordered from the lowest cost up.
    """
    samples = _tensor("samples", samples)
    if samples.ndim < 3:
        raise ConfigError(f"samples has shape {tuple(samples.shape)}; expected (B*, C, H, A)")
    costs = _costs("costs", costs, samples)
    _check_count("num_elites", num_elites, 1, samples.shape[-3])
    idx = torch.topk(costs, num_elites, dim=-1, largest=False, sorted=True).indices  # (B*, E)
    idx = idx[..., None, None].expand(*idx.shape, *samples.shape[-2:])  # (B*, E, H, A)
    return torch.gather(samples, -3, idx)


def cem_update(
    samples: Tensor,
    costs: Tensor,
    num_elites: int,
    old_mean: Tensor,
    old_std: Tensor,
    *,
    alpha: float = 1.0,
    min_std: Tensor | float = 0.0,
) -> tuple[Tensor, Tensor]:
    """One cross-entropy update of a diagonal Gaussian over action sequences.

    ``mean_new, std_new`` are the mean and maximum-likelihood standard deviation (divide by E) of the
    ``num_elites`` lowest-cost samples; then ``mean = alpha mean_new + (1 - alpha) old_mean``, likewise for
    ``std``, and ``std = max(std, min_std)``.

    Args:
        samples: (B*, C, H, A) candidate sequences.
        costs: (B*, C) their costs; NaN counts as +inf.
        num_elites: E, 1 <= E <= C.
        old_mean: (B*, H, A) mean the samples were drawn around.
        old_std: standard deviation they were drawn with, broadcastable to (B*, H, A).
        alpha: weight of the new estimate in [0, 1]; 1 means no smoothing.
        min_std: floor on the standard deviation (scalar or broadcastable to (B*, H, A)), against premature
            collapse.

    Returns:
        ``(mean, std)``, both (B*, H, A) float32.
    """
    _check_unit_interval("alpha", float(alpha), closed_right=True)
    elites = select_elites(samples, costs, num_elites)  # (B*, E, H, A)
    shape = elites.shape[:-3] + elites.shape[-2:]
    old_mean = _broadcast("old_mean", _tensor("old_mean", old_mean), shape, "(B*, H, A)")
    old_std = _broadcast("old_std", _tensor("old_std", old_std), shape, "(B*, H, A) or (A,)")
    min_std = _broadcast("min_std", _tensor("min_std", min_std), shape, "a scalar or (A,)")
    new_mean = elites.mean(dim=-3)
    new_std = elites.std(dim=-3, correction=0)
    mean = alpha * new_mean + (1.0 - alpha) * old_mean
    std = torch.maximum(alpha * new_std + (1.0 - alpha) * old_std, min_std)
    return mean, std


# --- MPPI -----------------------------------------------------------------------------------------------------


def _check_lambda(lam: float) -> float:
    lam = float(lam)
    if not (lam > 0.0 and lam < float("inf")):
        raise ConfigError(f"lam (MPPI temperature lambda) must be finite and > 0, got {lam!r}")
    return lam


def mppi_weights(costs: Tensor, lam: float) -> Tensor:
    """MPPI sample weights ``softmax(-(S - min S) / lambda)`` over the candidate axis.

    Subtracting the minimum cost leaves the weights unchanged and keeps ``exp`` from overflowing. Candidates with
    cost +inf (or NaN) get weight 0; a batch entry where every cost is +inf gets uniform weights.

    Args:
        costs: (B*, C) costs S.
        lam: temperature lambda > 0; small values favour the best sample, large ones average uniformly.

    Returns:
        (B*, C) float32 weights, each row summing to 1.
    """
    lam = _check_lambda(lam)
    costs = _tensor("costs", costs)
    if costs.ndim < 1 or costs.shape[-1] < 1:
        raise ConfigError(f"costs has shape {tuple(costs.shape)}; expected (B*, C) with C >= 1")
    if bool((costs == -torch.inf).any()):
        raise ConfigError("costs contains -inf; costs must be > -inf (use a large finite bonus instead)")
    costs = torch.nan_to_num(costs, nan=torch.inf, posinf=torch.inf)
    finite = torch.isfinite(costs)
    rho = torch.where(finite, costs, torch.inf).min(dim=-1, keepdim=True).values  # (B*, 1)
    rho = torch.where(torch.isfinite(rho), rho, 0.0)
    shifted = torch.where(finite, costs - rho, torch.inf)  # (B*, C), >= 0
    none_finite = ~finite.any(dim=-1, keepdim=True)
    shifted = torch.where(none_finite, 0.0, shifted)
    return torch.softmax(-shifted / lam, dim=-1)


def mppi_update(mean: Tensor, samples: Tensor, costs: Tensor, lam: float) -> Tensor:
    """One MPPI update ``U <- U + sum_k w_k eps_k`` with ``eps_k = samples_k - U``.

    The perturbations are measured from the (clipped) samples, so the update equals the weighted average of the
    samples and stays within the action bounds they respect.

    Args:
        mean: (B*, H, A) nominal sequence U the samples were drawn around.
        samples: (B*, C, H, A) candidate sequences.
        costs: (B*, C) their costs S.
        lam: temperature lambda > 0.

    Returns:
        (B*, H, A) float32 updated nominal sequence.
    """
    samples = _tensor("samples", samples)
    if samples.ndim < 3:
        raise ConfigError(f"samples has shape {tuple(samples.shape)}; expected (B*, C, H, A)")
    shape = samples.shape[:-3] + samples.shape[-2:]
    mean = _broadcast("mean", _tensor("mean", mean), shape, "(B*, H, A)")
    weights = mppi_weights(_costs("costs", costs, samples), lam)  # (B*, C)
    eps = samples - mean.unsqueeze(-3)  # (B*, C, H, A)
    return mean + torch.einsum("...c,...cha->...ha", weights, eps)

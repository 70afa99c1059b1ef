"""The stochastic forward model of traffic: a conditional VAE over each vehicle's next few seconds.

For every vehicle of the object list the model predicts its positions over the next H decision steps as a
residual on top of constant-velocity motion. A latent variable z per vehicle stands for what the history cannot
tell (will this driver yield? brake?); it is held for the whole horizon, so one draw of z is one coherent future.

* prior      p(z | history, ego plan)          -- used when sampling futures
* posterior  q(z | history, ego plan, future)  -- used in training only
* decoder    p(future | history, ego plan, z)  -- Gaussian per step and coordinate

Training maximises the conditional ELBO (Sohn, Lee, Yan, NeurIPS 2015; Kingma & Welling, ICLR 2014) with free
bits and KL annealing. The deterministic baseline has the same encoder and decoder without z, trained by least
squares, so it predicts the mean of the possible futures (Bishop, PRML, 2006, section 1.5.5); its predictive
variance is the residual variance measured on the training data after training.

The ego itself is not predicted: its path over the plan comes from the kinematic bicycle model
(:mod:`wmplan.model.ego`).
"""

from __future__ import annotations

import math

import torch
from torch import nn

from wmplan.model.config import ModelConfig
from wmplan.model.ego import EgoKinematics
from wmplan.model.nets import (
    RESIDUAL_SCALE_M,
    PlanEncoder,
    SceneEncoder,
    gaussian_params,
    mlp,
    randn_rows,
    reset_parameters,
)
from wmplan.sim.features import (
    F_LENGTH,
    F_VALID,
    F_VX,
    F_VY,
    F_X,
    F_Y,
    NUM_VEHICLE_FEATURES,
)

LOG_2PI = math.log(2.0 * math.pi)


def gaussian_kl(mu_q, logvar_q, mu_p, logvar_p):
    """KL(N(mu_q, var_q) || N(mu_p, var_p)) per dimension (closed form for diagonal Gaussians)."""
    return 0.5 * (logvar_p - logvar_q + (logvar_q.exp() + (mu_q - mu_p) ** 2) / logvar_p.exp() - 1.0)


class WorldModel(nn.Module):
    """Latent-variable (or, with ``cfg.deterministic``, least-squares) forward model of the other vehicles."""

    def __init__(self, cfg: ModelConfig, ego: EgoKinematics, *, generator: torch.Generator | None = None):
        super().__init__()
        self.cfg = cfg
        self.ego = ego
        d, hdim, hz = cfg.d_model, cfg.hidden, cfg.horizon
        self.zdim = 0 if cfg.deterministic else cfg.latent_dim
        self.encoder = SceneEncoder(cfg.history, d, cfg.num_heads, cfg.num_layers)
        self.plan = PlanEncoder(hz, d)
        self.decoder = mlp([2 * d + self.zdim, hdim, hdim, 4 * hz])
        if self.zdim:
            self.prior = mlp([2 * d, hdim, 2 * self.zdim])
            self.posterior = mlp([2 * d + 2 * hz, hdim, 2 * self.zdim])
        # Residual variance per step and coordinate, fitted after training (deterministic model only).
        self.register_buffer("fitted_logvar", torch.zeros(hz, 2))
        # Scale of the decoder's standard deviation, recalibrated on validation windows after training so that
        # central predictive intervals cover what they claim (Kuleshov, Fenner, Ermon, ICML 2018).
        self.register_buffer("noise_scale", torch.ones(()))
        if generator is not None:
            reset_parameters(self, generator)

    # --- pieces -----------------------------------------------------------------------------------------------

    def times_s(self) -> torch.Tensor:
        return torch.arange(1, self.cfg.horizon + 1, dtype=torch.float32) * self.cfg.plan_dt_s

    def cv_positions(self, history: torch.Tensor) -> torch.Tensor:
        """Constant-velocity positions (B, N, H, 2) from the last history rows."""
        last = history[:, -1]
        xy0 = last[..., [F_X, F_Y]]
        v0 = last[..., [F_VX, F_VY]]
        return xy0[:, :, None, :] + v0[:, :, None, :] * self.times_s()[None, None, :, None]

    def ego_future(self, batch: dict, actions: torch.Tensor) -> torch.Tensor:
        """Ego rows (B, C, H, 5) over plans ``actions`` (B, C, H, 2) by the kinematic model."""
        return self.ego.rollout(batch["ego_speed_mps"][:, None], batch["ego_steer_rad"][:, None], actions)

    def _decode(self, h: torch.Tensor, p: torch.Tensor, z: torch.Tensor | None):
        """h, p (..., N, D), z (..., N, Z) -> residual mean and log-variance (..., N, H, 2) in metres.

        h and p may carry fewer leading elements than z (broadcast over the samples axis): the first layer is
        split so that its history-and-plan part runs once per object and plan, and only the z part per sample.
        """
        first = self.decoder[0]
        d2 = h.shape[-1] + p.shape[-1]
        hp = torch.cat([h, p], dim=-1)
        if z is None:
            x = first(hp)
        else:
            x = torch.nn.functional.linear(hp, first.weight[:, :d2], first.bias) + \
                torch.nn.functional.linear(z, first.weight[:, d2:])
        mean, logvar = gaussian_params(self.decoder[1:](x))
        hz = self.cfg.horizon
        mean = mean.reshape(*mean.shape[:-1], hz, 2) * RESIDUAL_SCALE_M
        logvar = logvar.reshape(*logvar.shape[:-1], hz, 2) + 2.0 * math.log(RESIDUAL_SCALE_M)
        return mean, logvar

    # --- training ---------------------------------------------------------------------------------------------

    def loss(self, batch: dict, *, kl_weight: float = 1.0, free_bits: float = 0.0, prior_weight: float = 0.0,
             generator: torch.Generator | None = None) -> tuple[torch.Tensor, dict]:
        """Training loss of one batch of windows and its parts.

        The latent model's loss is the negative conditional ELBO (free bits on the KL) plus ``prior_weight`` times
        the likelihood of the future under a draw of z from the *prior* — the hybrid objective of Sohn et al.
        (2015), which keeps futures sampled from the prior (what the planner uses) likely, not only those decoded
        from the posterior.

        Returns (loss, metrics) with metrics under ``loss/...`` keys (floats).
        """
        hist, fut = batch["history"], batch["future"]
        h = self.encoder(hist, batch["road"])  # (B, N, D)
        ego_f = self.ego_future(batch, batch["actions"][:, None])  # (B, 1, H, 5)
        p = self.plan(hist[:, -1, :, :2], ego_f, batch["actions"][:, None])[:, 0]  # (B, N, D)
        target = fut[..., [F_X, F_Y]].permute(0, 2, 1, 3) - self.cv_positions(hist)  # (B, N, H, 2)
        mask = (fut[..., F_VALID] > 0.5).permute(0, 2, 1)  # (B, N, H)
        mask = mask & (hist[:, -1, :, F_VALID] > 0.5)[..., None]
        mask[:, 0] = False  # the ego is not predicted
        m = mask[..., None].float()
        n_obj = (mask.any(-1)).float().sum().clamp_min(1.0)
        metrics: dict[str, float] = {}
        if self.zdim == 0:
            mean, _ = self._decode(h, p, None)
            sq = ((mean - target) ** 2 * m).sum() / n_obj
            metrics["loss/mse"] = float(sq.detach()) / (2 * self.cfg.horizon)
            return sq, metrics
        target_scaled = (target * m / RESIDUAL_SCALE_M).flatten(-2)
        q_mu, q_lv = gaussian_params(self.posterior(torch.cat([h, p, target_scaled], -1)))
        p_mu, p_lv = gaussian_params(self.prior(torch.cat([h, p], -1)))
        eps = torch.randn(q_mu.shape, generator=generator)
        z = q_mu + (0.5 * q_lv).exp() * eps
        mean, logvar = self._decode(h, p, z)
        nll = 0.5 * (LOG_2PI + logvar + (target - mean) ** 2 / logvar.exp())
        nll = (nll * m).sum() / n_obj
        obj_mask = mask.any(-1).float()[..., None]  # (B, N, 1)
        kl_dim = gaussian_kl(q_mu, q_lv, p_mu, p_lv) * obj_mask  # (B, N, Z)
        kl_per_dim = kl_dim.sum((0, 1)) / n_obj  # (Z,)
        kl = kl_per_dim.sum()
        kl_fb = torch.clamp(kl_per_dim, min=free_bits).sum()
        loss = nll + kl_weight * kl_fb
        if prior_weight > 0.0:
            z_p = p_mu + (0.5 * p_lv).exp() * torch.randn(p_mu.shape, generator=generator)
            mean_p, logvar_p = self._decode(h, p, z_p)
            nll_p = 0.5 * (LOG_2PI + logvar_p + (target - mean_p) ** 2 / logvar_p.exp())
            nll_p = (nll_p * m).sum() / n_obj
            loss = loss + prior_weight * nll_p
            metrics["loss/nll_prior"] = float(nll_p.detach())
        metrics.update({"loss/nll": float(nll.detach()), "loss/kl": float(kl.detach()), "loss/total": float(loss.detach())})
        return loss, metrics

    # --- sampling ---------------------------------------------------------------------------------------------

    @torch.inference_mode()
    def sample(self, batch: dict, actions: torch.Tensor, num_samples: int, *, generator: torch.Generator,
               noise: bool = False) -> dict:
        """Sample futures of every object under C plans.

        Args:
            batch: ``history`` (B, W, N, F), ``road`` (B, 6), ``ego_speed_mps`` (B,), ``ego_steer_rad`` (B,).
            actions: (B, C, H, 2) ego plans.
            num_samples: K futures per plan; the K draws of z are shared by all plans (common random numbers).
            generator: the only source of randomness; a list of B generators draws each scene's futures from its
                own generator (results then do not depend on the batch).
            noise: also add the decoder's per-step Gaussian noise (for predictive intervals); without it a future
                is the decoder mean for its draw of z.

        Returns:
            dict with ``rows`` (B, C, K, H, N, F) predicted object rows in the anchor frame (the ego's from the
            kinematic model), and ``mean`` / ``logvar`` (B, C, K, N, H, 2) of the residuals.
        """
        cfg = self.cfg
        hist = batch["history"]
        b, c = actions.shape[:2]
        n = hist.shape[2]
        k = int(num_samples)
        h = self.encoder(hist, batch["road"])  # (B, N, D)
        ego_f = self.ego_future(batch, actions)  # (B, C, H, 5)
        p = self.plan(hist[:, -1, :, :2], ego_f, actions)  # (B, C, N, D)
        hb = h[:, None].expand(b, c, n, -1)
        if self.zdim:
            p_mu, p_lv = gaussian_params(self.prior(torch.cat([hb, p], -1)))  # (B, C, N, Z)
            eps = randn_rows((b, 1, k, n, self.zdim), generator)
            z = p_mu[:, :, None] + (0.5 * p_lv[:, :, None]).exp() * eps  # (B, C, K, N, Z)
            mean, logvar = self._decode(hb[:, :, None], p[:, :, None], z)
        else:
            mean, _ = self._decode(hb, p, None)
            mean = mean[:, :, None].expand(b, c, k, n, cfg.horizon, 2)
            logvar = self.fitted_logvar.expand(b, c, k, n, cfg.horizon, 2)
        logvar = logvar + 2.0 * torch.log(self.noise_scale)
        xy = self.cv_positions(hist)[:, None, None] + mean  # (B, C, K, N, H, 2)
        if noise:
            xy = xy + (0.5 * logvar).exp() * randn_rows(tuple(xy.shape), generator)
        rows = self.assemble_rows(hist, xy, ego_f)
        return {"rows": rows, "mean": mean, "logvar": logvar}

    def assemble_rows(self, hist: torch.Tensor, xy: torch.Tensor, ego_f: torch.Tensor) -> torch.Tensor:
        """Object rows (B, C, K, H, N, F) from predicted positions (B, C, K, N, H, 2) and the ego path (B, C, H, 5)."""
        dt = self.cfg.plan_dt_s
        last = hist[:, -1]  # (B, N, F)
        b, c, k, n, hz, _ = xy.shape
        pos = xy.transpose(-2, -3)  # (B, C, K, H, N, 2)
        prev = torch.cat([last[:, None, None, None, :, :2].expand(b, c, k, 1, n, 2), pos[..., :-1, :, :]], dim=-3)
        vel = (pos - prev) / dt
        # the ego's own path, the same in every future
        ego = ego_f[:, :, None, :, None, :].expand(b, c, k, hz, 1, 5)
        pos = torch.cat([ego[..., :2], pos[..., 1:, :]], dim=-2)
        vel = torch.cat([ego[..., 2:4], vel[..., 1:, :]], dim=-2)
        heading = torch.atan2(vel[..., 1], vel[..., 0].clamp_min(0.1))
        heading = torch.cat([ego[..., 4], heading[..., 1:]], dim=-1)
        static = last[:, None, None, None, :, F_LENGTH:].expand(b, c, k, hz, n, NUM_VEHICLE_FEATURES - F_LENGTH)
        rows = torch.cat([pos, vel, heading[..., None], static], dim=-1)
        return rows * (static[..., -1:] > 0.5)

    @torch.no_grad()
    def residuals(self, batch: dict) -> tuple[torch.Tensor, torch.Tensor]:
        """Mean-prediction residuals (B, N, H, 2) and their mask (B, N, H) on a batch (for fitting variances)."""
        hist, fut = batch["history"], batch["future"]
        target = fut[..., [F_X, F_Y]].permute(0, 2, 1, 3) - self.cv_positions(hist)
        mask = (fut[..., F_VALID] > 0.5).permute(0, 2, 1) & (hist[:, -1, :, F_VALID] > 0.5)[..., None]
        mask[:, 0] = False
        if self.zdim:
            raise ValueError("residuals() is for the deterministic model")
        h = self.encoder(hist, batch["road"])
        ego_f = self.ego_future(batch, batch["actions"][:, None])
        p = self.plan(hist[:, -1, :, :2], ego_f, batch["actions"][:, None])[:, 0]
        mean, _ = self._decode(h, p, None)
        return target - mean, mask

    def num_parameters(self) -> int:
        return sum(p.numel() for p in self.parameters())

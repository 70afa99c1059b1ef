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
from torch.nn import functional as F

from wmplan.model import inference
from wmplan.model.config import ModelConfig
from wmplan.model.ego import EgoKinematics
from wmplan.model.nets import (
    LOGVAR_MAX,
    LOGVAR_MIN,
    RESIDUAL_SCALE_M,
    PlanEncoder,
    SceneEncoder,
    gaussian_params,
    mlp,
    randn_rows,
    reset_parameters,
)
from wmplan.sim.features import (
    F_HEADING,
    F_LENGTH,
    F_VALID,
    F_VX,
    F_VY,
    F_X,
    F_Y,
    NUM_VEHICLE_FEATURES,
)

LOG_2PI = math.log(2.0 * math.pi)
assert (F_Y, F_VY) == (F_X + 1, F_VX + 1), "positions and velocities are read as adjacent column pairs"


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
        """(H,) seconds of the horizon steps after the anchor."""
        return torch.arange(1, self.cfg.horizon + 1, dtype=torch.float32) * self.cfg.plan_dt_s

    def cv_positions(self, history: torch.Tensor) -> torch.Tensor:
        """Constant-velocity positions (B, N, H, 2) from the last history rows."""
        last = history[:, -1]
        xy0 = last[..., F_X : F_Y + 1]  # (x, y) and (vx, vy) are adjacent columns (wmplan.sim.features)
        v0 = last[..., F_VX : F_VY + 1]
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
            x = torch.nn.functional.linear(hp, first.weight[:, :d2], first.bias) + torch.nn.functional.linear(
                z, first.weight[:, d2:]
            )
        mean, logvar = gaussian_params(self.decoder[1:](x))
        hz = self.cfg.horizon
        mean = mean.reshape(*mean.shape[:-1], hz, 2) * RESIDUAL_SCALE_M
        logvar = logvar.reshape(*logvar.shape[:-1], hz, 2) + 2.0 * math.log(RESIDUAL_SCALE_M)
        return mean, logvar

    # --- training ---------------------------------------------------------------------------------------------

    def loss(
        self,
        batch: dict,
        *,
        kl_weight: float = 1.0,
        free_bits: float = 0.0,
        prior_weight: float = 0.0,
        nll_beta: float = 0.0,
        generator: torch.Generator | None = None,
    ) -> tuple[torch.Tensor, dict]:
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
        nll_each = 0.5 * (LOG_2PI + logvar + (target - mean) ** 2 / logvar.exp())
        nll = (nll_each * m).sum() / n_obj
        fit = nll if nll_beta == 0.0 else (nll_each * (nll_beta * logvar.detach()).exp() * m).sum() / n_obj
        obj_mask = mask.any(-1).float()[..., None]  # (B, N, 1)
        kl_dim = gaussian_kl(q_mu, q_lv, p_mu, p_lv) * obj_mask  # (B, N, Z)
        kl_per_dim = kl_dim.sum((0, 1)) / n_obj  # (Z,)
        kl = kl_per_dim.sum()
        kl_fb = torch.clamp(kl_per_dim, min=free_bits).sum()
        loss = fit + kl_weight * kl_fb
        if prior_weight > 0.0:
            z_p = p_mu + (0.5 * p_lv).exp() * torch.randn(p_mu.shape, generator=generator)
            mean_p, logvar_p = self._decode(h, p, z_p)
            nll_p = 0.5 * (LOG_2PI + logvar_p + (target - mean_p) ** 2 / logvar_p.exp())
            nll_p = (nll_p * m).sum() / n_obj
            loss = loss + prior_weight * nll_p
            metrics["loss/nll_prior"] = float(nll_p.detach())
        metrics.update(
            {"loss/nll": float(nll.detach()), "loss/kl": float(kl.detach()), "loss/total": float(loss.detach())}
        )
        return loss, metrics

    # --- sampling ---------------------------------------------------------------------------------------------

    @torch.inference_mode()
    def sample(
        self,
        batch: dict,
        actions: torch.Tensor,
        num_samples: int,
        *,
        generator: torch.Generator,
        noise: bool = False,
        moments: bool = True,
    ) -> dict:
        """Sample futures of every object under C plans.

        Args:
            batch: ``history`` (B, W, N, F), ``road`` (B, 6), ``ego_speed_mps`` (B,), ``ego_steer_rad`` (B,).
            actions: (B, C, H, 2) ego plans.
            num_samples: K futures per plan; the K draws of z are shared by all plans (common random numbers).
            generator: the only source of randomness; a list of B generators draws each scene's futures from its
                own generator (results then do not depend on the batch).
            noise: also add the decoder's per-step Gaussian noise (for predictive intervals); without it a future
                is the decoder mean for its draw of z.
            moments: also return the residuals' means and log-variances. The planner needs only the rows: without
                moments (and without noise) the decoder's last layer computes the means alone.

        Returns:
            dict with ``rows`` (B, C, K, H, N, F) predicted object rows in the anchor frame (the ego's from the
            kinematic model; a view of feature planes, see :meth:`assemble_rows`), and with ``moments``
            ``mean`` / ``logvar`` (B, C, K, N, H, 2) of the residuals (``mean`` and ``logvar`` may be views:
            broadcast, or the two halves of one tensor).

        The layers run on weights laid out for inference (:mod:`wmplan.model.inference`), every piece at its own
        broadcast shape: the scene once per object, the plan and the prior once per object and plan, only the
        decoder from its first layer's latent part on once per sample, in groups of plans
        (``benchmarks/model_throughput.py`` replays these steps one by one).
        """
        cfg = self.cfg
        hist = batch["history"]
        b, c = actions.shape[:2]
        n = hist.shape[2]
        k = int(num_samples)
        pw = inference.prepared(self)
        h = inference.by_object(inference.encode_scene(pw, hist, batch["road"]))  # (N, B, D)
        ego_f = self.ego_future(batch, actions)  # (B, C, H, 5)
        p = inference.encode_plan(pw, hist[:, -1, :, :2], ego_f, actions)  # (N, B, C, D)
        z = None
        if self.zdim:  # the same standard normals for every plan (common random numbers)
            eps = randn_rows((b, 1, k, n, self.zdim), generator).permute(3, 0, 1, 2, 4)  # (N, B, 1, K, Z)
            z = inference.draw_latent(pw, h, p, eps)  # (N, B, C, K, Z)
        hp = inference.decoder_first(pw, h, p)  # (N, B, C, hidden)
        cv = self.cv_positions(hist)  # (B, N, H, 2)
        if not (moments or noise):  # the rows alone: the decoder writes the residual means into the planes
            planes = self.empty_planes(b, c, k, n, dtype=hist.dtype)
            pos = planes[F_X : F_Y + 1]  # (2, N, B, C, K, H)
            if z is None:
                resid = inference.residual_means(pw, inference.decoder_hidden(pw, hp, None))  # (N, B, C, H, 2)
                pos.copy_(resid.permute(4, 0, 1, 2, 3)[..., None, :].expand_as(pos))
            else:
                inference.write_positions(pw, hp, z, pos)
            pos += (cv + pw.mean_b).permute(3, 1, 0, 2)[:, :, :, None, None]  # the last layer's bias joins cv
            return {"rows": self.finish_rows(hist, planes, ego_f)}
        hidden = inference.decoder_hidden(pw, hp, z)
        if self.zdim:
            mean, logvar = (t.permute(1, 2, 3, 0, 4, 5) for t in self.decoder_output(hidden))
        else:
            mean = (inference.residual_means(pw, hidden) + pw.mean_b).permute(1, 2, 0, 3, 4)
            mean = mean[:, :, None].expand(b, c, k, n, cfg.horizon, 2)
            logvar = (self.fitted_logvar + 2.0 * torch.log(self.noise_scale)).expand(b, c, k, n, cfg.horizon, 2)
        cv = cv[:, None, None]  # (B, 1, 1, N, H, 2)
        if noise:
            xy = cv + mean + (0.5 * logvar).exp() * randn_rows((b, c, k, n, cfg.horizon, 2), generator)
        else:
            xy = (cv, mean)  # summed by assemble_rows
        rows = self.assemble_rows(hist, xy, ego_f)
        return {"rows": rows, "mean": mean, "logvar": logvar} if moments else {"rows": rows}

    def decoder_output(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """The decoder's last layer on its hidden activations x (..., hidden), returned as the residual mean and
        log-variance (..., H, 2) in metres, the log-variance with the calibrated noise scale (what
        :func:`gaussian_params` and the scales of :meth:`_decode` give). The residual scale is folded into the
        layer's mean rows, so the output takes two passes (clamp and offset of the log-variance) instead of four;
        mean and log-variance are views of one tensor."""
        last = self.decoder[-1]
        hz = self.cfg.horizon
        scale = torch.ones(4 * hz, dtype=last.weight.dtype)
        scale[: 2 * hz] = RESIDUAL_SCALE_M
        out = F.linear(x, last.weight * scale[:, None], last.bias * scale)
        mean, logvar = out.unflatten(-1, (2, hz, 2)).unbind(-3)
        logvar.clamp_(LOGVAR_MIN, LOGVAR_MAX).add_(2.0 * math.log(RESIDUAL_SCALE_M) + 2.0 * torch.log(self.noise_scale))
        return mean, logvar

    def assemble_rows(
        self, hist: torch.Tensor, xy: torch.Tensor | tuple[torch.Tensor, torch.Tensor], ego_f: torch.Tensor
    ) -> torch.Tensor:
        """Object rows (B, C, K, H, N, F) from predicted positions (B, C, K, N, H, 2) and the ego path (B, C, H, 5).

        ``xy`` is the positions, or a pair (base, residual) of tensors that broadcast to them and are summed here
        (constant-velocity positions and the decoder's residuals: one pass instead of two).

        Velocities are the finite differences of the positions (from the last history row on), headings
        atan2(vy, max(vx, 0.1)), sizes and validity from the last history row; the ego's row is its own path, the
        same in every future; rows of empty slots are zero.

        The rows are returned as a view of feature planes: storage (F, N, B, C, K, H), one contiguous block per
        feature and vehicle, permuted to the (B, C, K, H, N, F) shape. Every feature is computed in place on its
        own plane (no strided row writes), and the risk computations, which want exactly these planes
        (:mod:`wmplan.plan.risk`), read them without a copy. ``rows.contiguous()`` gives the row-major layout.
        """
        base, resid = xy if isinstance(xy, tuple) else (xy, None)
        shape = torch.broadcast_shapes(base.shape, resid.shape) if resid is not None else base.shape
        b, c, k, n = shape[:4]
        planes = self.empty_planes(b, c, k, n, dtype=base.dtype)
        order = (5, 3, 0, 1, 2, 4)  # (B, C, K, N, H, 2) -> (2, N, B, C, K, H)
        pos = planes[F_X : F_Y + 1]
        if resid is None:
            pos.copy_(base.expand(shape).permute(order))
        else:
            torch.add(base.expand(shape).permute(order), resid.expand(shape).permute(order), out=pos)
        return self.finish_rows(hist, planes, ego_f)

    def empty_planes(self, b: int, c: int, k: int, n: int, *, dtype: torch.dtype) -> torch.Tensor:
        """Uninitialised feature planes (F, N, B, C, K, H) for :meth:`finish_rows`."""
        return torch.empty(NUM_VEHICLE_FEATURES, n, b, c, k, self.cfg.horizon, dtype=dtype)

    def finish_rows(self, hist: torch.Tensor, planes: torch.Tensor, ego_f: torch.Tensor) -> torch.Tensor:
        """The rows (B, C, K, H, N, F), a view of ``planes`` (F, N, B, C, K, H) whose position planes hold the
        predicted positions: the other features written in place on their planes (see :meth:`assemble_rows`)."""
        dt = self.cfg.plan_dt_s
        _, n, b, c, k, hz = planes.shape
        dtype = planes.dtype
        last = hist[:, -1]  # (B, N, F)
        valid = (last[..., F_VALID] > 0.5).to(dtype)  # (B, N)
        pos = planes[F_X : F_Y + 1]
        pos *= valid.t().reshape(1, n, b, 1, 1, 1)  # empty slots zeroed (their velocities and headings follow)
        vel = planes[F_VX : F_VY + 1]
        torch.sub(pos[..., 1:], pos[..., :-1], out=vel[..., 1:])
        prev = (last[..., F_X : F_Y + 1] * valid[..., None]).permute(2, 1, 0).reshape(2, n, b, 1, 1)
        torch.sub(pos[..., 0], prev, out=vel[..., 0])
        vel /= dt
        torch.atan2(vel[1], vel[0].clamp_min(0.1), out=planes[F_HEADING])
        static = (last[..., F_LENGTH:] * valid[..., None]).permute(2, 1, 0)  # (3, N, B)
        planes[F_LENGTH:].copy_(
            static.reshape(NUM_VEHICLE_FEATURES - F_LENGTH, n, b, 1, 1, 1).expand(-1, -1, -1, c, k, hz)
        )
        # the ego's own path, the same in every future
        ego = (ego_f * valid[:, :1].view(b, 1, 1, 1)).permute(3, 0, 1, 2)  # (5, B, C, H)
        planes[:F_LENGTH, 0].copy_(ego[:, :, :, None].expand(-1, -1, -1, k, -1))
        return planes.permute(2, 3, 4, 5, 1, 0)

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
        """Number of trainable numbers."""
        return sum(p.numel() for p in self.parameters())

"""The constant-velocity predictor: every other vehicle keeps its current velocity.

It has no parameters but a residual variance per horizon step and coordinate, measured on training windows, so
that its negative log-likelihood and prediction intervals can be compared with the learned models'.
"""

from __future__ import annotations

import torch

from wmplan.model.config import ModelConfig
from wmplan.model.ego import EgoKinematics
from wmplan.model.nets import randn_rows
from wmplan.model.world_model import WorldModel


class ConstantVelocity:
    """Same ``sample`` interface as :class:`~wmplan.model.world_model.WorldModel`; K identical futures."""

    def __init__(self, cfg: ModelConfig, ego: EgoKinematics, logvar: torch.Tensor | None = None):
        self.cfg = cfg
        self.ego = ego
        self._helper = WorldModel(ModelConfig(**{**cfg.to_dict(), "deterministic": True}), ego)
        self.logvar = torch.zeros(cfg.horizon, 2) if logvar is None else logvar

    def fit_variance(self, batches) -> None:
        """Residual variance of constant-velocity motion, per step and coordinate, over ``batches``."""
        total = torch.zeros(self.cfg.horizon, 2)
        count = torch.zeros(self.cfg.horizon, 1)
        for batch in batches:
            hist, fut = batch["history"], batch["future"]
            r = fut[..., :2].permute(0, 2, 1, 3) - self._helper.cv_positions(hist)
            m = (fut[..., 7] > 0.5).permute(0, 2, 1) & (hist[:, -1, :, 7] > 0.5)[..., None]
            m[:, 0] = False
            total += (r**2 * m[..., None]).sum((0, 1))
            count += m.sum((0, 1))[:, None]
        self.logvar = torch.log(total / count.clamp_min(1.0) + 1e-4)

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
        """K constant-velocity futures (identical unless ``noise``) in the rows layout of :meth:`WorldModel.sample`."""
        hist = batch["history"]
        b, c = actions.shape[:2]
        n = hist.shape[2]
        k = int(num_samples)
        hz = self.cfg.horizon
        ego_f = self._helper.ego_future(batch, actions)
        mean = torch.zeros(b, c, k, n, hz, 2)
        logvar = self.logvar.expand(b, c, k, n, hz, 2)
        xy = self._helper.cv_positions(hist)[:, None, None].expand(b, c, k, n, hz, 2)
        if noise:
            xy = xy + (0.5 * logvar).exp() * randn_rows(tuple(xy.shape), generator)
        rows = self._helper.assemble_rows(hist, xy, ego_f)
        return {"rows": rows, "mean": mean, "logvar": logvar} if moments else {"rows": rows}

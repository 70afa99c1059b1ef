"""Small torch modules of the forward model. Letters: B scenes, C candidate plans, K samples, N objects,
W history steps, H horizon steps, D embedding width, Z latent size.

The model only sees tensors in the anchor frame and a feature list; it knows nothing of lanes or scenarios.
"""

from __future__ import annotations

import math

import torch
from torch import nn
from torch.nn import functional as F

from wmplan.sim.features import F_LENGTH, F_VALID, F_VX, F_VY, F_WIDTH, F_X, F_Y

# Fixed input scales (metres, metres per second): common practice, chosen so inputs are of order one.
POS_SCALE_X_M = 50.0
POS_SCALE_Y_M = 10.0
VEL_SCALE_X_MPS = 20.0
VEL_SCALE_Y_MPS = 2.0
SIZE_SCALE_M = 5.0
ROAD_SCALE = (1.0, 250.0, 3.0, 3.0, 250.0, 250.0)
ACTION_SCALE = (3.0, 0.5)
RESIDUAL_SCALE_M = 5.0
LOGVAR_MIN, LOGVAR_MAX = -7.0, 7.0


Generators = "torch.Generator | list[torch.Generator]"


def randn_rows(shape: tuple[int, ...], generator) -> torch.Tensor:
    """Standard normal draws of ``shape``. With one generator, one draw; with a list of ``shape[0]`` generators,
    row b is drawn from generator b alone — so a scene's draws do not depend on the other scenes of its batch."""
    if isinstance(generator, torch.Generator):
        return torch.randn(shape, generator=generator)
    if len(generator) != shape[0]:
        raise ValueError(f"{len(generator)} generators for {shape[0]} rows")
    return torch.stack([torch.randn(shape[1:], generator=g) for g in generator])


def mlp(sizes: list[int], *, final_act: bool = False) -> nn.Sequential:
    """Linear layers with GELU between them."""
    layers: list[nn.Module] = []
    for i in range(len(sizes) - 1):
        layers.append(nn.Linear(sizes[i], sizes[i + 1]))
        if i < len(sizes) - 2 or final_act:
            layers.append(nn.GELU())
    return nn.Sequential(*layers)


OBJECT_STEP_FEATURES = (
    (F_X, POS_SCALE_X_M),
    (F_Y, POS_SCALE_Y_M),
    (F_VX, VEL_SCALE_X_MPS),
    (F_VY, VEL_SCALE_Y_MPS),
    (F_VALID, 1.0),
)
"""The object encoder's inputs per history step: (feature column, scale it is divided by)."""
OBJECT_STATIC_FEATURES = ((F_LENGTH, SIZE_SCALE_M), (F_WIDTH, 2.0))
"""Then the last step's size, (feature column, scale), and an is-ego flag."""


def object_features(history: torch.Tensor) -> torch.Tensor:
    """Per-object input vector (B, N, 5 W + 3) from history rows (B, W, N, F)."""
    b, w, n, _ = history.shape
    steps = torch.stack([history[..., col] / scale for col, scale in OBJECT_STEP_FEATURES], dim=-1)  # (B, W, N, 5)
    steps = steps.permute(0, 2, 1, 3).reshape(b, n, w * len(OBJECT_STEP_FEATURES))
    last = history[:, -1]
    is_ego = torch.zeros(b, n, 1, dtype=history.dtype)
    is_ego[:, 0] = 1.0
    static = [last[..., col : col + 1] / scale for col, scale in OBJECT_STATIC_FEATURES]
    return torch.cat([steps, *static, is_ego], dim=-1)


class SceneEncoder(nn.Module):
    """Embeds every object of the history and lets them attend to each other (a permutation-equivariant block)."""

    def __init__(self, history: int, d_model: int, num_heads: int, num_layers: int):
        super().__init__()
        self.obj = mlp([5 * history + 3, d_model, d_model])
        self.road = mlp([6, d_model])
        layer = nn.TransformerEncoderLayer(
            d_model,
            num_heads,
            dim_feedforward=2 * d_model,
            dropout=0.0,
            activation="gelu",
            batch_first=True,
            norm_first=True,
        )
        # the module holds the layers' weights; forward() runs them with encoder_layer()
        self.blocks = nn.TransformerEncoder(layer, num_layers, enable_nested_tensor=False)
        self.norm = nn.LayerNorm(d_model)
        self.register_buffer("road_scale", torch.tensor(ROAD_SCALE), persistent=False)

    def forward(self, history: torch.Tensor, road: torch.Tensor) -> torch.Tensor:
        """history (B, W, N, F), road (B, 6) -> embeddings (B, N, D)."""
        valid = history[:, -1, :, F_VALID] > 0.5  # (B, N)
        h = self.obj(object_features(history)) + self.road(road / self.road_scale)[:, None, :]
        attend = valid[:, None, None, :]  # (B, 1, 1, N): every object attends to the objects present
        for layer in self.blocks.layers:
            h = encoder_layer(layer, h, attend)
        return self.norm(h) * valid[..., None]


def encoder_layer(layer: nn.TransformerEncoderLayer, x: torch.Tensor, attend: torch.Tensor) -> torch.Tensor:
    """One pre-norm self-attention layer, x + attention(norm1(x)), then + feed-forward(norm2(x)), computed with the
    weights of ``layer`` (an ``nn.TransformerEncoderLayer`` with ``norm_first``, GELU and no dropout): the same
    arithmetic as that module's own training-mode path, in fewer and cheaper calls than its inference kernel on a
    handful of objects. ``attend`` (B, 1, 1, N) is True where a key is an object that is present."""
    attn = layer.self_attn
    b, n, d = x.shape
    heads = attn.num_heads
    y = layer.norm1(x)
    q, k, v = (
        F.linear(y, attn.in_proj_weight, attn.in_proj_bias).view(b, n, 3, heads, d // heads).permute(2, 0, 3, 1, 4)
    )
    a = attention(q, k, v, attend).transpose(1, 2).reshape(b, n, d)
    x = x + attn.out_proj(a)
    return x + layer.linear2(F.gelu(layer.linear1(layer.norm2(x))))


def attention(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, attend: torch.Tensor) -> torch.Tensor:
    """Scaled dot-product attention, softmax(q k^T / sqrt(d) where ``attend``, else -inf) v, on (B, heads, N, d)
    with ``attend`` (B, 1, 1, N) over the keys (Vaswani et al., NeurIPS 2017): the same function as
    ``F.scaled_dot_product_attention`` with a boolean mask, written out with batched matrix products. The scores
    are formed transposed, keys along the second-to-last axis, because torch's CPU softmax is vectorised across the
    axis after the one it normalises. Over a handful of objects this is the faster way on a CPU: measured on 256
    scenes x 9 objects, torch's fused kernel took about a sixth of a training step (forward and backward), and a
    softmax over a last axis of 9 twice the time of this one."""
    scores_t = torch.matmul(k, q.transpose(-1, -2)) * (1.0 / math.sqrt(q.shape[-1]))  # (B, heads, keys, queries)
    scores_t = scores_t.masked_fill(~attend.transpose(-1, -2), float("-inf"))
    return torch.matmul(torch.softmax(scores_t, dim=-2).transpose(-1, -2), v)


class PlanEncoder(nn.Module):
    """Embeds the ego's planned motion as seen from each object (relative positions, ego velocity, actions)."""

    def __init__(self, horizon: int, d_model: int):
        super().__init__()
        self.net = mlp([6 * horizon, d_model, d_model])
        self.register_buffer("action_scale", torch.tensor(ACTION_SCALE), persistent=False)
        self.register_buffer(
            "input_scale",
            torch.tensor((POS_SCALE_X_M, POS_SCALE_Y_M, VEL_SCALE_X_MPS, VEL_SCALE_Y_MPS, *ACTION_SCALE)),
            persistent=False,
        )

    def forward(self, obj_xy: torch.Tensor, ego_future: torch.Tensor, actions: torch.Tensor) -> torch.Tensor:
        """obj_xy (B, N, 2), ego_future (B, C, H, >=4), actions (B, C, H, 2) -> (B, C, N, D).

        The input seen from one object is, per plan step, the ego's position relative to the object, the ego's
        velocity and the action, each divided by its scale (6 H numbers). The object's position is the same at
        every step and the first layer is linear, so that layer is computed by parts: the ego's part once per plan
        (B, C) and the object's part once per object (B, N), with the weights of the relative positions summed over
        the steps; the two are subtracted by broadcasting (the same map as on the full input, up to rounding).
        """
        first = self.net[0]
        per_plan = torch.cat([ego_future[..., :4], actions], dim=-1) / self.input_scale  # (B, C, H, 6)
        w_obj = first.weight.unflatten(-1, (per_plan.shape[-2], 6))[..., :2].sum(-2)  # (D, 2)
        x = (
            F.linear(per_plan.flatten(-2), first.weight, first.bias)[:, :, None]
            - F.linear(obj_xy / self.input_scale[:2], w_obj)[:, None]
        )  # (B, C, N, D)
        return run_layers(self.net[1:], x)


def run_layers(layers: nn.Sequential, x: torch.Tensor) -> torch.Tensor:
    """``layers(x)``; without autograd, on a tensor the caller gives up, GELU activations are applied in place (no
    new tensor per activation); other layers are called as they are."""
    for layer in layers:
        if isinstance(layer, nn.GELU) and not torch.is_grad_enabled():
            x = torch.ops.aten.gelu_(x, approximate=layer.approximate)
        else:
            x = layer(x)
    return x


def gaussian_params(out: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Split the last axis into mean and log-variance (clamped)."""
    mean, logvar = out.chunk(2, dim=-1)
    return mean, logvar.clamp(LOGVAR_MIN, LOGVAR_MAX)


def reset_parameters(module: nn.Module, generator: torch.Generator) -> None:
    """Re-initialise every parameter from ``generator`` (no global seeding): weights and biases of linear
    layers uniform in +-1/sqrt(fan_in), as torch's default; layer norms to identity."""
    with torch.no_grad():
        for m in module.modules():
            if isinstance(m, nn.Linear):
                bound = 1.0 / math.sqrt(m.in_features)
                m.weight.uniform_(-bound, bound, generator=generator)
                if m.bias is not None:
                    m.bias.uniform_(-bound, bound, generator=generator)
            elif isinstance(m, nn.MultiheadAttention):
                bound = 1.0 / math.sqrt(m.embed_dim)
                m.in_proj_weight.uniform_(-bound, bound, generator=generator)
                m.in_proj_bias.zero_()
            elif isinstance(m, nn.LayerNorm):
                m.weight.fill_(1.0)
                m.bias.zero_()

"""The forward model's sampling path with weights laid out for inference.

``WorldModel.sample`` computes the same functions as the training modules (``nn.Linear``, ``nn.LayerNorm``, the
attention of :func:`wmplan.model.nets.encoder_layer`), but with weights prepared once per set of parameters:

* every weight matrix transposed to (in, out) and stored contiguously, so a layer is one ``torch.addmm`` on the
  row-major layout that the CPU matrix multiply runs fastest (``F.linear`` multiplies by a transposed view of the
  (out, in) weight: measured 2.28 ms against 1.98 ms for 4608 x 128 by 128 x 128 on this project's 2-core
  machine, one thread; and 25 against 16 microseconds at the plan encoder's 64 x 90 by 90 x 64);
* fixed input scales folded into the first layers' weights (the object features, the road features, the plan's
  inputs), and the attention's 1 / sqrt(head width) into the query projection;
* first layers whose inputs are concatenations split by part (the scene, the plan, the latent), so that each part
  runs once at its own broadcast shape (see :meth:`WorldModel.sample`).

Folding a scale into a weight changes the rounding, not the function: the sampled rows agree with the modules'
own forward to float32 rounding (``tests/model/test_inference.py``). Weights are rebuilt whenever a parameter or
buffer changes (an optimizer step, ``load_state_dict``): :func:`prepared` keys its cache on every tensor's
in-place version counter and storage.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
from torch.nn import functional as F

from wmplan.model.nets import (
    ACTION_SCALE,
    LOGVAR_MAX,
    LOGVAR_MIN,
    OBJECT_STATIC_FEATURES,
    OBJECT_STEP_FEATURES,
    POS_SCALE_X_M,
    POS_SCALE_Y_M,
    RESIDUAL_SCALE_M,
    ROAD_SCALE,
    VEL_SCALE_X_MPS,
    VEL_SCALE_Y_MPS,
)
from wmplan.sim.features import F_VALID, NUM_VEHICLE_FEATURES

CHUNK_ROWS = 8192
"""Rows of the decoder's hidden activations computed at once by :func:`write_positions` (4 MB at 128 wide)."""


@dataclass(frozen=True)
class Block:
    """One pre-norm self-attention layer's weights, (in, out) and contiguous."""

    ln1: tuple[torch.Tensor, torch.Tensor, float]
    qkv_w: torch.Tensor
    qkv_b: torch.Tensor
    out_w: torch.Tensor
    out_b: torch.Tensor
    ln2: tuple[torch.Tensor, torch.Tensor, float]
    ff1_w: torch.Tensor
    ff1_b: torch.Tensor
    ff2_w: torch.Tensor
    ff2_b: torch.Tensor
    heads: int


@dataclass(frozen=True)
class Prepared:
    """Every weight ``WorldModel.sample`` uses, laid out for inference."""

    obj1_w: torch.Tensor  # (W x F, D): the flattened history rows of an object, scales folded in
    obj1_b: torch.Tensor
    ego_w: torch.Tensor  # (D,): the is-ego input's column, added to row 0
    obj2_w: torch.Tensor
    obj2_b: torch.Tensor
    road_w: torch.Tensor
    road_b: torch.Tensor
    blocks: tuple[Block, ...]
    norm: tuple[torch.Tensor, torch.Tensor, float]
    plan1_w: torch.Tensor  # (6 H, D), the plan's inputs over their scales
    plan1_b: torch.Tensor
    plan_obj_w: torch.Tensor  # (2, D), an object's position, summed over the steps, scales folded in
    plan2_w: torch.Tensor
    plan2_b: torch.Tensor
    prior_h_w: torch.Tensor | None
    prior_p_w: torch.Tensor | None
    prior1_b: torch.Tensor | None
    prior2_w: torch.Tensor | None  # (hidden, 2 Z): the log-variance half halved (z's scale is exp(logvar / 2))
    prior2_b: torch.Tensor | None
    dec_h_w: torch.Tensor
    dec_p_w: torch.Tensor
    dec_z_w: torch.Tensor | None
    dec1_b: torch.Tensor
    dec_hidden: tuple[tuple[torch.Tensor, torch.Tensor], ...]  # the decoder's middle layers
    mean_w: torch.Tensor  # (hidden, 2 H): x steps then y steps, in metres
    mean_wxy: tuple[torch.Tensor, torch.Tensor]  # (hidden, H) each: the x and the y steps alone, contiguous
    mean_b: torch.Tensor  # (H, 2) in metres


def _t(w: torch.Tensor) -> torch.Tensor:
    return w.detach().t().contiguous()


def _ln(m) -> tuple[torch.Tensor, torch.Tensor, float]:
    return m.weight.detach(), m.bias.detach(), m.eps


def prepare(model) -> Prepared:
    """Weights of ``model`` (a :class:`~wmplan.model.world_model.WorldModel`) laid out for inference."""
    cfg = model.cfg
    w_hist, d = cfg.history, cfg.d_model
    nf = NUM_VEHICLE_FEATURES
    with torch.no_grad():
        enc = model.encoder
        first = enc.obj[0]
        w1 = first.weight  # (D, 5 W + 3): the inputs of nets.object_features
        per_step = len(OBJECT_STEP_FEATURES)
        full = torch.zeros(d, w_hist * nf, dtype=w1.dtype)
        for step in range(w_hist):
            for j, (col, scale) in enumerate(OBJECT_STEP_FEATURES):
                full[:, step * nf + col] = w1[:, per_step * step + j] / scale
        for j, (col, scale) in enumerate(OBJECT_STATIC_FEATURES):  # the last step's size
            full[:, (w_hist - 1) * nf + col] = w1[:, per_step * w_hist + j] / scale
        blocks = []
        for layer in enc.blocks.layers:
            attn = layer.self_attn
            heads = attn.num_heads
            q_scale = torch.ones(3 * d, dtype=w1.dtype)
            q_scale[:d] = 1.0 / math.sqrt(d // heads)
            blocks.append(
                Block(
                    _ln(layer.norm1),
                    _t(attn.in_proj_weight * q_scale[:, None]),
                    attn.in_proj_bias.detach() * q_scale,
                    _t(attn.out_proj.weight),
                    attn.out_proj.bias.detach(),
                    _ln(layer.norm2),
                    _t(layer.linear1.weight),
                    layer.linear1.bias.detach(),
                    _t(layer.linear2.weight),
                    layer.linear2.bias.detach(),
                    heads,
                )
            )
        road = enc.road[0]
        plan1 = model.plan.net[0]
        hz = cfg.horizon
        in_scale = torch.tensor(
            (POS_SCALE_X_M, POS_SCALE_Y_M, VEL_SCALE_X_MPS, VEL_SCALE_Y_MPS, *ACTION_SCALE), dtype=w1.dtype
        )
        plan_w = plan1.weight / in_scale.repeat(hz)  # (D, 6 H)
        plan_obj = plan1.weight.unflatten(-1, (hz, 6))[..., :2].sum(-2) / in_scale[:2]  # (D, 2)
        zdim = model.zdim
        if zdim:
            pr1, pr2 = model.prior[0], model.prior[-1]
            half = torch.ones(2 * zdim, dtype=w1.dtype)
            half[zdim:] = 0.5
            prior = (
                _t(pr1.weight[:, :d]),
                _t(pr1.weight[:, d:]),
                pr1.bias.detach(),
                _t(pr2.weight * half[:, None]),
                pr2.bias.detach() * half,
            )
        else:
            prior = (None,) * 5
        dec = model.decoder
        d0 = dec[0].weight
        last = dec[-1]
        mean_w = last.weight[: 2 * hz].unflatten(0, (hz, 2)).transpose(0, 1).reshape(2 * hz, -1) * RESIDUAL_SCALE_M
        middle = tuple((_t(m.weight), m.bias.detach()) for m in list(dec)[2:-1] if isinstance(m, torch.nn.Linear))
        return Prepared(
            obj1_w=full.t().contiguous(),
            obj1_b=first.bias.detach().clone(),
            ego_w=w1[:, -1].clone(),
            obj2_w=_t(enc.obj[2].weight),
            obj2_b=enc.obj[2].bias.detach(),
            road_w=_t(road.weight / torch.tensor(ROAD_SCALE, dtype=w1.dtype)),
            road_b=road.bias.detach(),
            blocks=tuple(blocks),
            norm=_ln(enc.norm),
            plan1_w=_t(plan_w),
            plan1_b=plan1.bias.detach(),
            plan_obj_w=_t(plan_obj),
            plan2_w=_t(model.plan.net[2].weight),
            plan2_b=model.plan.net[2].bias.detach(),
            prior_h_w=prior[0],
            prior_p_w=prior[1],
            prior1_b=prior[2],
            prior2_w=prior[3],
            prior2_b=prior[4],
            dec_h_w=_t(d0[:, :d]),
            dec_p_w=_t(d0[:, d : 2 * d]),
            dec_z_w=_t(d0[:, 2 * d :]) if zdim else None,
            dec1_b=dec[0].bias.detach(),
            dec_hidden=middle,
            mean_w=_t(mean_w),
            mean_wxy=(_t(mean_w[:hz]), _t(mean_w[hz:])),
            mean_b=(last.bias[: 2 * hz].view(hz, 2) * RESIDUAL_SCALE_M).detach(),
        )


def prepared(model) -> Prepared:
    """``prepare(model)``, cached on the model until any of its parameters or buffers changes: in place (an
    optimizer step, ``load_state_dict``; every tensor's version counter), by new storage (``.double()``) or by a new
    tensor registered (the tensors' identities are part of the key). Tensors made in inference mode keep no version
    counter: with such a model nothing is cached. :func:`forget_prepared` drops the cache explicitly."""
    tensors = (*model.parameters(), *model.buffers())
    key = None if any(t.is_inference() for t in tensors) else tuple((id(t), t.data_ptr(), t._version) for t in tensors)
    cache = model.__dict__.get("_prepared")
    if key is None or cache is None or cache[0] != key:
        cache = (key, tensors, prepare(model))  # holding the tensors keeps their ids from being reused
        model.__dict__["_prepared"] = cache
    return cache[2]


def forget_prepared(model) -> None:
    """Drop the inference layout cached on ``model`` (the next ``sample`` prepares it again)."""
    model.__dict__.pop("_prepared", None)


def _linear(x: torch.Tensor, w: torch.Tensor, b: torch.Tensor | None = None) -> torch.Tensor:
    """x (..., in) times w (in, out) plus b: one addmm (or mm) on the rows."""
    rows = x.reshape(-1, x.shape[-1])
    out = torch.mm(rows, w) if b is None else torch.addmm(b, rows, w)
    return out.view(*x.shape[:-1], w.shape[1])


def _gelu_(x: torch.Tensor) -> torch.Tensor:
    return torch.ops.aten.gelu_(x)


def encode_scene(pw: Prepared, history: torch.Tensor, road: torch.Tensor) -> torch.Tensor:
    """The scene encoder (:class:`wmplan.model.nets.SceneEncoder`) on history (B, W, N, F), road (B, 6) -> (B, N, D)."""
    b, w, n, nf = history.shape
    valid = history[:, -1, :, F_VALID] > 0.5  # (B, N)
    x = history.transpose(1, 2).reshape(b * n, w * nf)
    h = torch.addmm(pw.obj1_b, x, pw.obj1_w).view(b, n, -1)
    h[:, 0] += pw.ego_w
    h = _gelu_(h)
    h = torch.addmm(pw.obj2_b, h.view(b * n, -1), pw.obj2_w).view(b, n, -1)
    h += torch.addmm(pw.road_b, road, pw.road_w)[:, None]
    mask = torch.zeros(b, 1, n, 1, dtype=h.dtype).masked_fill_(~valid.view(b, 1, n, 1), float("-inf"))
    d = h.shape[-1]
    for blk in pw.blocks:
        y = F.layer_norm(h, (d,), *blk.ln1)
        qkv = torch.addmm(blk.qkv_b, y.view(b * n, d), blk.qkv_w)
        q, k, v = qkv.view(b, n, 3, blk.heads, d // blk.heads).permute(2, 0, 3, 1, 4)
        scores_t = torch.matmul(k, q.transpose(-1, -2))  # (B, heads, keys, queries); q carries 1 / sqrt(width)
        scores_t += mask
        a = torch.matmul(torch.softmax(scores_t, dim=-2).transpose(-1, -2), v)  # (B, heads, N, width)
        h = torch.addmm(h.view(b * n, d), a.transpose(1, 2).reshape(b * n, d), blk.out_w)
        h += blk.out_b
        y = F.layer_norm(h, (d,), *blk.ln2)
        u = _gelu_(torch.addmm(blk.ff1_b, y, blk.ff1_w))
        h = torch.addmm(h, u, blk.ff2_w)
        h += blk.ff2_b
        h = h.view(b, n, d)
    return F.layer_norm(h, (d,), *pw.norm).mul_(valid[..., None])


def encode_plan(pw: Prepared, obj_xy: torch.Tensor, ego_future: torch.Tensor, actions: torch.Tensor) -> torch.Tensor:
    """The plan encoder (:class:`wmplan.model.nets.PlanEncoder`): obj_xy (B, N, 2), ego_future (B, C, H, >=4),
    actions (B, C, H, 2) -> (N, B, C, D), objects first (see :func:`write_positions`); the first layer by parts,
    the plan's once per plan, the object's once per object."""
    per_plan = torch.cat([ego_future[..., :4], actions], dim=-1).flatten(-2)  # (B, C, 6 H)
    x = _linear(per_plan, pw.plan1_w, pw.plan1_b)[None] - _linear(obj_xy, pw.plan_obj_w).transpose(0, 1)[:, :, None]
    return _linear(_gelu_(x), pw.plan2_w, pw.plan2_b)


def by_object(h: torch.Tensor) -> torch.Tensor:
    """Scene embeddings (B, N, D) in the objects-first order of the other pieces, (N, B, D)."""
    return h.transpose(0, 1)


def draw_latent(pw: Prepared, h: torch.Tensor, p: torch.Tensor, eps: torch.Tensor) -> torch.Tensor:
    """z (N, B, C, K, Z) = mu + exp(logvar / 2) eps from the prior on h (N, B, D) and p (N, B, C, D); eps
    (N, B, 1, K, Z) standard normals shared by every plan."""
    x = _linear(p, pw.prior_p_w)
    x += _linear(h, pw.prior_h_w, pw.prior1_b)[:, :, None]
    out = _linear(_gelu_(x), pw.prior2_w, pw.prior2_b)  # (N, B, C, 2 Z), the second half logvar / 2
    zdim = out.shape[-1] // 2
    mu, half_lv = out[..., None, :zdim], out[..., None, zdim:]
    scale = half_lv.clamp(0.5 * LOGVAR_MIN, 0.5 * LOGVAR_MAX).exp_()
    return torch.addcmul(mu, scale, eps)


def decoder_first(pw: Prepared, h: torch.Tensor, p: torch.Tensor) -> torch.Tensor:
    """The history and plan part of the decoder's first layer, with its bias: (N, B, C, hidden) from h (N, B, D)
    and p (N, B, C, D); the history's part once per object."""
    hp = _linear(p, pw.dec_p_w)
    hp += _linear(h, pw.dec_h_w, pw.dec1_b)[:, :, None]
    return hp


def decoder_hidden(pw: Prepared, hp: torch.Tensor, z: torch.Tensor | None) -> torch.Tensor:
    """The decoder up to its last layer, from :func:`decoder_first`'s hp (..., hidden): (..., K, hidden) with z
    (..., K, Z), the latent part added per sample; (..., hidden) without."""
    if z is None:
        x = hp.clone()
    else:
        x = _linear(z, pw.dec_z_w)
        x += hp[..., None, :]
    x = _gelu_(x)
    for w, b in pw.dec_hidden:
        x = _gelu_(_linear(x, w, b))
    return x


def residual_means(pw: Prepared, x: torch.Tensor) -> torch.Tensor:
    """The decoder's residual means without the last layer's bias (``pw.mean_b``), (..., H, 2) in metres, a view
    with each coordinate's H steps contiguous."""
    hz = pw.mean_b.shape[0]
    return _linear(x, pw.mean_w).unflatten(-1, (2, hz)).transpose(-1, -2)


def write_positions(
    pw: Prepared, hp: torch.Tensor, z: torch.Tensor, pos: torch.Tensor, *, chunk_rows: int = CHUNK_ROWS
) -> None:
    """The decoder's residual means (without the last layer's bias) for hp (N, B, C, hidden) and z
    (N, B, C, K, Z), written into pos (2, N, B, C, K, H): the position planes of the rows (see
    ``WorldModel.assemble_rows``), each contiguous.

    The rows of the decoder are ordered objects first, then scenes, plans and samples, the order of the planes,
    so the last layer's x and y columns are each one matrix multiply writing straight into its plane (no
    transposing copy of the largest output). The decoder runs on groups of whole plans of about ``chunk_rows``
    rows, one group after the other: its hidden activations, the largest arrays of a rollout (hidden x 4 bytes
    per row: 118 MB at the closed-loop batch of 50 scenes x 64 plans x 8 samples x 9 objects), then stay in the
    processor's caches between layers, and above all never exceed the size that the memory allocator serves from
    fresh pages (see :mod:`wmplan._alloc`). At the planner's one scene (4608 rows) the whole batch is one group.
    Each row's arithmetic is that of one pass (up to the rounding of matrix products of other sizes)."""
    n, b, c, k, zdim = z.shape
    hz = pos.shape[-1]
    rows = n * b * c
    hp_rows = hp.reshape(rows, hp.shape[-1])
    z_rows = z.reshape(rows, k, zdim)
    planes = [pos[j].view(rows, k * hz) for j in range(2)]
    step = max(1, chunk_rows // k)
    for s in range(0, rows, step):
        x = decoder_hidden(pw, hp_rows[s : s + step], z_rows[s : s + step])
        x = x.view(-1, x.shape[-1])
        for j in range(2):
            torch.mm(x, pw.mean_wxy[j], out=planes[j][s : s + step].view(-1, hz))

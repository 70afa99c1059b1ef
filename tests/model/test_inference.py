"""The inference layout of the forward model's weights (``wmplan.model.inference``) against the training modules.

``WorldModel.sample`` runs on weights transposed, with input scales folded in and first layers split by part;
``test_model_sample_fast.py`` checks whole samples against the plain reference path. Here each piece is checked
against the module it replaces (docs/references.md#practice-equivalence-test), in float64 to 1e-9 (folding a
scale into a weight only changes the rounding; the reference for the attention layers is the project's own
``encoder_layer``, itself checked against torch's ``nn.TransformerEncoderLayer`` in
``test_model_sample_fast.py``), the decoder's groups of plans against one pass, and the cache of prepared
weights against every way the weights can change.
"""

from __future__ import annotations

import copy

import pytest
import torch

from tests.model.model_helpers import TOY_EGO
from wmplan.data.windows import Windows, WindowSpec, anchor_index
from wmplan.model import inference as inf
from wmplan.model.config import ModelConfig
from wmplan.model.nets import gaussian_params, run_layers
from wmplan.model.train import to_torch
from wmplan.model.world_model import WorldModel


@pytest.fixture(scope="module")
def batch(dataset) -> dict:
    """Three float64 windows of the simulated dataset, the last object slot of the second one emptied."""
    spec = WindowSpec(5, 15, 8)
    index = anchor_index(dataset, spec)
    b = to_torch(Windows(dataset, spec).batch(index[:: max(1, len(index) // 3)][:3]))
    b["history"][1, :, -1] = 0.0
    return {k: v.double() for k, v in b.items()}


@pytest.fixture(scope="module")
def model() -> WorldModel:
    return WorldModel(ModelConfig(), TOY_EGO, generator=torch.Generator().manual_seed(3)).double().eval()


def plans(batch: dict, num: int, seed: int) -> torch.Tensor:
    noise = torch.randn(
        batch["actions"].shape[0],
        num,
        *batch["actions"].shape[1:],
        generator=torch.Generator().manual_seed(seed),
        dtype=torch.float64,
    )
    return batch["actions"][:, None] + noise * torch.tensor([1.5, 0.1], dtype=torch.float64)


def test_scene_encoder(model, batch):
    """One multiply of the flattened history rows (scales and the size features folded in) and the attention
    with the query scale folded in: the encoder module's output to 1e-9."""
    with torch.inference_mode():
        want = model.encoder(batch["history"], batch["road"])
        got = inf.encode_scene(inf.prepared(model), batch["history"], batch["road"])
    torch.testing.assert_close(got, want, rtol=0, atol=1e-9)


def test_plan_encoder_prior_and_decoder(model, batch):
    """The plan encoder, the prior's draw of z and the decoder's hidden layers and means, each on the module's
    own input, equal the modules on the concatenated inputs (the training path) to 1e-9; the inference pieces
    work objects first, (N, B, C, ...), the modules scenes first, (B, C, N, ...)."""
    actions = plans(batch, 4, 1)
    hist = batch["history"]
    pw = inf.prepared(model)
    with torch.inference_mode():
        ego_f = model.ego_future(batch, actions)
        h = model.encoder(hist, batch["road"])
        p = model.plan(hist[:, -1, :, :2], ego_f, actions)  # (B, C, N, D)
        p_obj = inf.encode_plan(pw, hist[:, -1, :, :2], ego_f, actions)  # (N, B, C, D)
        torch.testing.assert_close(p_obj, p.permute(2, 0, 1, 3), rtol=0, atol=1e-9)
        b, c, n = p.shape[:3]
        hb = h[:, None].expand(b, c, n, -1)
        mu, lv = gaussian_params(model.prior(torch.cat([hb, p], -1)))  # (B, C, N, Z)
        eps = torch.randn(b, 1, 5, n, model.zdim, generator=torch.Generator().manual_seed(2), dtype=torch.float64)
        z = inf.draw_latent(pw, inf.by_object(h), p_obj, eps.permute(3, 0, 1, 2, 4))  # (N, B, C, K, Z)
        want_z = mu[:, :, None] + (0.5 * lv[:, :, None]).exp() * eps  # (B, C, K, N, Z)
        torch.testing.assert_close(z, want_z.permute(3, 0, 1, 2, 4), rtol=0, atol=1e-9)
        full = torch.cat([hb[:, :, None].expand(b, c, 5, n, -1), p[:, :, None].expand(b, c, 5, n, -1), want_z], -1)
        hidden = run_layers(model.decoder[:-1], full)  # (B, C, K, N, hidden)
        hp = inf.decoder_first(pw, inf.by_object(h), p_obj)
        torch.testing.assert_close(inf.decoder_hidden(pw, hp, z), hidden.permute(3, 0, 1, 2, 4), rtol=0, atol=1e-9)
        hz = model.cfg.horizon
        means = model.decoder[-1](hidden)[..., : 2 * hz].unflatten(-1, (hz, 2)) * 5.0  # RESIDUAL_SCALE_M
        pos = torch.empty(2, n, b, c, 5, hz, dtype=torch.float64)
        inf.write_positions(pw, hp, z, pos)
        got = pos.permute(2, 3, 4, 1, 5, 0) + pw.mean_b  # (B, C, K, N, H, 2)
        torch.testing.assert_close(got, means, rtol=0, atol=1e-9)


@pytest.mark.parametrize("chunk_rows", [1, 5, 5 * 3 + 2, 10**6])
def test_decoder_groups_of_plans_equal_one_pass(model, batch, chunk_rows):
    """The decoder run in groups of plans (one plan of one object per group, one, three and all per group; a
    group size that is not a whole number of plans rounds down) writes the numbers of one pass, to 1e-12 in
    float64."""
    actions = plans(batch, 4, 5)
    hist = batch["history"]
    pw = inf.prepared(model)
    with torch.inference_mode():
        ego_f = model.ego_future(batch, actions)
        h = inf.by_object(inf.encode_scene(pw, hist, batch["road"]))
        p = inf.encode_plan(pw, hist[:, -1, :, :2], ego_f, actions)
        eps = torch.randn(9, 3, 1, 5, model.zdim, generator=torch.Generator().manual_seed(4), dtype=torch.float64)
        z = inf.draw_latent(pw, h, p, eps)
        hp = inf.decoder_first(pw, h, p)
        one = inf.residual_means(pw, inf.decoder_hidden(pw, hp, z))  # (N, B, C, K, H, 2)
        pos = torch.full((2, 9, 3, 4, 5, 15), float("nan"), dtype=torch.float64)
        inf.write_positions(pw, hp, z, pos, chunk_rows=chunk_rows)
        torch.testing.assert_close(pos, one.permute(5, 0, 1, 2, 3, 4), rtol=0, atol=1e-12)


def test_prepared_weights_follow_every_change_of_the_model(batch):
    """The cached weights are reused while nothing changes, and rebuilt after an in-place update (as an optimizer
    step makes), ``load_state_dict``, a new parameter object, a dtype change and a change of a buffer; a model
    with tensors made in inference mode (no version counters) is prepared afresh on every call."""
    m = WorldModel(ModelConfig(), TOY_EGO, generator=torch.Generator().manual_seed(0)).eval()
    first = inf.prepared(m)
    assert inf.prepared(m) is first
    with torch.no_grad():
        m.decoder[2].weight.mul_(2.0)
    second = inf.prepared(m)
    assert second is not first
    torch.testing.assert_close(second.dec_hidden[0][0], m.decoder[2].weight.t())
    other = WorldModel(ModelConfig(), TOY_EGO, generator=torch.Generator().manual_seed(1))
    m.load_state_dict(other.state_dict())
    torch.testing.assert_close(inf.prepared(m).dec_hidden[0][0], other.decoder[2].weight.t())
    m.decoder[0].bias = torch.nn.Parameter(torch.full((m.cfg.hidden,), 0.25))
    assert torch.equal(inf.prepared(m).dec1_b, torch.full((m.cfg.hidden,), 0.25))
    m64 = copy.deepcopy(m).double()
    assert inf.prepared(m64).dec1_b.dtype == torch.float64
    m.encoder.norm.weight.data.fill_(0.5)  # in place through .data: the version counter still moves
    assert torch.equal(inf.prepared(m).norm[0], torch.full_like(m.encoder.norm.weight, 0.5))
    with torch.inference_mode():
        frozen = WorldModel(ModelConfig(), TOY_EGO, generator=torch.Generator().manual_seed(2)).eval()
        a = inf.prepared(frozen)
        frozen.decoder[2].bias.fill_(1.0)
        assert torch.equal(inf.prepared(frozen).dec_hidden[0][1], torch.ones(m.cfg.hidden))
        assert inf.prepared(frozen) is not a


def test_sample_after_training_steps_uses_the_new_weights(batch):
    """``sample`` between optimizer steps predicts with the weights of the moment: after a step its rows change,
    and they equal those of a fresh copy of the stepped model (which has never prepared anything)."""
    m = WorldModel(ModelConfig(), TOY_EGO, generator=torch.Generator().manual_seed(5))
    b32 = {k: v.float() for k, v in batch.items()}
    actions = plans(batch, 3, 6).float()

    def rows(model):
        return model.sample(b32, actions, 2, generator=torch.Generator().manual_seed(7), moments=False)["rows"]

    before = rows(m.eval())
    opt = torch.optim.SGD(m.parameters(), lr=0.1)
    loss, _ = m.train().loss(b32, generator=torch.Generator().manual_seed(8))
    loss.backward()
    opt.step()
    after = rows(m.eval())
    assert not torch.equal(before, after)
    assert torch.equal(after, rows(copy.deepcopy(m)))

"""``WorldModel.sample`` against the slow reference path it replaced, and the benchmark's replay of it.

An equivalence test (docs/references.md#practice-equivalence-test); the attention layers are also compared with
torch's ``nn.TransformerEncoderLayer`` (docs/references.md#vaswani-2017-attention and
docs/references.md#lib-torch).

``sample`` runs every piece at its own broadcast shape (the first layers of the prior and the decoder by parts,
the ego path vectorised over time, the rows written column by column). The reference,
``reference_paths.reference_sample``, is the plain version built from the same modules: the prior and decoder on
the concatenated, expanded inputs, the ego by the step-by-step simulator loop, the rows by concatenation. Same
generator seed, same draws: in float64 both must agree to 1e-9 (the reformulation is exact; only the order of
additions differs), in float32 to float32 rounding. Inputs are windows of the simulated onramp-merge dataset of
``conftest.py`` with fresh seeded weights (the speed-up does not depend on training).
"""

from __future__ import annotations

import copy
import importlib.util

import pytest
import torch

from tests.model.reference_paths import reference_rows, reference_sample
from wmplan.data.windows import Windows, WindowSpec, anchor_index
from wmplan.model.baselines import ConstantVelocity
from wmplan.model.config import ModelConfig
from wmplan.model.ego import EgoKinematics
from wmplan.model.train import to_torch
from wmplan.model.world_model import WorldModel
from wmplan.scenario import load_scenario
from wmplan.sim.features import F_VALID

NUM_PLANS = 6


@pytest.fixture(scope="module")
def ego() -> EgoKinematics:
    return EgoKinematics.from_scenario(load_scenario("onramp-merge"), 0.2)


@pytest.fixture(scope="module")
def windows(dataset) -> dict:
    """Four windows of the simulated dataset (default history 5, horizon 15, 8 objects); the last object slot of
    the second window emptied (all zeros, as the window builder leaves an empty slot) so empty slots occur."""
    spec = WindowSpec(5, 15, 8)
    index = anchor_index(dataset, spec)
    batch = to_torch(Windows(dataset, spec).batch(index[:: max(1, len(index) // 4)][:4]))
    batch["history"][1, :, -1] = 0.0
    return batch


def plans(batch: dict, num: int, seed: int) -> torch.Tensor:
    """The recorded plan of each window perturbed per candidate: (B, C, H, 2), some past the limits."""
    g = torch.Generator().manual_seed(seed)
    noise = torch.randn(batch["actions"].shape[0], num, *batch["actions"].shape[1:], generator=g)
    return (batch["actions"][:, None] + noise * torch.tensor([2.0, 0.2])).contiguous()


def fresh(cfg: ModelConfig, ego, seed: int = 0) -> WorldModel:
    model = WorldModel(cfg, ego, generator=torch.Generator().manual_seed(seed)).eval()
    model.noise_scale.fill_(1.3)  # a calibrated scale other than 1
    if cfg.deterministic:
        model.fitted_logvar.copy_(torch.linspace(-2.0, 1.0, cfg.horizon * 2).reshape(cfg.horizon, 2))
    return model


def as64(batch: dict) -> dict:
    return {k: v.double() for k, v in batch.items()}


def gens(n: int, seed: int) -> list[torch.Generator]:
    return [torch.Generator().manual_seed(seed + i) for i in range(n)]


@pytest.mark.parametrize("deterministic", [False, True])
@pytest.mark.parametrize("noise", [False, True])
def test_sample_equals_the_reference_in_float64(windows, ego, deterministic, noise):
    """Rows, residual means and log-variances of the fast path equal the reference to 1e-9 in float64, for the
    latent and the least-squares model, with and without the decoder noise, one generator per scene."""
    model = fresh(ModelConfig(deterministic=deterministic), ego).double()
    batch = as64(windows)
    actions = plans(windows, NUM_PLANS, 1).double()
    b = actions.shape[0]
    got = model.sample(batch, actions, 5, generator=gens(b, 10), noise=noise)
    want = reference_sample(model, batch, actions, 5, generator=gens(b, 10), noise=noise)
    for key in ("rows", "mean", "logvar"):
        assert got[key].shape == want[key].shape, key
        torch.testing.assert_close(got[key], want[key], rtol=0, atol=1e-9, msg=key)


def test_sample_equals_the_reference_in_float32_at_planner_shapes(windows, ego):
    """Float32, one scene, 64 plans x 8 samples (the planner's shape): equal to the reference within float32
    rounding. The ego rows: the loop's and the vectorised path's rounding, below 1e-4 m and m/s (see
    ``test_ego_fast.py``); the other rows: positions within a few float32 spacings of coordinates up to 200 m
    (1.5e-5 m each), velocities are position differences / 0.2 s so within 2e-4 m/s, headings within 2e-5 rad;
    residual means and log-variances 1e-5."""
    model = fresh(ModelConfig(), ego)
    batch = {k: v[:1] for k, v in windows.items()}
    actions = plans(batch, 64, 2)
    got = model.sample(batch, actions, 8, generator=torch.Generator().manual_seed(3))
    want = reference_sample(model, batch, actions, 8, generator=torch.Generator().manual_seed(3))
    assert got["rows"].shape == (1, 64, 8, 15, 9, 8) and got["rows"].dtype == torch.float32
    for key in ("mean", "logvar"):
        torch.testing.assert_close(got[key], want[key], rtol=0, atol=1e-5, msg=key)
    diff = (got["rows"] - want["rows"]).abs().flatten(0, -2).amax(0)  # per feature
    assert (diff[:2] < 1e-4).all() and (diff[2:4] < 2e-4).all() and diff[4] < 2e-5 and (diff[5:] == 0).all(), diff


def test_assemble_rows_of_constant_velocity_equals_the_reference(windows, ego):
    """The constant-velocity baseline calls ``assemble_rows`` on broadcast positions: the same rows as the
    concatenating reference (float64, 1e-9)."""
    cv = ConstantVelocity(ModelConfig(), ego)
    batch = as64(windows)
    actions = plans(windows, NUM_PLANS, 4).double()
    got = cv.sample(batch, actions, 3, generator=torch.Generator().manual_seed(0))["rows"]
    helper = cv._helper.double()
    ego_f = helper.ego_future(batch, actions)
    b, c = actions.shape[:2]
    xy = helper.cv_positions(batch["history"])[:, None, None].expand(b, c, 3, -1, -1, -1)
    torch.testing.assert_close(got, reference_rows(helper, batch["history"], xy, ego_f), rtol=0, atol=1e-9)


def test_empty_slots_give_zero_rows_and_the_ego_row_is_its_path(windows, ego):
    """Every feature of an empty slot is 0 in every future; row 0 is the ego's kinematic path in every sample."""
    model = fresh(ModelConfig(), ego)
    actions = plans(windows, NUM_PLANS, 5)
    rows = model.sample(windows, actions, 4, generator=torch.Generator().manual_seed(6))["rows"]
    empty = windows["history"][:, -1, :, F_VALID] < 0.5  # (B, N)
    assert empty.any() and (~empty).any()
    assert (rows.permute(0, 4, 1, 2, 3, 5)[empty] == 0).all()
    path = model.ego_future(windows, actions)  # (B, C, H, 5)
    assert torch.equal(rows[..., 0, :5], path[:, :, None].expand(-1, -1, 4, -1, -1))


def test_same_seed_same_futures_whatever_the_batch(windows, ego):
    """The same seed gives the same output bit for bit; with one generator per scene a scene's futures do not
    depend on the other scenes of its batch, up to rounding: matrix products of other sizes may round differently
    (residual means within 1e-6 m), and a one-spacing change of a float32 position near 130 m (1.5e-5 m) moves a
    velocity, a position difference over 0.2 s, by 7.6e-5 m/s (the path before the speed-up did the same)."""
    model = fresh(ModelConfig(), ego)
    actions = plans(windows, NUM_PLANS, 7)
    a = model.sample(windows, actions, 4, generator=gens(4, 20))
    b = model.sample(windows, actions, 4, generator=gens(4, 20))
    for key in ("rows", "mean", "logvar"):
        assert torch.equal(a[key], b[key]), key
    c = model.sample(windows, actions, 4, generator=gens(4, 21))
    assert not torch.equal(a["rows"], c["rows"])
    alone = model.sample({k: v[2:3] for k, v in windows.items()}, actions[2:3], 4, generator=gens(4, 20)[2:3])
    torch.testing.assert_close(alone["mean"], a["mean"][2:3], rtol=0, atol=1e-6)
    torch.testing.assert_close(alone["rows"], a["rows"][2:3], rtol=0, atol=2e-4)


def test_the_benchmark_replay_reproduces_sample(windows, ego):
    """``benchmarks/model_throughput.py`` times ``sample`` piece by piece by replaying it; the replay's rows equal
    ``sample``'s exactly (so its breakdown describes the real call), and it names every piece."""
    bench = importlib.import_module("benchmarks.model_throughput")
    model = fresh(ModelConfig(), ego)
    batch = {k: v[:1] for k, v in windows.items()}
    wall, cpu, matches = bench.breakdown(model, batch, plans(batch, 16, 8), 4, 2, 9)
    assert matches
    assert set(wall) == set(cpu)
    assert {
        "scene_encoder",
        "ego_kinematics",
        "plan_encoder",
        "prior_and_latent_draw",
        "decoder_first_layer_latent_part",
        "decoder_linear_2",
        "decoder_last_layer_means_into_planes",
        "finish_rows",
    } <= set(wall)


def test_float64_copy_is_the_model(windows, ego):
    """The float64 comparisons above run a float64 copy of the model: it predicts what the float32 model predicts
    (to float32 rounding), so they test the same function."""
    model = fresh(ModelConfig(), ego)
    m64 = copy.deepcopy(model).double()
    actions = plans(windows, NUM_PLANS, 11)
    a = model.sample(windows, actions, 3, generator=torch.Generator().manual_seed(1))["mean"]
    b = m64.sample(as64(windows), actions.double(), 3, generator=torch.Generator().manual_seed(1))["mean"]
    torch.testing.assert_close(a.double(), b, rtol=0, atol=1e-4)


def test_scene_encoder_layers_equal_torchs_transformer_module(windows, ego):
    """The scene encoder runs its ``nn.TransformerEncoder`` layers' weights through ``encoder_layer``; the reference
    is torch's own module (general-purpose reference implementation) on the same input with the key padding mask
    of the empty slots: equal to its training-mode path to 1e-6 and to its fused inference kernel to 1e-5 (float32
    rounding; the attention is written out with matrix products, the module calls torch's fused attention), with an
    empty slot present; gradients equal the module's to 1e-9 relative in float64 (in float32 the two attention
    paths' backward passes round differently, up to about 1e-5 of the largest gradient)."""
    from wmplan.model.nets import object_features

    enc = fresh(ModelConfig(), ego).encoder
    hist, road = windows["history"], windows["road"]
    valid = hist[:, -1, :, F_VALID] > 0.5
    assert (~valid).any()

    def module_path():
        h = enc.obj(object_features(hist)) + enc.road(road / enc.road_scale)[:, None, :]
        return enc.norm(enc.blocks(h, src_key_padding_mask=~valid)) * valid[..., None]

    with torch.inference_mode():
        torch.testing.assert_close(enc(hist, road), module_path(), rtol=0, atol=1e-5)
    enc.train()
    ours, theirs = enc(hist, road), module_path()
    torch.testing.assert_close(ours, theirs, rtol=0, atol=1e-6)
    enc.double()
    hist, road = hist.double(), road.double()
    ours, theirs = enc(hist, road), module_path()
    w = enc.blocks.layers[0].self_attn.in_proj_weight
    g_ours = torch.autograd.grad(ours.square().sum(), w)[0]
    g_theirs = torch.autograd.grad(theirs.square().sum(), w)[0]
    torch.testing.assert_close(g_ours, g_theirs, rtol=0, atol=1e-9 * float(g_theirs.abs().max()))


@pytest.mark.parametrize("kind", ["latent", "deterministic", "constant_velocity"])
def test_rows_alone_equal_the_rows_with_moments(windows, ego, kind):
    """The planner asks for the rows alone (``moments=False``: the decoder's last layer computes only the means);
    they equal the rows of the full call up to float32 rounding of a matrix product with fewer columns (positions
    within 1e-4 m), the result holds no moments, and the rows are a view of feature planes: what the risk
    computations read, features and vehicles first, is contiguous without a copy."""
    model = (
        ConstantVelocity(ModelConfig(), ego)
        if kind == "constant_velocity"
        else fresh(ModelConfig(deterministic=kind == "deterministic"), ego)
    )
    actions = plans(windows, NUM_PLANS, 12)
    full = model.sample(windows, actions, 4, generator=gens(4, 30))
    alone = model.sample(windows, actions, 4, generator=gens(4, 30), moments=False)
    assert set(alone) == {"rows"} and {"rows", "mean", "logvar"} <= set(full)
    assert alone["rows"].shape == full["rows"].shape == (4, NUM_PLANS, 4, 15, 9, 8)
    torch.testing.assert_close(alone["rows"], full["rows"], rtol=0, atol=2e-4)
    assert alone["rows"].movedim((-1, -2), (0, 1)).is_contiguous()

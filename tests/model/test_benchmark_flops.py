"""The model benchmark counts the rollout's matrix-multiply FLOPs right.

``benchmarks/model_throughput.py`` derives ``rollout_efficiency`` from the FLOPs of the rollout's matrix
multiplies. Its count (every linear map applied: 2 x in x out x rows) is checked here against
``torch.utils.flop_counter.FlopCounterMode`` (reference library, docs/references.md#lib-torch; a matmul of
(m, k) by (k, n) counts 2 m k n) and against the layer sizes worked out by hand from the model's configuration
(derived, no source needed).
"""

from __future__ import annotations

import importlib.util

import pytest
import torch

from tests.model.model_helpers import TOY_EGO, straight_batch
from wmplan.model.config import ModelConfig
from wmplan.model.world_model import WorldModel


@pytest.fixture(scope="module")
def bench():
    return importlib.import_module("benchmarks.model_throughput")


def test_flop_count_of_a_rollout(bench):
    """B = 2 scenes, C = 3 plans, K = 4 samples, N = 2 objects, H = 5, a one-layer encoder: the decoder sees
    B C K N = 48 rows (its first layer by parts: the history part B N = 4, the plan part B C N = 12, the latent part
    48), the plan encoder B C N = 12 (its first layer by parts: the plan part B C = 6, the object part B N = 4),
    the prior B C N = 12 (its first layer's history part B N = 4), the object MLP B N = 4, the road MLP B = 2."""
    d, hid, hz, z, w = 8, 16, 5, 2, 2
    cfg = ModelConfig(
        history=w, horizon=hz, num_objects=1, d_model=d, num_heads=2, hidden=hid, num_layers=1, latent_dim=z
    )
    model = WorldModel(cfg, TOY_EGO, generator=torch.Generator().manual_seed(0)).eval()
    batch = straight_batch(2, w, hz)
    actions = torch.zeros(2, 3, hz, 2)

    def rollout() -> None:
        model.sample(batch, actions, 4, generator=torch.Generator().manual_seed(1))

    with torch.inference_mode():
        shapes = bench.linear_shapes(rollout)
        counted = bench.flop_counter_mm_flops(rollout)
    by_hand = {
        # the object MLP's first layer takes an object's W history rows of F = 8 features whole (zero weights on the
        # features it does not use; the is-ego input added to row 0 apart), see wmplan.model.inference
        "object mlp": 4 * (w * 8 * d + d * d),
        "road mlp": 2 * 6 * d,
        "encoder attention projections": 4 * (d * 3 * d + d * d),
        "encoder feed-forward": 4 * (d * 2 * d + 2 * d * d),
        # the plan encoder's first layer by parts: the ego's part once per plan (B C = 6), the objects' part once
        # per object (B N = 4, two inputs: the relative positions' weights summed over the steps)
        "plan encoder": 6 * 6 * hz * d + 4 * 2 * d + 12 * d * d,
        # the first layers of the prior and the decoder are split: history once per object, plan once per object
        # and plan, z once per sample
        "prior": 4 * d * hid + 12 * (d * hid + hid * 2 * z),
        "decoder": 4 * d * hid + 12 * d * hid + 48 * (z * hid + hid * hid + hid * 4 * hz),
    }
    # Every linear map is a separate call (the encoder's layers too), so both counts see all of them; the
    # attention's own products (queries times keys, weights times values) are matrix products of neither list.
    assert sum(2 * r * i * o for r, i, o in shapes) == 2 * sum(by_hand.values())
    assert counted == 2 * sum(by_hand.values())


def test_matmul_loop_does_the_shapes(bench):
    """The timed loop multiplies exactly the recorded shapes: its flop count equals the sum of 2 m k n."""
    shapes = [(7, 3, 5), (2, 4, 6)]
    loop = bench.matmul_loop(shapes, torch.Generator().manual_seed(0))
    assert bench.flop_counter_mm_flops(loop) == 2 * (7 * 3 * 5 + 2 * 4 * 6)

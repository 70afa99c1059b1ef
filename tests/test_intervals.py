"""Reference tests of ``wmplan.intervals.wilson_interval``: one definition for numpy, Python numbers and torch.

Sources:
- Wilson (1927) score interval (docs/references.md#wilson-1927); reference library
  ``scipy.stats.binomtest(k, n).proportion_ci(method="wilson")`` (docs/references.md#lib-scipy).
- Table values (6 decimals) computed from the formula with scipy, listed in the same entry: 3/200 -> [0.005114,
  0.043166], 0/200 -> [0, 0.018845], 7/50 -> [0.069508, 0.261862], 1/1000 -> [0.000177, 0.005643].
"""

from __future__ import annotations

import re
import subprocess
import sys

import numpy as np
import pytest
import scipy.stats
import torch

from wmplan.errors import ConfigError
from wmplan.intervals import Z_95, wilson_interval

TABLE = [
    (3, 200, (0.005114, 0.043166)),
    (0, 200, (0.0, 0.018845)),
    (7, 50, (0.069508, 0.261862)),
    (1, 1000, (0.000177, 0.005643)),
]


@pytest.mark.parametrize(("k", "n", "table"), TABLE)
def test_python_numbers_against_scipy_and_table(k, n, table):
    """Python ints give numpy float64 scalars equal to scipy's Wilson interval (1e-10) and the table (1e-6)."""
    low, high = wilson_interval(k, n)
    ref = scipy.stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    assert isinstance(low, float) and isinstance(high, float)
    assert low == pytest.approx(ref.low, rel=1e-10, abs=1e-15) and high == pytest.approx(ref.high, rel=1e-10)
    assert (low, high) == (pytest.approx(table[0], abs=1e-6), pytest.approx(table[1], abs=1e-6))


def test_numpy_arrays_broadcast_and_other_levels():
    """Arrays of counts with a scalar n, at 90 % (z = Phi^-1(0.95)), match scalar scipy calls."""
    k = np.array([[0, 2, 5], [7, 9, 10]])
    low, high = wilson_interval(k, 10, z=scipy.stats.norm.ppf(0.95))
    assert low.shape == high.shape == (2, 3) and low.dtype == np.float64
    for (i, j), kij in np.ndenumerate(k):
        ref = scipy.stats.binomtest(int(kij), 10).proportion_ci(confidence_level=0.9, method="wilson")
        assert low[i, j] == pytest.approx(ref.low, abs=1e-12) and high[i, j] == pytest.approx(ref.high, abs=1e-12)
    assert low[0, 0] == 0.0 and high[1, 2] == 1.0


@pytest.mark.parametrize(("k", "n", "table"), TABLE)
def test_torch_tensors_against_scipy(k, n, table):
    """Torch tensors give float32 tensors equal to scipy's interval to float32 precision."""
    low, high = wilson_interval(torch.tensor(k), torch.tensor(n))
    ref = scipy.stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    assert isinstance(low, torch.Tensor) and low.dtype == torch.float32 and high.dtype == torch.float32
    assert low.item() == pytest.approx(ref.low, rel=1e-6, abs=1e-9) and high.item() == pytest.approx(ref.high, rel=1e-6)
    assert high.item() == pytest.approx(table[1], abs=1e-6)


def test_torch_batched_with_python_n_and_one_sided_z():
    """A (2, 3) tensor of counts out of n = 8 (a Python int), at z = 1.644854: each entry equals scipy's 90 % two-sided
    interval; k = 0 gives exactly 0 and k = n exactly 1."""
    k = torch.tensor([[0, 3, 8], [1, 2, 8]])
    low, high = wilson_interval(k, 8, z=1.6448536269514722)
    assert low.shape == (2, 3)
    for i in range(2):
        for j in range(3):
            ref = scipy.stats.binomtest(int(k[i, j]), 8).proportion_ci(confidence_level=0.9, method="wilson")
            assert low[i, j].item() == pytest.approx(ref.low, rel=1e-6, abs=1e-9)
            assert high[i, j].item() == pytest.approx(ref.high, rel=1e-6)
    assert high[0, 2].item() == 1.0 and low[0, 0].item() == 0.0


def test_same_numbers_for_every_input_kind():
    """numpy, Python and torch inputs give the same interval (to float32 rounding for torch)."""
    k = np.arange(0, 41, 5)
    low_np, high_np = wilson_interval(k, 40)
    low_t, high_t = wilson_interval(torch.from_numpy(k), 40)
    np.testing.assert_allclose(low_t.numpy(), low_np, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(high_t.numpy(), high_np, rtol=1e-6)
    assert [float(v) for v in wilson_interval(int(k[3]), 40)] == [low_np[3], high_np[3]]
    assert Z_95 == pytest.approx(scipy.stats.norm.ppf(0.975), rel=1e-15)


def test_no_trials_means_nothing_known():
    """n = 0: the interval is the whole of [0, 1] (no data), for every input kind."""
    assert wilson_interval(0, 0) == (0.0, 1.0)
    low, high = wilson_interval(np.array([0, 1]), np.array([0, 2]))
    assert low[0] == 0.0 and high[0] == 1.0 and 0 < low[1] < 0.5 < high[1] < 1
    low, high = wilson_interval(torch.tensor(0), 0)
    assert (low.item(), high.item()) == (0.0, 1.0)


def test_bad_counts_are_one_line_errors():
    """k > n, negative or fractional counts, non-broadcasting shapes and z <= 0 are refused by a one-line
    ConfigError."""
    with pytest.raises(ConfigError, match=re.escape("wilson_interval: needs integers 0 <= k <= n, got k=5 n=4")):
        wilson_interval(5, 4)
    with pytest.raises(ConfigError, match=re.escape("got k=1.5 n=4")):
        wilson_interval(np.array([1, 1.5]), 4)
    with pytest.raises(ConfigError, match=re.escape("got k=-1 n=3")):
        wilson_interval(torch.tensor([2, -1]), 3)
    with pytest.raises(ConfigError, match="do not broadcast"):
        wilson_interval(np.zeros(3), np.ones(2))
    with pytest.raises(ConfigError, match=re.escape("z must be > 0, got 0.0")):
        wilson_interval(1, 4, z=0.0)


def test_importing_it_imports_neither_torch_nor_scipy_stats():
    """The simulator and sweep workers import it: it must not pull torch or scipy.stats in (a fresh interpreter)."""
    code = "import sys, wmplan.intervals; print('torch' in sys.modules, 'scipy.stats' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120)
    assert out.stdout.split() == ["False", "False"]

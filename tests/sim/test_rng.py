"""The counter-based random numbers of ``wmplan.rng`` (uniforms, Box-Muller normals, scene keys).

Statistical checks against reference libraries: ``scipy.stats.chisquare`` (Pearson's chi-square test of equal bin
frequencies) for uniformity, ``scipy.stats.kstest`` against ``scipy.stats.norm`` for the normals
(docs/references.md#lib-scipy; the generator: docs/references.md#steele-2014-splitmix,
docs/references.md#box-muller-1958). Independence of streams and counters: the sample correlation of two
independent uniform sequences has standard deviation 1 / sqrt(n), so |r| < 4 / sqrt(n) (common practice, no
source: docs/references.md#practice-monte-carlo-tolerance). The generator is a deterministic hash of its
counters, so each test is seeded by the counters it passes; every threshold leaves a fixed input a wide
margin.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from wmplan import rng

N = 100_000
KEY = int(rng.scene_keys(20240601)[0])


def _corr(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.corrcoef(a, b)[0, 1])


def test_uniform_lies_in_the_half_open_unit_interval_and_is_float64():
    u = rng.uniform(KEY, rng.STREAM_SPAWN, np.arange(1_000_000))
    assert u.dtype == np.float64 and u.shape == (1_000_000,)
    assert u.min() >= 0.0 and u.max() < 1.0
    # the largest hash maps to 1 - 2^-53, still below 1 (53 mantissa bits are kept)
    top = (np.uint64(2**64 - 1) >> np.uint64(11)).astype(np.float64) / float(1 << 53)
    assert top < 1.0 and top == 1.0 - 2.0**-53


@pytest.mark.parametrize("stream", [rng.STREAM_TRAITS, rng.STREAM_YIELD, rng.STREAM_ORACLE])
def test_uniform_passes_a_chi_square_test(stream):
    """10^5 draws in 100 equal bins: scipy.stats.chisquare p > 1e-3; also 10 x 10 bins of consecutive pairs
    (u_i, u_i+1), which a generator with serial correlation fails."""
    u = rng.uniform(KEY, stream, np.arange(N))
    counts = np.bincount((u * 100).astype(int), minlength=100)
    assert scipy.stats.chisquare(counts).pvalue > 1e-3
    pairs = (u[0::2] * 10).astype(int) * 10 + (u[1::2] * 10).astype(int)
    assert scipy.stats.chisquare(np.bincount(pairs, minlength=100)).pvalue > 1e-3


def test_uniform_moments():
    """Mean 1/2 and variance 1/12 of U(0, 1), within 5 standard errors."""
    u = rng.uniform(KEY, 99, np.arange(N))
    assert abs(u.mean() - 0.5) < 5 * np.sqrt(1 / 12 / N)
    assert abs(u.var() - 1 / 12) < 5 * np.sqrt(1 / 180 / N)  # Var of (U - 1/2)^2 is 1/80 - 1/144 = 1/180


@pytest.mark.parametrize("stream", [rng.STREAM_TRAITS, rng.STREAM_BRAKE_SIZE])
def test_normal_passes_a_ks_test_against_the_standard_normal(stream):
    """10^5 Box-Muller draws against scipy.stats.norm: KS p > 1e-3; mean 0 and variance 1 within 5 std errors."""
    z = rng.normal(KEY, stream, np.arange(N))
    assert np.isfinite(z).all()
    assert scipy.stats.kstest(z, scipy.stats.norm.cdf).pvalue > 1e-3
    assert abs(z.mean()) < 5 / np.sqrt(N)
    assert abs(z.var() - 1.0) < 5 * np.sqrt(2 / N)


def test_normal_tails_have_the_normal_frequency():
    """P(|Z| > 3) = 0.0026998 (scipy.stats.norm.sf); 10^6 draws agree within 5 binomial standard errors."""
    z = rng.normal(KEY, 5, np.arange(1_000_000))
    p = 2 * scipy.stats.norm.sf(3.0)
    freq = float((np.abs(z) > 3.0).mean())
    assert abs(freq - p) < 5 * np.sqrt(p * (1 - p) / z.size)


@pytest.mark.parametrize(
    ("parts_a", "parts_b"),
    [
        ((rng.STREAM_TRAITS,), (rng.STREAM_SPAWN,)),  # different streams
        ((rng.STREAM_YIELD, 0), (rng.STREAM_YIELD, 1)),  # neighbouring step counters
        ((rng.STREAM_BRAKE_START, 7), (rng.STREAM_BRAKE_START, 8)),
    ],
    ids=["streams", "steps-0-1", "steps-7-8"],
)
def test_streams_and_counters_are_uncorrelated(parts_a, parts_b):
    idx = np.arange(N)
    a = rng.uniform(KEY, *parts_a, idx)
    b = rng.uniform(KEY, *parts_b, idx)
    assert abs(_corr(a, b)) < 4 / np.sqrt(N)


def test_neighbouring_counters_and_keys_are_uncorrelated():
    """u(i) vs u(i+1) along the last counter; scene keys of consecutive seeds; the two uniforms inside one
    Box-Muller normal (via the normal itself against a uniform of the same counters)."""
    idx = np.arange(N + 1)
    u = rng.uniform(KEY, rng.STREAM_INIT, idx)
    assert abs(_corr(u[:-1], u[1:])) < 4 / np.sqrt(N)
    keys = rng.scene_keys(np.arange(N))
    assert len(np.unique(keys)) == N
    ua = rng.uniform(keys, rng.STREAM_TRAITS, 0)
    assert abs(_corr(ua[:-1], ua[1:])) < 4 / np.sqrt(N - 1)
    z = rng.normal(KEY, 3, np.arange(N))
    v = rng.uniform(KEY, 3, np.arange(N))
    assert abs(_corr(z, v)) < 4 / np.sqrt(N)


def test_counter_hash_is_deterministic_and_order_sensitive():
    a = rng.combine(KEY, 1, 2)
    assert a.dtype == np.uint64
    assert a == rng.combine(KEY, 1, 2)
    assert a != rng.combine(KEY, 2, 1)
    # broadcasting: one call over a grid equals the element-by-element calls
    grid = rng.uniform(np.array([KEY, KEY + 1])[:, None], 4, np.arange(5)[None, :])
    for i, k in enumerate((KEY, KEY + 1)):
        for j in range(5):
            assert grid[i, j] == rng.uniform(k, 4, j)


def test_make_rngs_is_reproducible_and_splits_streams():
    """One seed gives the same generators twice; its streams differ from each other and from another seed's."""
    import torch

    a, b, c = rng.make_rngs(5), rng.make_rngs(5), rng.make_rngs(6)
    xa, xb, xc = a.sim.random(8), b.sim.random(8), c.sim.random(8)
    assert np.array_equal(xa, xb) and not np.array_equal(xa, xc)
    assert not np.array_equal(a.data.random(8), rng.make_rngs(5).sim.random(8))
    ta = torch.rand(4, generator=a.plan)
    assert torch.equal(ta, torch.rand(4, generator=b.plan))
    assert not torch.equal(
        torch.rand(4, generator=rng.make_rngs(5).init), torch.rand(4, generator=rng.make_rngs(5).plan)
    )


def test_compiled_draws_equal_the_numpy_draws():
    """The kernel's compiled hash (``wmplan.sim.draws``) gives the numpy uniforms of ``wmplan.rng`` bit for bit on
    10,000 random counters, and its truncated normals agree with the scipy-based ones to 1e-12 (both inverse-CDF
    methods are accurate to a few ulp: Wichura's AS 241 against scipy's ndtri; common practice, no source)."""
    from wmplan.sim import draws, kernel

    gen = np.random.default_rng(11)
    keys = gen.integers(0, 2**62, 10_000, dtype=np.int64).astype(np.uint64) * np.uint64(2) + np.uint64(1)
    steps = gen.integers(0, 10_000, 10_000)
    ids = gen.integers(-1, 500, 10_000)
    want = rng.uniform(rng.combine(keys, steps, rng.STREAM_YIELD), ids)
    u64 = np.uint64  # a hash comes back to Python as an int; keep it unsigned going in
    got = np.array(
        [
            draws.to_unit(u64(draws.combine2(u64(draws.combine3(k, s, rng.STREAM_YIELD)), np.int64(i))))
            for k, s, i in zip(keys, steps, ids, strict=True)
        ]
    )
    assert np.array_equal(got, want)
    spec = (30.0, 3.0, 22.0, 38.0)
    want_tn = rng.truncated_normal(*spec, keys, rng.STREAM_BRAKE_SIZE, ids, 1)
    got_tn = np.array(
        [
            draws.truncated_normal(*spec, draws.to_unit(u64(draws.combine4(k, rng.STREAM_BRAKE_SIZE, i, 1))))
            for k, i in zip(keys, ids, strict=True)
        ]
    )
    np.testing.assert_allclose(got_tn, want_tn, rtol=1e-12, atol=1e-12)
    # the kernel's stream ids are those of wmplan.rng
    assert (
        kernel.STREAM_TRAITS,
        kernel.STREAM_SPAWN,
        kernel.STREAM_YIELD,
        kernel.STREAM_BRAKE_START,
        kernel.STREAM_BRAKE_SIZE,
    ) == (rng.STREAM_TRAITS, rng.STREAM_SPAWN, rng.STREAM_YIELD, rng.STREAM_BRAKE_START, rng.STREAM_BRAKE_SIZE)

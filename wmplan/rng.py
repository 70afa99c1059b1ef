"""Randomness: counter-based streams for the simulator, seeded generators for everything else.

The simulator draws every random number it needs from a *counter-based* generator: a uniform variate is a hash of
(scene key, time step, vehicle slot, stream id). A scene therefore produces the same trajectory whether it runs
alone or inside a batch of any size, and the oracle can re-draw a scene's random events simply by giving it a new
key. The hash is the 64-bit finaliser "splitmix64" (Steele, Lea, Flood, "Fast splittable pseudorandom number
generators", OOPSLA 2014), applied to a combination of the counters.

Other stages (data shuffling, model initialisation, planner sampling) take an explicit ``numpy.random.Generator``
or ``torch.Generator``; :func:`make_rngs` splits one seed into independent streams.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr, ndtri  # imported once: an import inside a hot function costs milliseconds

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_S30 = np.uint64(30)
_S27 = np.uint64(27)
_S31 = np.uint64(31)
_S11 = np.uint64(11)
_INV53 = 1.0 / float(1 << 53)

# Stream ids: one per kind of random draw, so that adding a draw of one kind never shifts another.
STREAM_TRAITS = 1
STREAM_SPAWN = 2
STREAM_YIELD = 3
STREAM_BRAKE_START = 4
STREAM_BRAKE_SIZE = 5
STREAM_INIT = 6
STREAM_ORACLE = 7
STREAM_POLICY = 8


def mix64(x: np.ndarray) -> np.ndarray:
    """The splitmix64 finaliser, elementwise on uint64 arrays (wrapping arithmetic)."""
    with np.errstate(over="ignore"):
        z = np.asarray(x, dtype=np.uint64) + _GOLDEN
        z = (z ^ (z >> _S30)) * _M1
        z = (z ^ (z >> _S27)) * _M2
        return z ^ (z >> _S31)


def combine(*parts: np.ndarray | int) -> np.ndarray:
    """Hash several integer counters (broadcast together) into one uint64 array."""
    h = np.uint64(0x243F6A8885A308D3)
    for p in parts:
        arr = np.asarray(p)
        if arr.dtype != np.uint64:
            arr = arr.astype(np.int64).astype(np.uint64)
        h = mix64(h ^ arr)
    return h


def uniform(*parts: np.ndarray | int) -> np.ndarray:
    """Uniform variates in [0, 1), one per broadcast element of the counters."""
    return (combine(*parts) >> _S11).astype(np.float64) * _INV53


def normal(*parts: np.ndarray | int) -> np.ndarray:
    """Standard normal variates by the Box-Muller transform of two counter-based uniforms."""
    u1 = uniform(*parts, 0x51)
    u2 = uniform(*parts, 0x52)
    return np.sqrt(-2.0 * np.log1p(-u1)) * np.cos(2.0 * np.pi * u2)


def truncated_normal(mean, std, low, high, *parts: np.ndarray | int) -> np.ndarray:
    """Normal(mean, std) truncated to [low, high], by the inverse-CDF method on a counter-based uniform.

    ``mean``, ``std``, ``low``, ``high`` broadcast with the counters; std = 0 gives the mean; infinite bounds are
    allowed. (Inverse transform sampling of a truncated distribution: u ~ U(F(a), F(b)), x = F^-1(u).)
    """
    mean, std = np.asarray(mean, dtype=np.float64), np.asarray(std, dtype=np.float64)
    u = uniform(*parts)
    safe = np.where(std > 0, std, 1.0)
    a = ndtr((low - mean) / safe)
    b = ndtr((high - mean) / safe)
    x = mean + safe * ndtri(np.clip(a + u * (b - a), 1e-300, 1.0 - 1e-16))
    return np.where(std > 0, np.clip(x, low, high), np.clip(mean, low, high))


def scene_keys(seeds: np.ndarray | list[int] | int) -> np.ndarray:
    """Turn integer episode seeds into scene keys (uint64), one per seed."""
    arr = np.atleast_1d(np.asarray(seeds, dtype=np.int64))
    return combine(arr.astype(np.uint64), 0x5CE7E)


@dataclass(frozen=True)
class Rngs:
    """Independent generators split from one seed, so changing one consumer never shifts another."""

    sim: np.random.Generator
    data: np.random.Generator
    init: object  # torch.Generator; typed loosely so that importing this module never imports torch
    plan: object


def make_rngs(seed: int) -> Rngs:
    """Split one integer seed into independent numpy and torch generators."""
    import torch

    sim, data, init, plan = np.random.SeedSequence(seed).spawn(4)

    def _torch(ss: np.random.SeedSequence) -> torch.Generator:
        return torch.Generator().manual_seed(int(ss.generate_state(1, dtype=np.uint64)[0] >> np.uint64(1)))

    return Rngs(sim=np.random.default_rng(sim), data=np.random.default_rng(data), init=_torch(init), plan=_torch(plan))

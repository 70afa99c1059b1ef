"""The Wilson score interval of a binomial proportion, the one definition every stage uses.

Wilson (1927), JASA 22, 209-212 (docs/references.md#wilson-1927)::

    centre = (p + z^2 / 2n) / (1 + z^2 / n)
    half   = z * sqrt(p (1 - p) / n + z^2 / 4n^2) / (1 + z^2 / n),    p = k / n

It keeps its coverage near the nominal level for small counts and rates near 0, where the normal (Wald) interval
collapses to a point. The formula needs only arithmetic and a square root, so one body serves numpy arrays,
Python numbers and torch tensors. This module imports numpy only (never torch or scipy.stats), so the simulator,
the planner and sweep worker processes can all import it.
"""

from __future__ import annotations

import sys

import numpy as np

from wmplan.errors import ConfigError

Z_95 = 1.959963984540054
"""Standard normal quantile Phi^-1(0.975): two-sided 95 % intervals."""


def _torch_module(*values: object):
    """The torch module if any value is a torch tensor (torch already imported by the caller), else None."""
    torch = sys.modules.get("torch")
    if torch is not None and any(isinstance(v, torch.Tensor) for v in values):
        return torch
    return None


def wilson_interval(k: object, n: object, z: float = Z_95) -> tuple:
    """Wilson (1927) score interval for a binomial proportion k / n, batched.

    Args:
        k: (...) event counts, integers 0..n: a Python number, a numpy array or a torch tensor.
        n: (...) trial counts >= 0, broadcastable with k. With n = 0 nothing is known: the interval is (0, 1).
        z: normal quantile > 0; 1.959964 (``Z_95``) for a two-sided 95 % interval, 1.644854 for a one-sided 95 %
            bound (use one end only).

    Returns:
        ``(low, high)`` of the broadcast shape; exactly 0 where k = 0 and exactly 1 where k = n. If k or n is a
        torch tensor: float32 tensors on its device (computed in float64). Otherwise float64 numpy arrays, or numpy
        scalars (``float`` subclasses) for scalar inputs.

    Raises:
        ConfigError: k or n not integers with 0 <= k <= n, or z not > 0 (one line naming the first bad pair).
    """
    torch = _torch_module(k, n)
    if torch is not None:
        xp = torch
        device = next(v.device for v in (k, n) if isinstance(v, torch.Tensor))
        k64 = torch.as_tensor(k, dtype=torch.float64, device=device)
        n64 = torch.as_tensor(n, dtype=torch.float64, device=device)
        try:
            k64, n64 = torch.broadcast_tensors(k64, n64)
        except RuntimeError:
            raise ConfigError(
                f"wilson_interval: k of shape {tuple(k64.shape)} and n of shape {tuple(n64.shape)} do not broadcast"
            ) from None
    else:
        xp = np
        k64 = np.asarray(k, dtype=np.float64)
        n64 = np.asarray(n, dtype=np.float64)
        try:
            k64, n64 = np.broadcast_arrays(k64, n64)
        except ValueError:
            raise ConfigError(
                f"wilson_interval: k of shape {k64.shape} and n of shape {n64.shape} do not broadcast"
            ) from None
    bad = ~xp.isfinite(k64) | ~xp.isfinite(n64) | (k64 != xp.round(k64)) | (n64 != xp.round(n64))
    bad = bad | (k64 < 0) | (k64 > n64)
    if bool(bad.any()):
        i = int(xp.nonzero(bad.reshape(-1))[0][0]) if xp is np else int(torch.nonzero(bad.reshape(-1))[0, 0])
        raise ConfigError(
            f"wilson_interval: needs integers 0 <= k <= n, got k={float(k64.reshape(-1)[i]):g} "
            f"n={float(n64.reshape(-1)[i]):g}"
        )
    if not z > 0:
        raise ConfigError(f"wilson_interval: z must be > 0, got {z!r}")
    empty = n64 == 0
    n_safe = xp.where(empty, 1.0, n64)
    p = k64 / n_safe
    z2n = z * z / n_safe
    centre = (p + z2n / 2) / (1 + z2n)
    half = z * xp.sqrt(p * (1 - p) / n_safe + z2n / (4 * n_safe)) / (1 + z2n)
    low = xp.where((k64 == 0) | empty, 0.0, xp.clip(centre - half, 0.0, 1.0))
    high = xp.where((k64 == n64) | empty, 1.0, xp.clip(centre + half, 0.0, 1.0))
    if torch is not None:
        return low.to(torch.float32), high.to(torch.float32)
    return low[()], high[()]

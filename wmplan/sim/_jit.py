"""The one place the simulator's compiled code is configured (numba, nopython mode).

Every compiled function of the simulator is decorated with :data:`jit`: nopython mode, released interpreter lock
(so that threads of one process run scenes in parallel, see :mod:`wmplan.sim.threads`), numpy's error model
(division by zero gives inf or nan as in numpy, never an exception) and an on-disk cache. The cache lives in the
``__pycache__`` folders beside the sources, where a fresh clone can write it; where those are read-only, numba
falls back to a per-user cache folder (``NUMBA_CACHE_DIR`` overrides both). The first import on a machine
compiles (tens of seconds, see the README); later processes load the machine code from the cache.
"""

from __future__ import annotations

import numba
import numpy as np

jit = numba.njit(cache=True, nogil=True, error_model="numpy", _nrt=False)
"""Decorator of every compiled simulator function."""


def kernel_array(a, dtype) -> np.ndarray:
    """``a`` itself if it is a writeable C-ordered numpy array of ``dtype``, else such a copy. Every array handed
    to a compiled function goes through this: a read-only, strided or other-typed array would make numba compile
    that function once more, for its type (tens of seconds for the step)."""
    if type(a) is np.ndarray and a.dtype == dtype and a.flags.c_contiguous and a.flags.writeable:
        return a
    return np.array(a, dtype=dtype, order="C")

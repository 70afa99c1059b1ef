"""The allocator settings applied on import (``wmplan/_alloc.py``): on Linux with glibc they are taken, and the
environment variable WMPLAN_MALLOC_TUNING=0 leaves the allocator alone (contract; ``man 3 mallopt``,
docs/references.md#lib-glibc-mallopt)."""

from __future__ import annotations

import subprocess
import sys

import pytest

CHECK = "import wmplan._alloc as a, wmplan; print(a.applied)"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt exists on Linux only")
@pytest.mark.parametrize("value, expected", [("1", "True"), ("0", "False")])
def test_tuning_applied_unless_switched_off(value, expected):
    env = {"WMPLAN_MALLOC_TUNING": value, "PATH": "/usr/bin:/bin"}
    out = subprocess.run([sys.executable, "-c", CHECK], capture_output=True, text=True, env=env, check=True)
    assert out.stdout.strip() == expected

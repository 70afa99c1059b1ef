"""The allocator settings (``wmplan/_alloc.py``): importing the package leaves the allocator alone; the
``wmplan`` command applies them at its start on Linux with glibc, and the environment variable
WMPLAN_MALLOC_TUNING=0 leaves the allocator alone there too (contract; ``man 3 mallopt``,
docs/references.md#lib-glibc-mallopt)."""

from __future__ import annotations

import subprocess
import sys

import pytest

CHECK = (
    "import wmplan._alloc as a, wmplan; before = a.applied\n"
    "from wmplan.cli import main; main(['scenarios', 'list'])\n"
    "print(before, a.applied)"
)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt exists on Linux only")
@pytest.mark.parametrize("value, expected", [("1", "False True"), ("0", "False False")])
def test_tuning_applied_unless_switched_off(value, expected):
    env = {"WMPLAN_MALLOC_TUNING": value, "PATH": "/usr/bin:/bin"}
    out = subprocess.run([sys.executable, "-c", CHECK], capture_output=True, text=True, env=env, check=True)
    assert out.stdout.strip().splitlines()[-1] == expected

"""Data flows one way (DEVELOPERS.md, "Layout and data flow"): the simulator and the scenario layer never import
torch.

Each check runs in a fresh interpreter (a subprocess), because the test process itself may already hold torch.
The control case imports torch on purpose and must be seen, so the check itself is shown able to fail.
"""

from __future__ import annotations

import json
import subprocess
import sys

SIM_MODULES = (
    "wmplan.sim",
    "wmplan.sim.engine",
    "wmplan.sim.oracle",
    "wmplan.sim.observe",
    "wmplan.sim.ego_rules",
    "wmplan.sim.spawn",
    "wmplan.scenario",
    "wmplan.rng",
    "wmplan.errors",
)


def _loaded_after_import(code: str) -> list[str]:
    """Run ``code`` in a fresh interpreter and return the names in sys.modules afterwards."""
    script = f"{code}\nimport json, sys\nprint(json.dumps(sorted(sys.modules)))"
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True, timeout=120)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_importing_the_simulator_side_leaves_torch_out():
    """Import each module in turn in one fresh interpreter; after each, torch must still be absent."""
    lines = ["import json, sys", "seen = []"]
    for m in SIM_MODULES:
        lines += [f"import {m}", f"seen.append(({m!r}, 'torch' in sys.modules))"]
    lines.append("print(json.dumps(seen))")
    out = subprocess.run(
        [sys.executable, "-c", "\n".join(lines)], capture_output=True, text=True, check=True, timeout=120
    )
    seen = json.loads(out.stdout.strip().splitlines()[-1])
    assert [m for m, _ in seen] == list(SIM_MODULES)
    culprits = [m for m, has_torch in seen if has_torch]
    assert culprits == [], f"torch was imported by {culprits[0]}"


def test_running_the_simulator_leaves_torch_out():
    """Not only the import: a scenario loaded, a few steps of the batched engine, the oracle and the observations."""
    code = (
        "import numpy as np\n"
        "from wmplan.scenario import load_scenario\n"
        "from wmplan.sim import SimParams, initial_state, step\n"
        "from wmplan.sim.ego_rules import rule_actions\n"
        "from wmplan.sim.oracle import oracle_futures\n"
        "from wmplan.sim.observe import observe\n"
        "p = SimParams.from_scenario(load_scenario('onramp-merge'))\n"
        "st = initial_state(p, [0, 1])\n"
        "for _ in range(5):\n"
        "    st, _ = step(st, rule_actions(st, p), p)\n"
        "oracle_futures(st, p, np.zeros((2, 3, 2)), 2, mode='resampled')\n"
        "observe(st, p)\n"
    )
    assert "torch" not in _loaded_after_import(code)


def test_the_check_sees_torch_when_it_is_imported():
    """Control: the same check reports torch when the code does import it."""
    assert "torch" in _loaded_after_import("import wmplan.sim\nimport torch")

"""Stopping sight distance: the engine's ego, driven by the textbook manoeuvre, against AASHTO's numbers.

Source: AASHTO, *A Policy on Geometric Design of Highways and Streets* (6th ed. 2011 / 7th ed. 2018), section
3.2.2 and Table 3-1 (section/table numbers from memory [M]). Brake-reaction time 2.5 s and deceleration
3.4 m/s^2 (11.2 ft/s^2) are [S]; the metric formula SSD = 0.278 V t + 0.039 V^2 / a and the exact-kinematics
column are [D], the design column [M] (docs/references.md#aashto-green-book).

The manoeuvre: the ego drives straight on an empty road at V, with zero acceleration for 2.5 s, then brakes at
3.4 m/s^2 until it stands still. The engine integrates distance exactly for constant acceleration within a step
(``v dt + a dt^2 / 2``, stopping at v = 0 inside the step), and 2.5 s is a whole number of 0.1 s steps, so the
distance must equal the exact kinematics v t + v^2 / (2 a) to rounding error: the test allows 1e-6 m, much tighter
than one step's travel (2.8 m at 100 km/h), which would hide an off-by-one-step reaction time.

These numbers describe a point-mass simplification of a vehicle; they certify nothing about a real one.
"""

from __future__ import annotations

import numpy as np
import pytest

from wmplan.sim import engine
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO

REACTION_S = 2.5
DECEL_MPS2 = 3.4

# V km/h -> (exact kinematics [D], 0.039 formula [D], design [M]): docs/references.md#aashto-green-book
ROWS = {
    50.0: (63.09, 63.43, 65.0),
    80.0: (128.18, 129.01, 130.0),
    100.0: (182.92, 184.21, 185.0),
    120.0: (246.73, 248.58, 250.0),
}


def _drive_and_stop(scenario_variant, place, speed_kmh: float) -> tuple[float, np.ndarray]:
    """Run the manoeuvre in the engine; returns the distance travelled and the ego's lateral positions."""
    v0 = speed_kmh / 3.6
    scn = scenario_variant(
        num_lanes=3,
        **{"road.length_m": 2000.0, "ego.x_m": 100.0, "ego.lane": 1, "ego.speed_mps": v0, "ego.goal.x_m": 2000.0},
    )
    params = SimParams.from_scenario(scn)
    state = place(params, [], seeds=[0])
    assert state.ego_speed_mps[0] == pytest.approx(v0, rel=1e-15)
    x0 = float(state.x_m[0, EGO])
    n_react = int(round(REACTION_S / params.dt_s))
    assert n_react * params.dt_s == pytest.approx(REACTION_S, rel=1e-12)
    ys = []
    for k in range(2000):
        if state.ego_speed_mps[0] == 0.0:
            break
        accel = 0.0 if k < n_react else -DECEL_MPS2
        state, info = engine.step(state, np.array([[accel, 0.0]]), params)
        assert not (info.collision.any() or info.offroad.any())
        ys.append(float(state.y_m[0, EGO]))
    else:
        raise AssertionError("the ego did not stop within 2000 steps")
    return float(state.x_m[0, EGO]) - x0, np.array(ys)


@pytest.mark.parametrize("speed_kmh", sorted(ROWS))
def test_stopping_distance(scenario_variant, place, speed_kmh):
    """Reaction 2.5 s then 3.4 m/s^2 from V: distance vs the exact kinematics (1e-6 m and the tabled value to its
    2 decimals), vs the 0.039 formula (within 2 m, the size of its rounding of 1/(2 * 3.6^2) = 0.03858) and vs
    the design value (within 5 m: the design column is the calculated value rounded up to the next 5 m).

    Source: AASHTO Green Book section 3.2.2 / Table 3-1 [M]; t = 2.5 s and a = 3.4 m/s^2 [S]; values [D]/[M],
    docs/references.md#aashto-green-book.
    """
    exact_tab, formula, design = ROWS[speed_kmh]
    dist, ys = _drive_and_stop(scenario_variant, place, speed_kmh)
    v = speed_kmh / 3.6
    assert dist == pytest.approx(v * REACTION_S + v**2 / (2 * DECEL_MPS2), abs=1e-6)
    assert dist == pytest.approx(exact_tab, abs=0.005 + 1e-9)
    assert dist == pytest.approx(formula, abs=2.0)
    assert dist == pytest.approx(design, abs=5.0)
    assert np.all(ys == ys[0])  # straight ahead: no lateral drift


def test_formula_column_reproduces():
    """The 0.039 column itself: 0.278 V t + 0.039 V^2 / a ([D], docs/references.md#aashto-green-book); guards
    the table above."""
    for v_kmh, (_, formula, _) in ROWS.items():
        assert 0.278 * v_kmh * REACTION_S + 0.039 * v_kmh**2 / DECEL_MPS2 == pytest.approx(formula, abs=0.005)

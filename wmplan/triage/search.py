"""Could the ego have avoided it? A search over its action sequences against the true simulator, and the point
of no return.

**The drivers' future events fixed as they happened.** A search starts from the true simulator state recorded at
one decision of the failed episode and keeps its scene key and step counter. The simulator draws every random
number from a hash of (scene key, step, vehicle identity, stream) (:mod:`wmplan.rng`), so whatever the ego does,
every driver present draws the same hard-braking starts, sizes and durations at the same steps, and the same
yield decision for an interaction that begins at the same step. Three things still follow the ego, as they should
in a counterfactual: (1) the drivers react to it (car following, lane changes, yielding); (2) a yield decision is
drawn when an interaction begins, so if the ego's course makes it begin at another step, the draw is another one;
(3) the simulated stretch travels with the ego, so vehicles leave and enter at its ends at other times, and an
entering vehicle takes the next identity of its scene, with the traits that identity draws: a different ego
course can meet different newcomers. Over the few seconds a search covers, (3) concerns vehicles at the ends of
the stretch, far from the contact.

**The search** is the cross-entropy method (CEM; Rubinstein 1999, :func:`wmplan.plan.samplers.cem_update`) over
sequences of (acceleration, target lateral position) per decision: the steering at each decision is the
lane-tracking law of the rule-based ego toward that position (:func:`wmplan.sim.ego_rules.steer_to_lane`, with a
fractional lane). Against a replay whose random events are fixed, a feedback law and a sequence of commands are the
same thing: each parameter sequence yields one sequence of (acceleration, steering) commands. A few fixed
candidates (braking fully, keeping speed and accelerating fully, each in the current lane and the lanes beside it)
are always evaluated first. A sequence *avoids the failure* if the ego neither collides nor leaves the road from
the start decision until ``after_s`` past the original contact (or the episode's end, or its goal, whichever comes
first). The search stops at the first sequence that avoids it.

**The point of no return** is the latest decision from which some sequence still avoids the failure, found by
bisection over decision times between a decision known to be saveable and the contact (which is not). Bisection
assumes that saveable decisions come before unsaveable ones; that holds for the true answer (from an earlier
decision the ego can drive as it did and then take the saving sequence), and a search that misses a saving
sequence moves the point earlier, never later.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass

import numpy as np
import torch

from wmplan.evaluate.rows import clearance_and_ttc
from wmplan.plan.samplers import ar1_filter_matrix, cem_update
from wmplan.sim.ego_rules import steer_to_lane
from wmplan.sim.engine import step
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState


@dataclass(frozen=True)
class SearchBudget:
    """How hard the search over the ego's actions tries (the defaults are the 'default budget').

    Attributes:
        candidates: sequences per CEM iteration (the fixed ones included).
        iterations: CEM iterations at most (the search stops at the first sequence that avoids the failure).
        elites: lowest-cost sequences the Gaussian is refitted to.
        lookback_s: the cause is decided by a search from this many seconds before the contact.
        after_s: a sequence must stay clear this many seconds past the original contact.
        accel_std_mps2: initial spread of the acceleration (m/s^2).
        lane_std: initial spread of the target lateral position, in lane widths.
        smoothing: AR(1) coefficient of the sampled noise between decisions.
        oracle_futures: futures per decision for the oracle's P(collision) of the chosen plans.
    """

    candidates: int = 128
    iterations: int = 8
    elites: int = 12
    lookback_s: float = 4.0
    after_s: float = 2.0
    accel_std_mps2: float = 3.0
    lane_std: float = 0.8
    smoothing: float = 0.6
    oracle_futures: int = 64

    def __post_init__(self) -> None:
        for name in ("candidates", "iterations", "elites", "oracle_futures"):
            if int(getattr(self, name)) < 1:
                raise ValueError(f"SearchBudget.{name} must be >= 1, got {getattr(self, name)}")
        if self.elites > self.candidates:
            raise ValueError("SearchBudget.elites must not exceed candidates")
        for name in ("lookback_s", "after_s", "accel_std_mps2", "lane_std"):
            if not getattr(self, name) >= 0:
                raise ValueError(f"SearchBudget.{name} must be >= 0, got {getattr(self, name)}")
        if not 0.0 <= self.smoothing < 1.0:
            raise ValueError(f"SearchBudget.smoothing must lie in [0, 1), got {self.smoothing}")

    def to_dict(self) -> dict:
        """The result as a JSON-ready dict."""
        return asdict(self)


@dataclass(frozen=True)
class SearchResult:
    """Outcome of one search.

    Attributes:
        avoided: some sequence avoided the failure.
        sequences: sequences simulated.
        actions: (H, 2) the (acceleration, steering) commands of the first sequence that avoided it, or None.
        best_survival_s: the longest any sequence stayed clear (s from the start decision).
    """

    avoided: bool
    sequences: int
    actions: np.ndarray | None
    best_survival_s: float


def rollout(
    state: TrafficState,
    params: SimParams,
    accel: np.ndarray,
    lane_target: np.ndarray,
    substeps: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Simulate C sequences from the one scene of ``state``.

    Args:
        state: one scene (its key and step counter fix the drivers' random events).
        params: the scenario's arrays.
        accel: (C, H) acceleration per decision (m/s^2; clipped by the simulator).
        lane_target: (C, H) target lateral position per decision as a fractional lane index (0.0 is the centre of
            lane 0).
        substeps: simulator steps per decision (commands held in between).

    Returns:
        ``(failed (C,), survived_steps (C,), min_clearance_m (C,), commands (C, H, 2))``: whether the ego collided
        or left the road before reaching its goal, the steps it stayed clear, its smallest footprint clearance and
        the commands applied.
    """
    c_n, h_n = accel.shape
    st = state.take(np.zeros(c_n, dtype=np.int64))
    st = st.replace(
        collided=np.zeros(c_n, dtype=bool), offroad=np.zeros(c_n, dtype=bool), reached_goal=np.zeros(c_n, dtype=bool)
    )
    failed = np.zeros(c_n, dtype=bool)
    finished = np.zeros(c_n, dtype=bool)
    survived = np.zeros(c_n, dtype=np.int64)
    clearance = np.full(c_n, np.inf)
    commands = np.zeros((c_n, h_n, 2))
    for h in range(h_n):
        steer = steer_to_lane(st, params, lane_target[:, h])
        act = np.stack([accel[:, h], steer], axis=-1)
        commands[:, h] = act
        for _ in range(substeps):
            st, _info = step(st, act, params)
            live = ~finished
            bad = live & (st.collided | st.offroad)
            failed |= bad
            finished |= bad | (live & st.reached_goal)
            survived += live & ~bad
            c_now, _ttc = clearance_and_ttc(st)
            clearance = np.where(live, np.minimum(clearance, c_now), clearance)
        if finished.all():
            break
    return failed, survived, clearance, commands


def search_avoidance(
    state: TrafficState,
    params: SimParams,
    decisions: int,
    substeps: int,
    budget: SearchBudget,
    rng: np.random.Generator,
) -> SearchResult:
    """CEM over the ego's sequences from the one scene of ``state`` over ``decisions`` decisions (module docstring).

    Args:
        state: the true state at the start decision (one scene).
        params: the scenario's arrays.
        decisions: length of the sequences (decisions of ``substeps`` simulator steps).
        substeps: simulator steps per decision.
        budget: the search's size.
        rng: the search's only source of randomness.
    """
    h_n = max(1, int(decisions))
    c_n = int(budget.candidates)
    lane_now = float(params.lane_of(state.y_m[:, EGO])[0])
    lanes = [lane_now + d for d in (0, -1, 1) if 0 <= lane_now + d <= params.num_lanes - 1]
    fixed = [(a, ln) for ln in lanes for a in (-params.max_brake_mps2, 0.0, params.max_accel_mps2)]
    lo_lane, hi_lane = 0.0, float(params.num_lanes - 1)
    mean = np.zeros((h_n, 2))
    mean[:, 1] = lane_now
    std = np.empty((h_n, 2))
    std[:, 0], std[:, 1] = budget.accel_std_mps2, budget.lane_std
    filt = ar1_filter_matrix(h_n, budget.smoothing).double().numpy()  # (H, H): smooth noise, unit marginal std
    total = 0
    best = 0
    for it in range(int(budget.iterations)):
        noise = np.einsum("hk,ckd->chd", filt, rng.standard_normal((c_n, h_n, 2)))
        cand = mean[None] + std[None] * noise
        if it == 0:
            for i, (a, ln) in enumerate(fixed[:c_n]):
                cand[i, :, 0], cand[i, :, 1] = a, ln
        cand[..., 0] = np.clip(cand[..., 0], -params.max_brake_mps2, params.max_accel_mps2)
        cand[..., 1] = np.clip(cand[..., 1], lo_lane, hi_lane)
        failed, survived, clearance, commands = rollout(state, params, cand[..., 0], cand[..., 1], substeps)
        total += c_n
        best = max(best, int(survived.max()))
        if (~failed).any():
            i = int(np.nonzero(~failed)[0][0])
            return SearchResult(True, total, commands[i], float(h_n * substeps * params.dt_s))
        # cost: a later failure is better; between equal times, more clearance on the way
        cost = -survived.astype(np.float64) - 0.1 * np.clip(clearance, 0.0, 5.0)
        m, s = cem_update(
            torch.from_numpy(cand[None]),
            torch.from_numpy(cost[None]),
            int(budget.elites),
            torch.from_numpy(mean[None]),
            torch.from_numpy(std[None]),
            alpha=0.8,
            min_std=torch.tensor([0.3, 0.1]),
        )
        mean, std = m[0].double().numpy(), s[0].double().numpy()
    return SearchResult(False, total, None, best * params.dt_s)


def bisect_last_true(saveable: Callable[[int], bool], lo: int, hi: int) -> int:
    """The largest d in [lo, hi) with ``saveable(d)``, given ``saveable(lo)`` is True and ``hi`` is not saveable,
    assuming saveable decisions precede unsaveable ones; calls ``saveable`` about log2(hi - lo) times."""
    if hi <= lo:
        raise ValueError(f"need lo < hi, got lo={lo}, hi={hi}")
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if saveable(mid):
            lo = mid
        else:
            hi = mid
    return lo

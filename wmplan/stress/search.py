"""Searching scenario variants and traffic seeds for failures of a planner, and replaying what was found.

A *sample* is a knob vector z (see :mod:`wmplan.stress.knobs`); for each sample the evaluator runs
``seeds_per_sample`` episodes with fresh scene seeds, which fix the traffic's random events (who yields, who brakes
hard, the drivers' hidden traits). They share one simulator batch, so a sample of 4 episodes costs about as much
time as one. A **failure** is a collision or leaving the road before the episode ends.

Score of a sample (larger is closer to failure; a failure exactly when the score is >= 0)::

    score = k / m                                   if k of its m episodes failed (k >= 1)
          = max_j min(max_brake_threat_j, 1) - 1    otherwise: the closest call, as the largest share of the
                                                    ego's braking it would have needed to avoid what was ahead
                                                    (``wmplan.sim.threat``; in [-1, 0])
          = -min_j clip(min_ttc_s_j, 0, 30)         for runners whose rows lack ``max_brake_threat``: the smallest
                                                    time-to-collision to a vehicle in the ego's path (seconds)

and its *value* for the estimate is k / m (the conditional failure rate given z, estimated from m seeds). The
multilevel cross-entropy method (:mod:`wmplan.stress.rare_event`) raises the level of this score step by step:
first variants where the ego needs a larger share of its brakes, then ones where it hits something. (The
brake threat knows the ego's braking limit, which the time-to-collision does not: with the TTC as score, the levels
of a search over the ego's braking drifted toward strong brakes, away from the failures.) That is the CEM search for
failures; its last proposal also serves importance sampling. (The smallest footprint clearance is not used: when
the ego drives beside traffic in the next lane it sits at about 1.5 m whatever the danger, so it carries little
signal.)

Every distinct failure (scenario variant, seed) can be saved as a scenario YAML file (``scenario_to_yaml``) and a
JSON file beside it with the planner, the seed and what was found; :func:`replay` runs it again and confirms it.
Animations: pass ``animate(scenario_file, seed, planner, out_file) -> Path`` to :func:`save_failures` (the CLI
builds one from ``wmplan.viz.anim``; this module does not import the plotting stage).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Sequence
from concurrent.futures import Executor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from wmplan.caution import CAUTION
from wmplan.errors import ConfigError
from wmplan.evaluate.closed_loop import evaluate_seeds, run_episodes
from wmplan.evaluate.planners import resolve_planner
from wmplan.io import atomic_write_json, atomic_write_text
from wmplan.scenario import (
    Scenario,
    load_scenario,
    parse_scenario,
    scenario_hash,
    scenario_to_dict,
    scenario_to_yaml,
)
from wmplan.stress.knobs import (
    DEFAULT_KNOBS,
    DEFAULT_Z_STEP,
    Knob,
    check_knobs,
    knob_values,
    quantise,
    variant,
)
from wmplan.stress.rare_event import GaussianFamily, cross_entropy_levels
from wmplan.sweep.runner import InlineExecutor

FAILURE_DEFINITION = "collision or leaving the road before the episode ends"
TTC_CAP_S = 30.0
Animate = Callable[[Path, int, str, Path], Path]
"""``animate(scenario_file, seed, planner, out_file) -> path written``."""


def is_failure(row: dict) -> bool:
    """Whether an episode row is a failure: a collision or leaving the road."""
    return bool(row["collision"]) or bool(row["offroad"])


def closeness_s(row: dict) -> float:
    """How close an episode came to failing (larger: closer; at most 0): its largest brake threat, capped at 1,
    minus 1; or, for rows without one, minus the smallest time-to-collision clipped to [0, 30] s."""
    threat = row.get("max_brake_threat")
    if threat is not None and not math.isnan(float(threat)):
        return min(max(float(threat), 0.0), 1.0) - 1.0
    ttc = float(row.get("min_ttc_s", TTC_CAP_S))
    return -min(max(ttc, 0.0), TTC_CAP_S) if not math.isnan(ttc) else -TTC_CAP_S


def sample_score(rows: Sequence[dict]) -> tuple[float, float]:
    """(score, value) of one sample from the rows of its episodes (see the module docstring)."""
    k = sum(is_failure(r) for r in rows)
    if k:
        return k / len(rows), k / len(rows)
    return max(closeness_s(r) for r in rows), 0.0


EPISODES_PER_TASK = 64
"""Episodes handed to one worker task (several variants share it; the sampling planners batch them together)."""


def _variant_rows(planner: str, scenarios: list[dict], seeds: list[list[int]], options: dict) -> list[list[dict]]:
    """Episodes of several variants through the one closed loop (run seed 0), rows per variant (runs in a
    worker)."""
    outs = run_episodes([parse_scenario(d) for d in scenarios], seeds, planner, options=options, seed=0)
    return [o.rows for o in outs]


@dataclass
class Sample:
    """One simulated sample: rounded knobs, seed, outcome, and where it was drawn."""

    z: np.ndarray
    seed: int
    variant_id: str
    row: dict
    stage: str


@dataclass
class StressEvaluator:
    """Simulates knob samples: groups them by scenario variant and runs each group as one batch of episodes.

    Attributes:
        base: the base scenario.
        planner: registered planner name.
        knobs: the knob list (z has one coordinate per knob).
        z_step: knob resolution (see :mod:`wmplan.stress.knobs`).
        seed_rng: the generator of scene seeds (drawn uniformly in [0, 2**32), the seeds' nominal distribution).
        executor: where groups run (default: in this process).
        planner_options: keyword options for the planner's runner.
        seeds_per_sample: episodes per knob sample (m); may be changed between stages.
        on_simulated: called with the number of episodes after each batch (progress).
    """

    base: Scenario
    planner: str
    knobs: Sequence[Knob]
    z_step: float
    seed_rng: np.random.Generator
    executor: Executor = field(default_factory=InlineExecutor)
    planner_options: dict[str, Any] = field(default_factory=dict)
    seeds_per_sample: int = 1
    on_simulated: Callable[[int], None] | None = None
    samples: list[Sample] = field(default_factory=list)
    _variants: dict[tuple, tuple[str, dict]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        resolve_planner(self.planner)

    def _variant(self, zq: np.ndarray) -> tuple[str, dict]:
        key = tuple(np.round(zq / self.z_step).astype(np.int64).tolist())
        if key not in self._variants:
            scn = variant(self.base, self.knobs, zq)
            self._variants[key] = (scenario_hash(scn)[:16], scenario_to_dict(scn))
        return self._variants[key]

    def simulate(self, z: np.ndarray, stage: str) -> list[list[dict]]:
        """For samples z (N, D): ``seeds_per_sample`` episodes each with fresh scene seeds; rows per sample."""
        zq = quantise(z, self.z_step)
        m = self.seeds_per_sample
        seeds = self.seed_rng.integers(0, 2**32, size=(len(zq), m), dtype=np.int64)
        groups: dict[str, list[int]] = {}
        scenarios: dict[str, dict] = {}
        for i, row in enumerate(zq):
            vid, scn = self._variant(row)
            groups.setdefault(vid, []).append(i)
            scenarios[vid] = scn
        # tasks of whole variants, about EPISODES_PER_TASK episodes each, in the order the variants were first drawn
        # (so the tasks, and the rows, do not depend on the executor or on the number of workers)
        tasks: list[list[str]] = []
        size = 0
        for vid, idx in groups.items():
            if not tasks or size + len(idx) * m > EPISODES_PER_TASK:
                tasks.append([])
                size = 0
            tasks[-1].append(vid)
            size += len(idx) * m
        futures = [
            self.executor.submit(
                _variant_rows,
                self.planner,
                [scenarios[v] for v in task],
                [[int(s) for i in groups[v] for s in seeds[i]] for v in task],
                self.planner_options,
            )
            for task in tasks
        ]
        rows: list[list[dict]] = [[] for _ in range(len(zq))]
        for task, fut in zip(tasks, futures, strict=True):
            for vid, flat in zip(task, fut.result(), strict=True):
                idx = groups[vid]
                for j, i in enumerate(idx):
                    rows[i] = flat[j * m : (j + 1) * m]
                    for r in rows[i]:
                        self.samples.append(
                            Sample(z=zq[i].copy(), seed=int(r["seed"]), variant_id=vid, row=r, stage=stage)
                        )
            if self.on_simulated is not None:
                self.on_simulated(sum(len(groups[v]) for v in task) * m)
        return rows

    def scorer(self, stage: Callable[[], str]) -> Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]:
        """A score function for :mod:`wmplan.stress.rare_event` returning (scores, values); ``stage()`` labels
        each batch of samples."""

        def score(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            pairs = [sample_score(r) for r in self.simulate(z, stage())]
            return np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])

        return score

    def failures(self) -> list[Sample]:
        """Distinct failures seen so far (one per variant and seed), most plausible under the nominal first."""
        seen: dict[tuple[str, int], Sample] = {}
        for s in self.samples:
            if is_failure(s.row) and (s.variant_id, s.seed) not in seen:
                seen[(s.variant_id, s.seed)] = s
        return sorted(seen.values(), key=lambda s: (float(s.z @ s.z), s.variant_id, s.seed))


def _json_row(row: dict) -> dict:
    return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in row.items()}


def save_failures(
    evaluator: StressEvaluator,
    out_dir: Path,
    *,
    max_saved: int = 10,
    stress_seed: int | None = None,
    animate: Animate | None = None,
) -> list[Path]:
    """Write up to ``max_saved`` distinct failures (most plausible first) as ``out/failures/<name>.yaml`` + ``.json``.

    Returns:
        The JSON files written (pass one to :func:`replay`).
    """
    folder = Path(out_dir) / "failures"
    written = []
    for k, s in enumerate(evaluator.failures()[:max_saved]):
        stem = f"failure-{k:02d}-{s.variant_id[:8]}-seed{s.seed}"
        scn = variant(evaluator.base, evaluator.knobs, s.z)
        yaml_path = folder / f"{stem}.yaml"
        header = (
            f"# A failure of planner {evaluator.planner} found by `wmplan stress` ({FAILURE_DEFINITION}).\n"
            f"# Replay: scene seed {s.seed}; see {stem}.json. {CAUTION}\n"
        )
        atomic_write_text(yaml_path, header + scenario_to_yaml(scn))
        anim = None
        if animate is not None:
            anim = Path(animate(yaml_path, s.seed, evaluator.planner, folder / f"{stem}.gif")).name
        info = {
            "scenario_file": yaml_path.name,
            "scenario_hash": scenario_hash(scn),
            "base_scenario": evaluator.base.name,
            "planner": evaluator.planner,
            "planner_options": evaluator.planner_options,
            "seed": s.seed,
            "failure": FAILURE_DEFINITION,
            "stage": s.stage,
            "stress_seed": stress_seed,
            "knobs": {
                kn.name: {"z": float(z), "value": v}
                for kn, z, v in zip(
                    evaluator.knobs, s.z, knob_values(evaluator.base, evaluator.knobs, s.z).values(), strict=True
                )
            },
            "nominal_log_density": float(GaussianFamily.standard(len(s.z)).log_pdf(s.z[None, :])[0]),
            "outcome": _json_row(s.row),
            "animation": anim,
            "caution": CAUTION,
        }
        json_path = folder / f"{stem}.json"
        atomic_write_json(json_path, info)
        written.append(json_path)
    return written


def replay(failure_file: str | Path) -> bool:
    """Run a saved failure again; True if the episode fails again (it should, the simulator is deterministic).

    Args:
        failure_file: the ``.json`` written by :func:`save_failures`, or the ``.yaml`` beside it.
    """
    _info, row = replay_episode(failure_file)
    return is_failure(row)


def replay_episode(failure_file: str | Path, planner_options: dict[str, Any] | None = None) -> tuple[dict, dict]:
    """Run a saved failure again: (its record, the new episode row). ``planner_options`` replace the recorded
    ones key by key (e.g. a model folder that has moved since)."""
    path = Path(failure_file)
    json_path = path.with_suffix(".json")
    if not json_path.is_file():
        raise ConfigError(f"{json_path}: no such failure record (expected beside {path.name})")
    try:
        info = json.loads(json_path.read_text(encoding="utf-8"))
        scenario_file = json_path.parent / info["scenario_file"]
        planner, seed, options = info["planner"], int(info["seed"]), dict(info.get("planner_options") or {})
    except (OSError, ValueError, KeyError, TypeError) as err:
        raise ConfigError(f"{json_path}: not a failure record ({type(err).__name__}: {err})") from None
    options.update(planner_options or {})
    row = evaluate_seeds(load_scenario(scenario_file), planner, [seed], options=options).rows[0]
    return info, row


def search_failures(
    scenario: Scenario | str | Path,
    planner: str,
    budget: int,
    out_dir: str | Path,
    seed: int,
    *,
    knobs: Sequence[Knob] | None = None,
    z_step: float | None = None,
    rho: float = 0.1,
    n_per_level: int | None = None,
    std_floor: float = 0.3,
    max_saved: int = 10,
    seeds_per_sample: int = 4,
    planner_options: dict[str, Any] | None = None,
    executor: Executor | None = None,
    animate: Animate | None = None,
) -> dict:
    """CEM search for failures alone: cross-entropy levels over the knobs, then sampling from the last proposal,
    about ``budget`` episodes in all (``seeds_per_sample`` per knob sample).

    With no importance-sampling stage to protect, the search lets the proposal narrow further (``std_floor`` 0.3)
    to concentrate on the failure region it finds. Returns ``{"failures_found", "failures_saved", "simulations",
    "levels"}``.
    """
    base = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    knobs = tuple(DEFAULT_KNOBS if knobs is None else knobs)
    check_knobs(base, knobs)
    ss_search, ss_seeds = np.random.SeedSequence(seed).spawn(2)
    ev = StressEvaluator(
        base,
        planner,
        knobs,
        DEFAULT_Z_STEP if z_step is None else z_step,
        np.random.default_rng(ss_seeds),
        executor or InlineExecutor(),
        dict(planner_options or {}),
        seeds_per_sample=seeds_per_sample,
    )
    budget_z = max(1, budget // seeds_per_sample)
    n = n_per_level or max(20, budget_z // 6)
    level = [0]
    rng = np.random.default_rng(ss_search)
    proposal, levels, _, used = cross_entropy_levels(
        ev.scorer(lambda: f"search level {level[0]}"),
        GaussianFamily.standard(len(knobs)),
        0.0,
        n_per_level=n,
        rho=rho,
        max_levels=max(1, budget_z // n),
        std_floor=std_floor,
        rng=rng,
        on_samples=lambda x, s, t: level.__setitem__(0, t + 1),
    )
    if budget_z > used:  # the failure region is reached: spend the rest sampling it
        ev.simulate(proposal.sample(budget_z - used, rng), "search final")
    saved = save_failures(ev, Path(out_dir), max_saved=max_saved, stress_seed=seed, animate=animate)
    return {
        "failures_found": len(ev.failures()),
        "failures_saved": [p.name for p in saved],
        "simulations": len(ev.samples),
        "levels": [{"gamma": lv.gamma, "n": lv.n, "elite": lv.elite} for lv in levels],
    }

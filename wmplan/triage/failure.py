"""Triage of one failure: was it the prediction, the plan, or past saving?

:func:`triage_failure` takes one failed episode (scenario, planner, options, scene seed, run seed) and

1. replays it with its decisions recorded (:mod:`wmplan.triage.replay`); a failure that does not fail again is
   reported as ``not reproduced`` and goes no further;
2. replays it with the same planner over the oracle's futures, drivers' traits known, then re-drawn, until
   ``after_s`` past the original contact (the window of the search below): if either avoids the failure, the
   cause is **prediction**;
3. otherwise searches the ego's action sequences against the true simulator from ``lookback_s`` before the contact,
   with the drivers' random events fixed as they happened (:mod:`wmplan.triage.search`): if a sequence avoids the
   failure, the cause is **planning**, if none does within the budget, **past saving**;
4. finds the point of no return by bisection over decision times (every cause gets one);
5. lists what the planner believed at each decision: its predicted P(collision) of the chosen plan beside the
   oracle's P(collision) of the same plan, and how far its predicted futures were from what happened.

"Avoids" means neither a collision nor leaving the road within the episode. Results describe wmplan's
simplified traffic model only (:data:`wmplan.caution.CAUTION`).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

import numpy as np

from wmplan.caution import CAUTION
from wmplan.scenario import Scenario
from wmplan.sim.params import SimParams
from wmplan.triage.replay import counterfactual, oracle_risk, prediction_errors, record_failure
from wmplan.triage.search import SearchBudget, bisect_last_true, search_avoidance

CAUSES = ("prediction", "planning", "past saving", "not reproduced")
STAGES = ("replay", "oracle, traits known", "oracle, traits re-drawn", "belief", "search", "point of no return")
SALT = 0x7A1A6E


def _outcome(row: dict) -> str:
    return "collision" if row["collision"] else "offroad" if row["offroad"] else str(row.get("outcome", "goal"))


def triage_failure(
    scenario: Scenario,
    planner: str,
    seed: int,
    *,
    options: dict[str, Any] | None = None,
    eval_seed: int = 0,
    budget: SearchBudget | None = None,
    triage_seed: int = 0,
    progress: Callable[[str], None] | None = None,
) -> dict:
    """Triage one failed episode (module docstring).

    Args:
        scenario: the scenario the episode ran in.
        planner: its planner spec (:mod:`wmplan.evaluate.planners`).
        seed: the episode's scene seed.
        options: the planner's options (as the run used them).
        eval_seed: the run's seed (``evaluate --seed``; stress runs use 0).
        budget: the search's size (default :class:`SearchBudget`).
        triage_seed: seeds the searches (with the scene seed and the decision).
        progress: called with the name of each stage as it starts (one of :data:`STAGES`).

    Returns:
        A JSON-ready dict: ``planner``, ``seed``, ``outcome``, ``contact_s`` (time of the contact since the start),
        ``cause`` (one of :data:`CAUSES`), ``replays`` (the outcome of each replay), ``search`` (the cause-deciding
        search), ``point_of_no_return`` {``status`` 'found' or 'before start', ``time_s``, ``before_contact_s``,
        ``searches``}, ``decisions`` (per decision: ``time_s``, ``believed_p``, ``oracle_p``, ``prediction_error_m``,
        ``best_prediction_error_m``), ``seconds`` and ``caution``.
    """
    budget = budget or SearchBudget()
    opts = dict(options or {})
    say = progress or (lambda _stage: None)
    t_start = time.perf_counter()
    params = SimParams.from_scenario(scenario)
    say(STAGES[0])
    original = record_failure(params, planner, opts, seed, eval_seed)
    out: dict[str, Any] = {
        "planner": planner,
        "seed": int(seed),
        "eval_seed": int(eval_seed),
        "outcome": _outcome(original.row),
        "contact_side": original.row.get("contact_side", ""),
        "contact_s": float(original.row["time_s"]),
        "caution": CAUTION,
    }
    if not original.failed:
        out.update(
            cause="not reproduced",
            replays={"original": _outcome(original.row)},
            point_of_no_return=None,
            decisions=[],
            seconds=round(time.perf_counter() - t_start, 2),
        )
        return out
    replays = {"original": {"outcome": _outcome(original.row), "time_s": original.row["time_s"]}}
    # the counterfactual episodes end where the search's window ends: after_s past the original contact
    until = min(scenario.duration_s, out["contact_s"] + budget.after_s)
    cut = SimParams.from_scenario(scenario.model_copy(update={"duration_s": until}))
    for stage, mode in ((STAGES[1], "known"), (STAGES[2], "resampled")):
        say(stage)
        rep, label = counterfactual(cut, planner, opts, seed, eval_seed, mode)
        replays[f"oracle_{mode}"] = {
            "planner": label,
            "outcome": _outcome(rep.row) if rep.failed else "avoided",
            "avoided": not rep.failed,
            "time_s": rep.row["time_s"],
            "until_s": until,
        }
    out["replays"] = replays

    say(STAGES[3])
    records = original.records
    dec_dt = records[1].time_s - records[0].time_s if len(records) > 1 else params.dt_s * 2
    sub = max(1, int(round(dec_dt / params.dt_s)))
    horizon = max((r.plan.shape[0] for r in records if r.plan is not None), default=15)
    true_p = oracle_risk(
        params,
        records,
        horizon,
        dec_dt,
        budget.oracle_futures,
        seed=int(np.random.SeedSequence([triage_seed, SALT, seed]).generate_state(1)[0] >> 1),
    )
    errors = prediction_errors(records)
    out["decisions"] = [
        {
            "time_s": round(r.time_s, 6),
            "believed_p": r.believed_p,
            "oracle_p": float(p),
            "prediction_error_m": None if e is None else e["mean_m"],
            "best_prediction_error_m": None if e is None else e["best_m"],
        }
        for r, p, e in zip(records, true_p, errors, strict=True)
    ]

    # --- searches over the ego's actions: the cause, then the point of no return ---
    last = len(records) - 1  # the decision during which the contact happened
    n_dec_episode = params.num_steps // sub
    end_dec = min(n_dec_episode, last + 1 + int(round(budget.after_s / dec_dt)))
    cache: dict[int, Any] = {}

    def search(d: int):
        if d not in cache:
            rng = np.random.default_rng(np.random.SeedSequence([triage_seed, SALT, int(seed), d]))
            cache[d] = search_avoidance(records[d].state, params, end_dec - d, sub, budget, rng)
        return cache[d]

    say(STAGES[4])
    d0 = max(0, last - int(round(budget.lookback_s / dec_dt)))
    first = search(d0)
    out["search"] = {
        "from_s": records[d0].time_s,
        "before_contact_s": out["contact_s"] - records[d0].time_s,
        "avoided": first.avoided,
        "sequences": first.sequences,
        "best_survival_s": round(first.best_survival_s, 3),
    }
    predicted = any(r.get("avoided") for k, r in replays.items() if k.startswith("oracle_"))
    out["cause"] = "prediction" if predicted else "planning" if first.avoided else "past saving"

    say(STAGES[5])
    lo = hi = None
    if first.avoided:
        lo, hi = d0, last + 1
    elif d0 > 0 and search(0).avoided:
        lo, hi = 0, d0
    if lo is None:
        pnr = {
            "status": "before start",
            "time_s": None,
            "before_contact_s": None,
            "at_least_before_contact_s": out["contact_s"],
        }
    else:
        d_star = bisect_last_true(lambda d: search(d).avoided, lo, hi)
        t_star = records[d_star].time_s
        pnr = {
            "status": "found",
            "decision": d_star,
            "time_s": round(t_star, 6),
            "before_contact_s": round(out["contact_s"] - t_star, 6),
        }
    pnr["searches"] = {str(round(records[d].time_s, 6)): bool(r.avoided) for d, r in sorted(cache.items())}
    pnr["sequences"] = int(sum(r.sequences for r in cache.values()))
    out["point_of_no_return"] = pnr
    out["seconds"] = round(time.perf_counter() - t_start, 2)
    return out

"""Assessing forward models against held-out episodes and against the simulator's true futures.

Predictors: the latent model, the deterministic (least-squares) model if given, and constant velocity (its
variance fitted on the model's training data). All see the same fresh episodes, simulated with a seed that no
dataset uses, and the same oracle states and ego plans.

Metrics (keys of each predictor's entry):

| key                 | meaning                                                                                 |
|---------------------|-----------------------------------------------------------------------------------------|
| min_ade_k6_m        | for each object, the best of K = 6 futures by mean displacement over the horizon; mean   |
| min_fde_k6_m        | for each object, the best of 6 by displacement at the horizon (3 s); mean                |
| nll                 | -log predictive density of each true position (x, y) per object and step, nats; the      |
|                     | predictive is the mixture over 32 draws of z of the decoder's Gaussians                 |
| coverage_90         | share of true coordinates inside the central 90% interval of 100 predictive samples      |
| energy_distance     | energy distance (Szekely & Rizzo 2013) between 32 model futures and 32 oracle futures of |
|                     | each object's trajectory (flattened positions, metres), same states and plans; ``known`` |
| collision_prob_gap  | mean |P_model(collision) - P_oracle(collision)| over states and plans; ``known`` oracle   |
| *_resampled         | the two oracle metrics against the ``resampled`` oracle                                  |
| collision_prob_gap_ | mean |P_model - P_oracle| over the contested (state, plan) pairs only: those whose         |
| contested           | ``resampled`` oracle P(collision) lies in ``CONTESTED_BAND`` (None when no pair does)    |

Contested pairs (the result's ``contested`` entry) are drawn from every held-out episode still running at every
``CONTESTED_STRIDE``-th decision from the first with a full history, each with the three rule-based plans: the
oracle that re-draws the hidden traits (``oracle_samples`` futures per plan, all states in one batch) screens them
all, and the states with at least one pair inside the band are kept, in time order, up to ``oracle_states`` of
them. Where the oracle is sure (P near 0 or 1), a predictor that is never worried looks good; the contested pairs
are where its collision probability matters. The band is taken on the oracle that re-draws the traits because the
traits are what no predictor sees: with them known, the futures split only on the drivers' random events, and
almost no pair is contested (DEVELOPERS.md gives the counts). The entry says how many states were screened, how
many had a pair in the band, and how many pairs were measured.

Futures for the energy distance and collision probability are decoder means per draw of z (what the planner uses);
the NLL and the coverage use the full predictive, decoder noise included.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch

from wmplan.caution import CAUTION
from wmplan.data import Dataset, collect, episode_seeds, load_dataset
from wmplan.data.windows import Windows, WindowSpec, anchor_index
from wmplan.errors import ConfigError
from wmplan.model.baselines import ConstantVelocity
from wmplan.model.checkpoint import load_model
from wmplan.model.train import to_torch
from wmplan.scenario import Scenario, scenario_hash
from wmplan.sim.collision import boxes_overlap
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.engine import step
from wmplan.sim.features import F_HEADING, F_LENGTH, F_VALID, F_WIDTH, F_X, F_Y
from wmplan.sim.observe import gather_slots, to_frame
from wmplan.sim.oracle import oracle_futures, oracle_futures_batch
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState

HELDOUT_SEED_BASE = 7_000_000  # datasets use small seeds; assessment episodes use seeds from here on
K_BEST = 6
K_DENSITY = 32
K_COVERAGE = 100
CHUNK_WINDOWS = 64
"""Held-out windows sampled at once: K_COVERAGE futures of 64 windows are 28 MB of rows, below the size the memory
allocator serves from fresh pages (:mod:`wmplan._alloc`)."""
PLAN_OFFSETS_MPS2 = (0.0, 1.0, -2.0)
CONTESTED_BAND = (0.02, 0.98)
"""Closed bounds of the oracle's P(collision) of a (state, plan) pair counted as contested."""
CONTESTED_STRIDE = 4
"""Decisions between the times at which held-out episodes are screened for contested pairs."""


def ade_fde(
    pred: torch.Tensor, true: torch.Tensor, valid: torch.Tensor
) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Best-of-K errors per object.

    Args:
        pred: (B, K, H, N, 2) predicted positions; true: (B, H, N, 2); valid: (B, H, N) bool.

    Returns:
        minADE (B, N), minFDE (B, N) and the mask of objects they are defined for (valid at every step).
    """
    err = (pred - true[:, None]).norm(dim=-1)  # (B, K, H, N)
    full = valid.all(dim=1)  # (B, N)
    ade = err.mean(dim=2).min(dim=1).values
    fde = err[:, :, -1].min(dim=1).values
    return ade, fde, full


def mixture_nll(mean: torch.Tensor, logvar: torch.Tensor, true: torch.Tensor) -> torch.Tensor:
    """-log of an equal-weight mixture of diagonal 2-D Gaussians at ``true``.

    mean, logvar: (B, K, N, H, 2); true: (B, N, H, 2) -> (B, N, H) nats.
    """
    var = logvar.exp()
    logp = -0.5 * (np.log(2 * np.pi) * 2 + logvar.sum(-1) + ((true[:, None] - mean) ** 2 / var).sum(-1))  # (B,K,N,H)
    k = mean.shape[1]
    return -(torch.logsumexp(logp, dim=1) - np.log(k))


def energy_distance(x: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """Energy distance 2E|X-Y| - E|X-X'| - E|Y-Y'| between sample sets x (..., n, d) and y (..., m, d)."""
    exy = torch.cdist(x, y).mean((-1, -2))
    exx = torch.cdist(x, x).mean((-1, -2))
    eyy = torch.cdist(y, y).mean((-1, -2))
    return 2 * exy - exx - eyy


def model_collisions(rows: np.ndarray, ego_length_m: float, ego_width_m: float) -> np.ndarray:
    """(..., ) True where the ego (row 0) overlaps another valid row at any step; rows (..., H, N, F)."""
    ego = rows[..., :1, :]
    oth = rows[..., 1:, :]
    hit = boxes_overlap(
        ego[..., F_X],
        ego[..., F_Y],
        ego_length_m,
        ego_width_m,
        ego[..., F_HEADING],
        oth[..., F_X],
        oth[..., F_Y],
        oth[..., F_LENGTH],
        oth[..., F_WIDTH],
        oth[..., F_HEADING],
    )
    return (hit & (oth[..., F_VALID] > 0.5)).any(axis=(-1, -2))


def heldout_metrics(
    pred, batch: dict, true: torch.Tensor, valid: torch.Tensor, seed: int, chunk: int = CHUNK_WINDOWS
) -> dict:
    """minADE / minFDE over K_BEST samples, the mixture NLL over K_DENSITY and the coverage of the central 90%
    interval over K_COVERAGE noisy samples, of predictor ``pred`` on the windows of ``batch`` (true futures ``true``
    (B, H, N, 2), ``valid`` (B, H, N)). The windows are taken ``chunk`` at a time, each kind of draw from its own
    generator continuing across chunks: the largest sample (K_COVERAGE futures of every window) then stays a few
    tens of MB instead of about 2 GB for 4096 windows, and is not paid for in page faults."""
    gens = [torch.Generator().manual_seed(seed + i) for i in (1, 2, 3)]
    parts: dict[str, list[torch.Tensor]] = {"ade": [], "fde": [], "full": [], "nll": [], "inside": []}
    for s in range(0, true.shape[0], chunk):
        sub = {key: val[s : s + chunk] for key, val in batch.items()}
        t, v = true[s : s + chunk], valid[s : s + chunk]
        acts = sub["actions"][:, None]
        s6 = pred.sample(sub, acts, K_BEST, generator=gens[0])
        ade, fde, full = ade_fde(s6["rows"][:, 0, ..., :2], t, v)
        sd = pred.sample(sub, acts, K_DENSITY, generator=gens[1])
        xy_mean = sd["rows"][:, 0, ..., :2].permute(0, 1, 3, 2, 4)  # (B, K, N, H, 2)
        nll = mixture_nll(xy_mean, sd["logvar"][:, 0], t.permute(0, 2, 1, 3))  # (B, N, H)
        sc = pred.sample(sub, acts, K_COVERAGE, generator=gens[2], noise=True)
        xs = sc["rows"][:, 0, ..., :2]  # (B, K, H, N, 2)
        lo, hi = torch.quantile(xs, torch.tensor([0.05, 0.95], dtype=xs.dtype), dim=1)  # one sort for both ends
        inside = ((t >= lo) & (t <= hi)).float()  # (B, H, N, 2)
        for key, val in (
            ("ade", ade[full]),
            ("fde", fde[full]),
            ("full", full),
            ("nll", nll[v.permute(0, 2, 1)]),
            ("inside", inside[v]),
        ):
            parts[key].append(val)
    cat = {key: torch.cat(val) for key, val in parts.items()}
    return {
        "min_ade_k6_m": float(cat["ade"].mean()),
        "min_fde_k6_m": float(cat["fde"].mean()),
        "nll": float(cat["nll"].mean()),
        "coverage_90": float(cat["inside"].mean()),
        "num_objects": int(cat["full"].sum()),
    }


def _heldout(scn: Scenario, episodes: int, seed: int, snapshot_times: list[int], decision_every: int):
    params = SimParams.from_scenario(scn)
    seeds = episode_seeds(HELDOUT_SEED_BASE + seed, episodes)
    snaps: dict[int, TrafficState] = {}

    def keep(t: int, state: TrafficState) -> None:
        if t in snapshot_times:
            snaps[t] = state

    traj = collect(params, seeds, policy_mix=0.5, decision_every=decision_every, on_decision=keep)
    manifest = {"decision_dt_s": decision_every * scn.dt_s, "scenario_hash": scenario_hash(scn)}
    return params, Dataset(path=Path("."), scenarios=(scn,), manifest=manifest, traj=traj), snaps


def _rule_plans(params: SimParams, states: TrafficState, horizon: int, decision_every: int) -> np.ndarray:
    """(S, C, H, 2) plans per state: the rule-based driver's own continuation and two acceleration offsets."""
    st = states
    acts = []
    for _ in range(horizon):
        a = rule_actions(st, params)
        acts.append(a)
        for _ in range(decision_every):
            st, _ = step(st, a, params)
    base = np.stack(acts, axis=1)  # (S, H, 2)
    plans = np.repeat(base[:, None], len(PLAN_OFFSETS_MPS2), axis=1)
    plans[..., 0] += np.asarray(PLAN_OFFSETS_MPS2)[None, :, None]
    plans[..., 0] = np.clip(plans[..., 0], -params.max_brake_mps2, params.max_accel_mps2)
    return plans


def load_predictors(
    model_dir: Path | str, deterministic_dir: Path | str | None = None, *, say: Callable[[str], None] | None = None
) -> tuple[dict[str, object], bool]:
    """The predictors to assess: the latent model, the least-squares one if given, and constant velocity with its
    variance fitted on the latent model's training windows (every scenario of its dataset).

    Returns:
        The predictors by name and whether constant velocity was fitted (False when the training data are gone:
        each scenario then fits it on half of its own held-out episodes).

    Raises:
        ConfigError: a model of the wrong kind in either place.
    """
    say = say or (lambda msg: None)
    model, meta = load_model(model_dir)
    if meta.get("kind") != "latent":
        raise ConfigError(
            f"{model_dir}: is a {meta.get('kind')} model; "
            "pass the latent model first and the other with --deterministic"
        )
    predictors: dict[str, object] = {"latent": model}
    if deterministic_dir is not None:
        det, det_meta = load_model(deterministic_dir)
        if det_meta.get("kind") != "deterministic":
            raise ConfigError(f"{deterministic_dir}: --deterministic expects a model trained with --deterministic")
        predictors["deterministic"] = det
    cfg = model.cfg
    spec = WindowSpec(cfg.history, cfg.horizon, cfg.num_objects)
    cv = ConstantVelocity(cfg, model.ego)
    train_path = Path(meta.get("dataset", {}).get("path", ""))
    try:
        train_ds = load_dataset(train_path, verify_hash=False)
        tw = Windows(train_ds, spec)
        ti = anchor_index(train_ds, spec, stride=7)
        ti = ti[np.linspace(0, len(ti) - 1, min(len(ti), 20000)).astype(np.int64)]  # evenly over every scenario
        cv.fit_variance(to_torch(tw.batch(ti[i : i + 2048])) for i in range(0, len(ti), 2048))
        say(f"constant velocity: variance fitted on {len(ti)} windows of {train_path}")
        fitted = True
    except Exception:  # noqa: BLE001 - the training data may have moved; fall back to a held-out half
        fitted = False
    predictors["constant_velocity"] = cv
    return predictors, fitted


def assess(
    model_dir: Path | str,
    scenario: Scenario,
    *,
    deterministic_dir: Path | str | None = None,
    episodes: int = 96,
    oracle_states: int = 48,
    oracle_samples: int = 32,
    seed: int = 0,
    progress: Callable[[str], None] | None = None,
    predictors: tuple[dict[str, object], bool] | None = None,
) -> dict:
    """Compare the predictors on held-out episodes and oracle states of one scenario; returns the JSON-ready
    results. ``predictors`` is what :func:`load_predictors` returned, to assess several scenarios with one load."""
    say = progress or (lambda msg: None)
    if predictors is None:
        predictors = load_predictors(model_dir, deterministic_dir, say=say)
    predictors, cv_fitted = dict(predictors[0]), predictors[1]
    model = predictors["latent"]
    cv = predictors["constant_velocity"]
    if not cv_fitted:
        cv = predictors["constant_velocity"] = ConstantVelocity(model.cfg, model.ego)
    cfg = model.cfg
    spec = WindowSpec(cfg.history, cfg.horizon, cfg.num_objects)
    decision_every = model.ego.substeps

    # --- held-out episodes with snapshots for the oracle ---
    n_dec = int(round(scenario.duration_s / scenario.dt_s)) // decision_every
    snap_times = sorted(
        {t for t in (cfg.history + 5, n_dec // 3, n_dec // 2) if cfg.history - 1 <= t < n_dec - cfg.horizon}
    )
    contest_times = list(range(cfg.history - 1, n_dec - cfg.horizon, CONTESTED_STRIDE))
    say(f"simulating {episodes} held-out episodes of {scenario.name}")
    params, ds, snaps = _heldout(scenario, episodes, seed, sorted(set(snap_times) | set(contest_times)), decision_every)
    windows = Windows(ds, spec)
    if not cv_fitted:
        idx_fit = anchor_index(ds, spec, np.arange(episodes // 2))
        cv.fit_variance([to_torch(windows.batch(idx_fit[:4096]))])
        eval_eps = np.arange(episodes // 2, episodes)
    else:
        eval_eps = np.arange(episodes)
    idx = anchor_index(ds, spec, eval_eps, stride=3)
    idx = idx[np.random.default_rng(seed).permutation(len(idx))[:4096]]
    batch = to_torch(windows.batch(idx))
    true = batch["future"][..., :2]  # (B, H, N, 2)
    valid = (batch["future"][..., F_VALID] > 0.5) & (batch["history"][:, -1:, :, F_VALID] > 0.5)
    valid[..., 0] = False  # the ego is not predicted
    out: dict[str, dict] = {}
    gen = torch.Generator()
    for name, pred in predictors.items():
        say(f"held-out windows: {name}")
        out[name] = heldout_metrics(pred, batch, true, valid, seed)

    # --- oracle states ---
    say(f"oracle futures at {len(snap_times)} times")
    states, anchors = [], []
    rng = np.random.default_rng(seed + 11)
    per_time = max(1, oracle_states // max(1, len(snap_times)))
    for t in snap_times:
        alive = np.nonzero(ds.traj.alive[:, min(t + cfg.horizon, ds.traj.alive.shape[1] - 1)])[0]
        pick = rng.permutation(alive)[:per_time]
        states.append(snaps[t].take(pick))
        anchors.append(np.stack([pick, np.full(len(pick), t)], axis=1))
    st_all = TrafficState.concat(states)
    anchor_all = np.concatenate(anchors)
    wb = windows.batch(anchor_all)
    obatch = to_torch(wb)
    plans = _rule_plans(params, st_all, cfg.horizon, decision_every)  # (S, C, H, 2)
    s_n, c_n = plans.shape[:2]
    truth: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for mode in ("known", "resampled"):
        xy_list, coll_list = [], []
        for i in range(s_n):
            fut = oracle_futures(
                st_all,
                params,
                plans[i],
                oracle_samples,
                scene=i,
                mode=mode,
                plan_dt_s=cfg.plan_dt_s,
                seed=seed + 100 + i,
            )
            ego = st_all.vehicles()[i, EGO]
            slots = np.broadcast_to(wb.slots[i], fut.vehicles.shape[:3] + wb.slots.shape[1:])
            picked = gather_slots(fut.vehicles, slots)  # (C, K, H, N, F)
            ids = np.take_along_axis(fut.vehicle_id, np.where(slots >= 0, slots, 0), axis=-1)
            anchor_ids = np.take_along_axis(st_all.vehicle_id[i], np.where(wb.slots[i] >= 0, wb.slots[i], 0), axis=0)
            picked[..., F_VALID] *= (ids == anchor_ids) & (slots >= 0)
            framed = to_frame(
                picked,
                np.broadcast_to(ego[[F_X, F_Y]], picked.shape[:3] + (2,)),
                np.full(picked.shape[:3], ego[F_HEADING]),
            )
            xy_list.append(framed)
            coll_list.append(fut.collided)
        truth[mode] = (np.stack(xy_list), np.stack(coll_list))  # (S, C, K, H, N, F), (S, C, K)
    acts = torch.from_numpy(plans.astype(np.float32))
    for name, pred in predictors.items():
        say(f"oracle comparison: {name}")
        sm = pred.sample(obatch, acts, oracle_samples, generator=gen.manual_seed(seed + 4))
        rows = sm["rows"].numpy()  # (S, C, K, H, N, F)
        p_model = model_collisions(rows, scenario.ego.length_m, scenario.ego.width_m).mean(-1)  # (S, C)
        for mode, suffix in (("known", ""), ("resampled", "_resampled")):
            o_rows, o_coll = truth[mode]
            ok = (o_rows[..., F_VALID] > 0.5).all(axis=(2, 3)) & (rows[..., F_VALID] > 0.5).all(
                axis=(2, 3)
            )  # (S, C, N)
            ok[..., 0] = False
            x = torch.from_numpy(rows[..., :2]).permute(0, 1, 4, 2, 3, 5).flatten(-2)  # (S, C, N, K, 2H)
            y = torch.from_numpy(o_rows[..., :2]).permute(0, 1, 4, 2, 3, 5).flatten(-2).float()
            ed = energy_distance(x, y)  # (S, C, N)
            out[name]["energy_distance" + suffix] = float(ed[torch.from_numpy(ok)].mean())
            out[name]["collision_prob_gap" + suffix] = float(np.abs(p_model - o_coll.mean(-1)).mean())
        out[name]["collision_prob_mean"] = float(p_model.mean())
    oracle_rate = {m: float(truth[m][1].mean()) for m in truth}
    contested = _contested(
        predictors,
        windows,
        {t: snaps[t] for t in contest_times},
        ds,
        params,
        cfg,
        scenario,
        decision_every,
        oracle_states,
        oracle_samples,
        seed,
        gen,
    )
    for name in out:
        out[name]["collision_prob_gap_contested"] = contested["gaps"].get(name)
    say(f"contested pairs: {contested['pairs']} in {contested['states']} states")
    return {
        "caution": CAUTION,
        "scenario": scenario.name,
        "scenario_hash": scenario_hash(scenario),
        "model_dir": str(model_dir),
        "deterministic_dir": None if deterministic_dir is None else str(deterministic_dir),
        "seed": seed,
        "heldout_episodes": episodes,
        "heldout_windows": int(len(idx)),
        "oracle_states": int(s_n),
        "oracle_plans_per_state": int(c_n),
        "oracle_samples": oracle_samples,
        "oracle_collision_prob_mean": oracle_rate,
        "contested": {k: v for k, v in contested.items() if k != "gaps"},
        "predictors": out,
    }


def _contested(predictors, windows, snaps, ds, params, cfg, scenario, decision_every, max_states, samples, seed, gen):
    """Screen every running held-out episode at the times of ``snaps`` with the oracle (traits known) and measure the
    predictors' collision-probability gap on the (state, plan) pairs inside :data:`CONTESTED_BAND`.

    Returns ``screened_states``, ``states`` (kept: at least one pair in the band, at most ``max_states``),
    ``pairs``, ``band``, ``oracle_samples``, ``oracle_p`` (the kept pairs' oracle probabilities), ``drawn`` (how,
    in words) and ``gaps`` (predictor name -> mean |P_model - P_oracle| over the pairs, None without pairs)."""
    lo, hi = CONTESTED_BAND
    pool, anchors = [], []
    for t in sorted(snaps):
        alive = np.nonzero(ds.traj.alive[:, min(t + cfg.horizon, ds.traj.alive.shape[1] - 1)])[0]
        pool.append(snaps[t].take(alive))
        anchors.append(np.stack([alive, np.full(len(alive), t)], axis=1))
    st_pool = TrafficState.concat(pool)
    anchor_pool = np.concatenate(anchors)
    plans = _rule_plans(params, st_pool, cfg.horizon, decision_every)  # (P, C, H, 2)
    p_oracle = oracle_futures_batch(
        st_pool,
        params,
        np.arange(len(plans)),
        plans,
        samples,
        mode="resampled",
        plan_dt_s=cfg.plan_dt_s,
        seed=seed + 500_000 + np.arange(len(plans)),
    ).collided.mean(-1)  # (P, C)
    band = (p_oracle >= lo) & (p_oracle <= hi)
    keep = np.nonzero(band.any(axis=1))[0][:max_states]
    result = {
        "band": [lo, hi],
        "oracle_samples": samples,
        "screened_states": int(len(plans)),
        "states": int(len(keep)),
        "pairs": int(band[keep].sum()),
        "oracle_p": [float(v) for v in p_oracle[keep][band[keep]]],
        "drawn": (
            f"every held-out episode still running, every {CONTESTED_STRIDE}th decision, three rule-based plans "
            "each, screened by the oracle that re-draws the hidden traits; states with a pair in the band kept in "
            "time order"
        ),
        "gaps": {},
    }
    if len(keep) == 0:
        result["gaps"] = {name: None for name in predictors}
        return result
    obatch = to_torch(windows.batch(anchor_pool[keep]))
    acts = torch.from_numpy(plans[keep].astype(np.float32))
    for name, pred in predictors.items():
        rows = pred.sample(obatch, acts, samples, generator=gen.manual_seed(seed + 5))["rows"].numpy()
        p_model = model_collisions(rows, scenario.ego.length_m, scenario.ego.width_m).mean(-1)  # (S, C)
        result["gaps"][name] = float(np.abs(p_model - p_oracle[keep])[band[keep]].mean())
    return result


TABLE_COLUMNS = (
    ("latent_min_ade_k6_m", "latent", "min_ade_k6_m"),
    ("latent_min_fde_k6_m", "latent", "min_fde_k6_m"),
    ("constant_velocity_min_fde_k6_m", "constant_velocity", "min_fde_k6_m"),
    ("deterministic_min_fde_k6_m", "deterministic", "min_fde_k6_m"),
    ("latent_coverage_90", "latent", "coverage_90"),
    ("latent_nll", "latent", "nll"),
    ("latent_energy_distance", "latent", "energy_distance"),
    ("latent_collision_prob_gap", "latent", "collision_prob_gap"),
    ("latent_collision_prob_gap_contested", "latent", "collision_prob_gap_contested"),
)
"""(column of a per-scenario row, predictor, metric key) of :func:`scenario_row`; the two ratios follow."""


def scenario_row(result: dict) -> dict:
    """One scenario's assessment as one flat row: the latent model's best-of-6 errors against constant velocity's
    and least squares' (``None`` where the least-squares model was not given), their ratios
    (``fde_ratio_constant_velocity`` = latent minFDE / constant velocity minFDE, ``fde_ratio_deterministic``
    likewise), and the latent model's coverage of its 90% intervals, NLL, energy distance and collision-probability
    gap (units as in the module docstring)."""
    preds = result["predictors"]
    row: dict = {"scenario": result["scenario"]}
    for col, name, key in TABLE_COLUMNS:
        row[col] = preds[name].get(key) if name in preds else None
    row["contested_pairs"] = result.get("contested", {}).get("pairs")
    fde = row["latent_min_fde_k6_m"]
    for name in ("constant_velocity", "deterministic"):
        other = row[f"{name}_min_fde_k6_m"]
        row[f"fde_ratio_{name}"] = None if other is None or other <= 0.0 else fde / other
    return row


def assess_scenarios(
    model_dir: Path | str,
    scenarios: list[Scenario],
    *,
    deterministic_dir: Path | str | None = None,
    episodes: int = 96,
    oracle_states: int = 48,
    oracle_samples: int = 32,
    seed: int = 0,
    progress: Callable[[str], None] | None = None,
) -> dict:
    """:func:`assess` on each scenario (the models loaded once, the same seed for each); returns the JSON-ready
    results: ``table``, one :func:`scenario_row` per scenario, and ``by_scenario``, each scenario's full result.
    With one scenario its full result's keys are also at the top level (the single-scenario JSON).

    Raises:
        ConfigError: no scenario, or a model of the wrong kind.
    """
    if not scenarios:
        raise ConfigError("assess: give at least one scenario")
    say = progress or (lambda msg: None)
    loaded = load_predictors(model_dir, deterministic_dir, say=say)
    results = []
    for scn in scenarios:
        say(f"scenario {scn.name}")
        results.append(
            assess(
                model_dir,
                scn,
                deterministic_dir=deterministic_dir,
                episodes=episodes,
                oracle_states=oracle_states,
                oracle_samples=oracle_samples,
                seed=seed,
                progress=progress,
                predictors=loaded,
            )
        )
    out = dict(results[0]) if len(results) == 1 else {}
    out.update(
        {
            "caution": CAUTION,
            "model_dir": str(model_dir),
            "deterministic_dir": None if deterministic_dir is None else str(deterministic_dir),
            "seed": seed,
            "heldout_episodes": episodes,
            "scenarios": [r["scenario"] for r in results],
            "table": [scenario_row(r) for r in results],
            "by_scenario": {r["scenario"]: r for r in results},
        }
    )
    return out


def format_scenario_table(rows: list[dict]) -> str:
    """One line per scenario of ``assess_scenarios(...)["table"]``: the latent model's best-of-6 errors against
    constant velocity (CV) and least squares (LS), their ratios, and its interval coverage."""
    cols = (
        ("latent minADE", "latent_min_ade_k6_m"),
        ("latent minFDE", "latent_min_fde_k6_m"),
        ("CV minFDE", "constant_velocity_min_fde_k6_m"),
        ("LS minFDE", "deterministic_min_fde_k6_m"),
        ("latent/CV", "fde_ratio_constant_velocity"),
        ("latent/LS", "fde_ratio_deterministic"),
        ("coverage 90%", "latent_coverage_90"),
        ("NLL", "latent_nll"),
        ("energy dist", "latent_energy_distance"),
        ("|dP coll|", "latent_collision_prob_gap"),
        ("contested", "latent_collision_prob_gap_contested"),
        ("pairs", "contested_pairs"),
    )
    width = max([len("scenario"), *(len(r["scenario"]) for r in rows)]) + 2
    lines = [
        "per scenario (minADE/minFDE: best of 6, metres; ratios of minFDE; coverage of the latent model's 90% "
        "intervals; |dP coll|: mean gap of P(collision) to the oracle's; contested: the same over the pairs whose "
        f"oracle P lies in [{CONTESTED_BAND[0]}, {CONTESTED_BAND[1]}]):",
        f"{'scenario':<{width}}" + "".join(f"{label:>14}" for label, _ in cols),
    ]

    def cell(value, key: str) -> str:
        if value is None:
            return f"{'-':>14}"
        return f"{int(value):>14d}" if key == "contested_pairs" else f"{value:>14.3f}"

    for r in rows:
        lines.append(f"{r['scenario']:<{width}}" + "".join(cell(r.get(key), key) for _, key in cols))
    return "\n".join(lines)

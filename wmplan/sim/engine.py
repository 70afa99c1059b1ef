"""The simulator's one step, ``step(state, action, params)``, and queries on a state around it.

The step itself is compiled (:mod:`wmplan.sim.kernel`: loops over scenes and vehicles, numba nopython, cached on
disk); this module lays a state out for it, splits large batches over threads (:mod:`wmplan.sim.threads`; each
scene is advanced on its own, so the thread count never changes a result), and wraps the results in a new
:class:`~wmplan.sim.state.TrafficState` and a :class:`StepInfo`. :func:`step_groups` runs scenes of several
parameter sets (scenario variants) in one call.

The rules, in order (details in :mod:`wmplan.sim.kernel`): neighbours by position; car following (IDM) with the end
of an ending lane as a standing obstacle; yielding to merging vehicles (a random decision, drawn when the
interaction begins); hard-braking events; lane changes (MOBIL; a lane that ends makes the change mandatory, still
subject to the safety criterion); motion (ballistic longitudinal update, smooth lateral motion for traffic, the
kinematic bicycle for the ego); vehicles leave and enter at the ends of the simulated stretch; the ego's collision,
off-road and goal checks. The per-vehicle Python reference :mod:`wmplan.sim.loop_reference` states the same rules
slowly; the tests compare the two.
"""

from __future__ import annotations

import dataclasses
import threading
from dataclasses import dataclass

import numpy as np

from wmplan.sim import kernel
from wmplan.sim._jit import jit, kernel_array
from wmplan.sim.collision import boxes_overlap
from wmplan.sim.kernel import (  # noqa: F401  (the engine's constants, re-exported)
    BAND_EPS_M,
    LANE_DECISION_PERIOD_STEPS,
    LATERAL_GAIN_PER_S,
    LATERAL_MARGIN_M,
    MAX_LANE_CHANGE_HEADING_RAD,
    MAX_LANE_CHANGE_SLOPE,
    MIN_SPAWN_GAP_M,
    NON_YIELD_HEADWAY_FACTOR,
    NON_YIELD_SPEEDUP,
    SETTLED_M,
    SPAWN_PERIOD_STEPS,
    ParamTable,
)
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState
from wmplan.sim.threads import MIN_SCENES_PER_THREAD, map_chunks


@dataclass(frozen=True, eq=False)
class StepInfo:
    """What happened during one step, per scene (S,) unless stated."""

    collision: np.ndarray
    offroad: np.ndarray
    goal: np.ndarray
    accel_mps2: np.ndarray  # (S, V) longitudinal acceleration applied (ego: the clipped action)
    steer_rad: np.ndarray  # (S,) ego steering angle applied after clipping and rate limiting
    # (S,) log f/g of this step's tilted random draws (``params.tilt``, see wmplan.sim.tilt); 0 when not tilted
    log_weight: np.ndarray | None = None

    @classmethod
    def _trusted(cls, collision, offroad, goal, accel_mps2, steer_rad, log_weight) -> StepInfo:
        """The engine's hot path: no per-field assignment through the frozen dataclass's checks."""
        info = object.__new__(cls)
        info.__dict__.update(
            collision=collision,
            offroad=offroad,
            goal=goal,
            accel_mps2=accel_mps2,
            steer_rad=steer_rad,
            log_weight=log_weight,
        )
        return info


def _lateral_half_extent(width_m: np.ndarray, length_m: np.ndarray, heading_rad: np.ndarray) -> np.ndarray:
    """Half the lateral extent of rotated footprints, ``w/2 cos h + l/2 |sin h|``. Most vehicles drive straight
    (h exactly 0, where this is w/2), so the trigonometry runs only on the others."""
    hw = np.array(0.5 * np.asarray(width_m), dtype=np.float64, order="C")
    turned = np.flatnonzero(heading_rad)
    if turned.size:
        h = np.take(heading_rad, turned)
        hw.flat[turned] = np.take(hw, turned) * np.cos(h) + 0.5 * (np.take(length_m, turned) * np.abs(np.sin(h)))
    return hw


def lane_occupancy_lm(
    params: SimParams,
    y_m: np.ndarray,
    width_m: np.ndarray,
    valid: np.ndarray,
    lane: np.ndarray | None = None,
    heading_rad: np.ndarray | None = None,
    length_m: np.ndarray | None = None,
) -> np.ndarray:
    """Lane-major (L, S, V) form of :func:`lane_occupancy` (contiguous per lane; what the engine uses)."""
    hw = 0.5 * width_m if heading_rad is None else _lateral_half_extent(width_m, length_m, heading_rad)
    top, bottom = y_m + hw, y_m - hw
    occ = np.empty((params.num_lanes,) + np.shape(y_m), dtype=bool)
    for ln in range(params.num_lanes):
        lo = ln * params.lane_width_m
        o = occ[ln]
        np.greater(top, lo + BAND_EPS_M, out=o)
        o &= bottom < lo + params.lane_width_m - BAND_EPS_M
        if lane is not None:
            o |= lane == ln
        o &= valid
    return occ


def lane_occupancy(
    params: SimParams,
    y_m: np.ndarray,
    width_m: np.ndarray,
    valid: np.ndarray,
    lane: np.ndarray | None = None,
    heading_rad: np.ndarray | None = None,
    length_m: np.ndarray | None = None,
) -> np.ndarray:
    """(S, V, L) True where a vehicle's body reaches into lane l, or (given ``lane``) l is the lane it is in or
    moving to: a driver who has begun a lane change is visible in the target lane at once, as an indicator is."""
    return np.moveaxis(lane_occupancy_lm(params, y_m, width_m, valid, lane, heading_rad, length_m), 0, -1)


def mergers(params: SimParams, state: TrafficState) -> tuple[np.ndarray, np.ndarray]:
    """(S, V) whether each vehicle must leave its ending lane soon, and the lane it must merge into."""
    if not params.lane_ends_on_road.any():  # no lane ends: nobody must merge
        return np.zeros(state.valid.shape, dtype=bool), np.full(state.valid.shape, -1, dtype=np.int64)
    lane = state.lane.copy()
    lane[:, EGO] = params.lane_of(state.y_m[:, EGO])
    d_end = params.distance_to_lane_end(lane, state.x_m)
    is_merger = state.valid & (d_end < params.merge_zone_m) & (params.merge_target[lane] >= 0)
    return is_merger, params.merge_target[lane]


def param_table(params: SimParams) -> ParamTable:
    """The kernel's parameter table of one parameter set (made once and kept on the SimParams object)."""
    table = params.__dict__.get("_kernel_table")
    if table is None:
        table = ParamTable((params,))
        object.__setattr__(params, "_kernel_table", table)
    return table


def _check_action(action, num_scenes: int) -> np.ndarray:
    action = np.asarray(action, dtype=np.float64)
    if action.shape != (num_scenes, 2):
        raise ValueError(f"action must have shape ({num_scenes}, 2) (accel_mps2, steer_rad), got {action.shape}")
    return kernel_array(action, np.float64)


def step(
    state: TrafficState, action: np.ndarray, params: SimParams, threads: int | None = None
) -> tuple[TrafficState, StepInfo]:
    """Advance every scene by one step.

    Args:
        state: the current batched state (S scenes, V slots).
        action: ego action per scene, shape (S, 2): (acceleration m/s^2, front steering angle rad). Clipped to the
            scenario's limits, and the steering angle to the steering-rate limit.
        params: the scenario's arrays.
        threads: threads to spread the scenes over (default :func:`~wmplan.sim.threads.sim_threads`); the
            result is the same for any count.

    Returns:
        The new state and a :class:`StepInfo`. ``accel_mps2`` is 0 on slots that were empty at the start of the
        step.

    Raises:
        ValueError: ``action`` does not have shape (S, 2).
    """
    packed = Packed.of(state)
    s_n = packed.valid.shape[0]
    return _run(packed, _check_action(action, s_n), param_table(params), _zeros(s_n), threads)


_ZEROS: dict[int, np.ndarray] = {}


def _zeros(num_scenes: int) -> np.ndarray:
    """The group array of a batch with one parameter set (kept per size; nothing writes into it)."""
    z = _ZEROS.get(num_scenes)
    if z is None:
        if len(_ZEROS) > 64:
            _ZEROS.clear()
        z = _ZEROS[num_scenes] = np.zeros(num_scenes, dtype=np.int64)
    return z


def step_groups(
    state: TrafficState, action: np.ndarray, table: ParamTable, group: np.ndarray, threads: int | None = None
) -> tuple[TrafficState, StepInfo]:
    """:func:`step` with per-scene parameters: scene s uses row ``group[s]`` of ``table`` (a
    :class:`~wmplan.sim.kernel.ParamTable` of several parameter sets, e.g. the variants of a stress task).

    Raises:
        ValueError: ``action`` is not (S, 2), or ``group`` is not (S,) with rows of ``table``.
    """
    action = _check_action(action, state.num_scenes)
    group = kernel_array(np.asarray(group), np.int64)
    g_n = table.scalars.shape[0]
    if group.shape != (state.num_scenes,) or (group.size and (group.min() < 0 or group.max() >= g_n)):
        raise ValueError(
            f"group must have shape ({state.num_scenes},) with values in [0, {g_n}), got shape {group.shape}"
        )
    return _run(Packed.of(state), action, table, group, threads)


class Packed:
    """A state's arrays in the kernel's layout (:data:`~wmplan.sim.kernel.VF_FIELDS` and the other tables of
    :mod:`wmplan.sim.kernel`): ``vf`` (NVF, S, V) float64, ``vi`` (NVI, S, V) int64, ``valid`` (S, V) bool,
    ``ys`` (S, V) int8, ``traits`` (S, V, NT) float64, ``sf`` (NSF, S) float64, ``si`` (NSI, S) int64, ``ended``
    (NE, S) bool, ``key`` (S,) uint64; all C-contiguous. A state the engine made holds its own (its fields are
    views of these); any other state is packed once, on its first step (a copy)."""

    __slots__ = ("vf", "vi", "valid", "ys", "traits", "sf", "si", "ended", "key")

    def __init__(self, vf, vi, valid, ys, traits, sf, si, ended, key):
        self.vf, self.vi, self.valid, self.ys, self.traits = vf, vi, valid, ys, traits
        self.sf, self.si, self.ended, self.key = sf, si, ended, key

    @classmethod
    def of(cls, state: TrafficState) -> Packed:
        """The packed arrays of ``state`` (kept on it; states are never written in place)."""
        packed = state.__dict__.get("_packed")
        if packed is None:
            s_n, v_n = state.x_m.shape

            def stack(names, dtype, shape):
                out = np.empty((len(names),) + shape, dtype=dtype)
                for k, name in enumerate(names):
                    out[k] = getattr(state, name)
                return out

            packed = cls(
                stack(kernel.VF_FIELDS, np.float64, (s_n, v_n)),
                stack(kernel.VI_FIELDS, np.int64, (s_n, v_n)),
                np.array(state.valid, dtype=np.bool_, order="C"),
                np.array(state.yield_state, dtype=np.int8, order="C"),
                np.array(state.traits, dtype=np.float64, order="C"),
                stack(kernel.SF_FIELDS, np.float64, (s_n,)),
                stack(kernel.SI_FIELDS, np.int64, (s_n,)),
                stack(kernel.ENDED_FIELDS, np.bool_, (s_n,)),
                kernel_array(state.key, np.uint64),
            )
            state.__dict__["_packed"] = packed
        return packed

    def state(self) -> TrafficState:
        """The :class:`TrafficState` whose fields are views of these arrays (made when first read)."""
        return TrafficState._trusted({"_packed": self})

    def field(self, name: str) -> np.ndarray:
        """The view of these arrays that is the state's field ``name`` (KeyError for other names)."""
        where, row = _FIELDS[name]
        buf = getattr(self, where)
        return buf if row is None else buf[row]


_FIELDS = {
    **{n: ("vf", k) for k, n in enumerate(kernel.VF_FIELDS)},
    **{n: ("vi", k) for k, n in enumerate(kernel.VI_FIELDS)},
    **{n: ("sf", k) for k, n in enumerate(kernel.SF_FIELDS)},
    **{n: ("si", k) for k, n in enumerate(kernel.SI_FIELDS)},
    **{n: ("ended", k) for k, n in enumerate(kernel.ENDED_FIELDS)},
    "valid": ("valid", None),
    "yield_state": ("ys", None),
    "traits": ("traits", None),
    "key": ("key", None),
}
assert set(_FIELDS) == {f.name for f in dataclasses.fields(TrafficState)}, "every field has a place in Packed"


_LOCAL = threading.local()


def _scratch(v_n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The kernel's work space for V slots, one set per thread (a call never shares it with another thread)."""
    cache = _LOCAL.__dict__.setdefault("scratch", {})
    out = cache.get(v_n)
    if out is None:
        out = cache[v_n] = (np.empty((7, v_n), dtype=np.int64), np.empty((3, v_n)), np.empty((2, v_n), dtype=np.bool_))
    return out


def _run(
    p: Packed, action: np.ndarray, table: ParamTable, group: np.ndarray, threads: int | None
) -> tuple[TrafficState, StepInfo]:
    s_n, v_n = p.valid.shape
    # a vehicle may enter only on steps that are multiples of SPAWN_PERIOD_STEPS: otherwise the new state shares
    # the traits (states are never written in place)
    stp = p.si[kernel.S_STEP]
    may_enter = (
        bool(np.any((stp + 1) % SPAWN_PERIOD_STEPS == 0)) if s_n > 1 else (int(stp[0]) + 1) % SPAWN_PERIOD_STEPS == 0
    )
    out = Packed(
        np.empty_like(p.vf),
        np.empty_like(p.vi),
        np.empty_like(p.valid),
        np.empty_like(p.ys),
        p.traits.copy() if may_enter else p.traits,
        np.empty_like(p.sf),
        np.empty_like(p.si),
        np.empty_like(p.ended),
        p.key,
    )
    info = np.empty((3, s_n), dtype=np.bool_)
    acc, log_w = np.empty((s_n, v_n)), np.empty(s_n)

    def run(a: int, b: int) -> None:
        kernel.step_range(
            a,
            b,
            group,
            table.scalars,
            table.lanes,
            table.traits,
            p.key,
            p.vf,
            p.vi,
            p.valid,
            p.ys,
            p.traits,
            p.sf,
            p.si,
            p.ended,
            action,
            out.vf,
            out.vi,
            out.valid,
            out.ys,
            out.traits,
            out.sf,
            out.si,
            out.ended,
            info,
            acc,
            log_w,
            *_scratch(v_n),
        )

    if s_n < 2 * MIN_SCENES_PER_THREAD:
        run(0, s_n)
    else:
        map_chunks(run, s_n, threads)
    return out.state(), StepInfo._trusted(info[0], info[1], info[2], acc, out.sf[kernel.S_EGO_STEER], log_w)


@jit
def _ego_collisions(x, y, length, width, heading, valid, hit):
    for s in range(x.shape[0]):
        hit[s] = kernel._ego_collides(x[s], y[s], length[s], width[s], heading[s], valid[s])


def ego_collisions(arrays: dict) -> np.ndarray:
    """(S,) True where the ego's footprint overlaps another vehicle's (``arrays``: the (S, V) fields ``x_m``,
    ``y_m``, ``length_m``, ``width_m``, ``heading_rad``, ``valid`` of a state). The step's own check, compiled: a
    separating-axis test on the pairs that are close enough along the road to overlap."""
    f8 = np.float64
    x, y, ln, wd, hd = (kernel_array(arrays[k], f8) for k in ("x_m", "y_m", "length_m", "width_m", "heading_rad"))
    hit = np.empty(x.shape[0], dtype=bool)
    _ego_collisions(x, y, ln, wd, hd, kernel_array(arrays["valid"], np.bool_), hit)
    return hit


CONTACT_SIDES = ("front", "rear", "left", "right")


def _in_ego_frame(
    state: TrafficState,
    scenes: np.ndarray,
    ce: np.ndarray,
    se: np.ndarray,
    ox: np.ndarray,
    oy: np.ndarray,
    oh: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centres (n, V) of the given scenes' vehicles in a frame at (ox, oy) turned by oh (n, 1), and headings."""
    dx, dy = state.x_m[scenes] - ox, state.y_m[scenes] - oy
    return ce * dx + se * dy, -se * dx + ce * dy, state.heading_rad[scenes] - oh


def contact_sides(state: TrafficState, scenes: np.ndarray, before: TrafficState | None = None) -> list[str]:
    """The side of the ego's footprint that another vehicle touches, for the given scenes (a few: those that
    collided this step); ``""`` where the ego touches nothing.

    In the ego's frame (x forward, y to the left) each other vehicle is bounded by a box aligned with the ego's
    axes. With ``before`` (the state one step earlier) the side is found as for two moving boxes: along each axis
    the fraction of the step at which the projections began to overlap, and the axis that closed last is the one
    of contact (Ericson, *Real-Time Collision Detection*, 2005, section 5.5.8, moving AABBs; from memory). A fast
    run into the car ahead is thus ``"front"`` even when the step ends with the cars overlapping by more lengthwise
    than sideways. Without ``before``, or where the other vehicle already overlapped along both axes a step
    earlier, the axis of least overlap now decides. ``"rear"``: run into from behind; ``"left"`` / ``"right"``: a
    contact beside the ego, as when either changes lane. Naming crashes by the first point of contact is common
    practice, no source. Where several vehicles touch the ego, the one whose centre is nearest decides."""
    scenes = np.asarray(scenes, dtype=np.int64)
    if scenes.size == 0:
        return []
    x, y, ln, wd, hd = (getattr(state, k)[scenes] for k in ("x_m", "y_m", "length_m", "width_m", "heading_rad"))
    valid = state.valid[scenes].copy()
    valid[:, EGO] = False
    touch = boxes_overlap(x[:, :1], y[:, :1], ln[:, :1], wd[:, :1], hd[:, :1], x, y, ln, wd, hd) & valid
    ox, oy, oh = x[:, :1], y[:, :1], hd[:, :1]
    ce, se = np.cos(oh), np.sin(oh)
    fx, fy, rel = _in_ego_frame(state, scenes, ce, se, ox, oy, oh)
    # reach of the two footprints along the ego's axes (the other's bounds in the ego's frame)
    reach_x = 0.5 * ln[:, :1] + 0.5 * ln * np.abs(np.cos(rel)) + 0.5 * wd * np.abs(np.sin(rel))
    reach_y = 0.5 * wd[:, :1] + 0.5 * ln * np.abs(np.sin(rel)) + 0.5 * wd * np.abs(np.cos(rel))
    gap_x, gap_y = np.abs(fx) - reach_x, np.abs(fy) - reach_y  # <= 0: the projections overlap now
    lengthwise = -gap_x <= -gap_y  # least overlap now
    if before is not None:
        # the same vehicles a step earlier, relative to the ego then, along the ego's present axes
        bfx, bfy, _ = _in_ego_frame(before, scenes, ce, se, before.x_m[scenes, :1], before.y_m[scenes, :1], oh)
        g0x, g0y = np.abs(bfx) - reach_x, np.abs(bfy) - reach_y
        with np.errstate(divide="ignore", invalid="ignore"):
            enter_x = np.where(g0x > 0, g0x / (g0x - gap_x), -np.inf)
            enter_y = np.where(g0y > 0, g0y / (g0y - gap_y), -np.inf)
        same = before.vehicle_id[scenes] == state.vehicle_id[scenes]
        known = same & ((g0x > 0) | (g0y > 0))
        lengthwise = np.where(known, enter_x >= enter_y, lengthwise)
    side = np.where(lengthwise, np.where(fx >= 0, 0, 1), np.where(fy >= 0, 2, 3))
    dist = np.where(touch, np.hypot(fx, fy), np.inf)
    j = dist.argmin(axis=1)
    return [CONTACT_SIDES[int(side[r, j[r]])] if touch[r, j[r]] else "" for r in range(scenes.size)]


def traffic_collisions(state: TrafficState) -> np.ndarray:
    """(S,) number of overlapping pairs among traffic vehicles (the ego excluded); for invariant checks."""
    x, y, ln, wd, hd = state.x_m, state.y_m, state.length_m, state.width_m, state.heading_rad
    hit = boxes_overlap(
        x[:, :, None],
        y[:, :, None],
        ln[:, :, None],
        wd[:, :, None],
        hd[:, :, None],
        x[:, None, :],
        y[:, None, :],
        ln[:, None, :],
        wd[:, None, :],
        hd[:, None, :],
    )
    traffic = state.valid.copy()
    traffic[:, EGO] = False
    pair = traffic[:, :, None] & traffic[:, None, :]
    upper = np.triu(np.ones(hit.shape[1:], dtype=bool), k=1)
    return (hit & pair & upper).sum(axis=(1, 2))

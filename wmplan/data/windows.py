"""Training windows cut from stored episodes: a short history and the future of the same vehicles.

A window is anchored at a decision step t of an episode. Its vehicles are the ego and the M vehicles nearest to
it at t (the object list at t); each keeps its identity over the window (a slot that was refilled by another
vehicle counts as invalid). Every row is expressed in the *anchor frame*: the ego's pose at t (origin at its
centre, x along its heading). Letters: B windows, W history steps (t-W+1 .. t), H future steps (t+1 .. t+H),
N = 1 + M objects, F vehicle features.

:class:`Windows` builds batches with vectorised numpy fancy indexing; :class:`TorchWindows` wraps it as a
``torch.utils.data.Dataset`` (its ``__getitems__`` fetches a whole batch in one call).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from wmplan.data.store import Dataset
from wmplan.sim.features import DEFAULT_NUM_OBJECTS, F_HEADING, F_VALID, F_X, F_Y, NUM_ROAD_FEATURES
from wmplan.sim.observe import gather_slots, nearest_slots, road_features, to_frame
from wmplan.sim.params import SimParams


@dataclass(frozen=True)
class WindowSpec:
    """Shape of the windows."""

    history: int = 5
    """W: decision steps of history, the anchor included."""
    horizon: int = 15
    """H: decision steps of future."""
    num_objects: int = DEFAULT_NUM_OBJECTS
    """M: other vehicles kept (nearest first)."""

    def __post_init__(self) -> None:
        if self.history < 1 or self.horizon < 1 or self.num_objects < 1:
            raise ValueError(f"WindowSpec fields must be >= 1, got {self}")


@dataclass(frozen=True, eq=False)
class WindowBatch:
    """A batch of windows (numpy, float32).

    Attributes:
        history: (B, W, N, F) object rows over the history, anchor frame; valid = 0 where absent.
        future: (B, H, N, F) the same objects' rows over the future.
        road: (B, 6) the ego's road context at the anchor.
        actions: (B, H, 2) the ego's actions over the future steps.
        ego_speed_mps: (B,) ego speed at the anchor (centre of gravity).
        ego_steer_rad: (B,) steering angle applied in the step before the anchor.
        slots: (B, N) the episode's vehicle slots the objects came from (-1 for padding).
    """

    history: np.ndarray
    future: np.ndarray
    road: np.ndarray
    actions: np.ndarray
    ego_speed_mps: np.ndarray
    ego_steer_rad: np.ndarray
    slots: np.ndarray


def anchor_index(dataset: Dataset, spec: WindowSpec, episodes: np.ndarray | None = None, stride: int = 1) -> np.ndarray:
    """(n, 2) (episode, anchor step) pairs whose history and future lie inside the episode and whose ego is alive
    until the end of the future."""
    alive = dataset.traj.alive  # (E, T + 1)
    e_n, t1 = alive.shape
    eps = np.arange(e_n) if episodes is None else np.asarray(episodes)
    ts = np.arange(spec.history - 1, t1 - spec.horizon, stride)
    if ts.size == 0:
        raise ValueError(
            f"episodes of {t1 - 1} decisions are too short for history {spec.history} + horizon {spec.horizon}"
        )
    ee, tt = np.meshgrid(eps, ts, indexing="ij")
    ok = alive[ee, tt + spec.horizon]
    return np.stack([ee[ok], tt[ok]], axis=1).astype(np.int64)


def frame_window(rows: np.ndarray, ids: np.ndarray, anchor: int, num_objects: int) -> tuple[np.ndarray, np.ndarray]:
    """Object rows of a window in its anchor frame.

    Args:
        rows: (B, T, V, F) world-frame rows over the window's times; ids: (B, T, V) vehicle identities.
        anchor: index along T of the anchor time.
        num_objects: M.

    Returns:
        (B, T, N, F) rows of the ego and the M vehicles nearest to it at the anchor, in the ego's anchor frame, with
        valid = 0 wherever a slot holds another vehicle than at the anchor; and the slots (B, N).
    """
    b, t_n = rows.shape[:2]
    at = rows[:, anchor]  # (B, V, F)
    slots = nearest_slots(at, num_objects)  # (B, N)
    slots_t = np.broadcast_to(slots[:, None, :], (b, t_n, slots.shape[1]))
    picked = gather_slots(rows, slots_t)  # (B, T, N, F)
    anchor_ids = np.take_along_axis(ids[:, anchor], np.where(slots >= 0, slots, 0), axis=1)  # (B, N)
    ids_t = np.take_along_axis(ids, np.where(slots_t >= 0, slots_t, 0), axis=2)
    picked[..., F_VALID] *= (ids_t == anchor_ids[:, None, :]) & (slots_t >= 0)
    ego = at[:, 0]
    origin = np.broadcast_to(ego[:, None, [F_X, F_Y]], (b, t_n, 2))
    heading = np.broadcast_to(ego[:, None, F_HEADING], (b, t_n))
    return to_frame(picked, origin, heading), slots


class Windows:
    """Vectorised window builder over a loaded dataset (of one scenario or several: each window's road context
    comes from its own episode's scenario)."""

    def __init__(self, dataset: Dataset, spec: WindowSpec = WindowSpec()):
        self.dataset = dataset
        self.spec = spec
        self.params_list = [SimParams.from_scenario(scn) for scn in dataset.scenarios]
        self._which = dataset.episode_scenario  # (E,) scenario of each episode
        tr = dataset.traj
        self._veh = tr.vehicles  # (E, T+1, V, F) float32
        self._ids = tr.vehicle_id
        self._act = tr.actions

    def batch(self, index: np.ndarray) -> WindowBatch:
        """Windows for (episode, anchor) pairs ``index`` (B, 2)."""
        spec = self.spec
        e, t = index[:, 0], index[:, 1]
        offs = np.arange(-spec.history + 1, spec.horizon + 1)  # (W + H,)
        tt = t[:, None] + offs  # (B, W + H)
        rows = self._veh[e[:, None], tt].astype(np.float64)  # (B, W+H, V, F)
        ids = self._ids[e[:, None], tt]  # (B, W+H, V)
        w = spec.history - 1
        framed, slots = frame_window(rows, ids, w, spec.num_objects)
        ego = rows[:, w, 0]
        road = np.empty((len(e), NUM_ROAD_FEATURES))
        which = self._which[e]
        for i, params in enumerate(self.params_list):
            sel = which == i
            if sel.any():
                road[sel] = road_features(params, ego[sel, F_X], ego[sel, F_Y])
        speed = np.hypot(ego[:, 2], ego[:, 3])
        steer = np.where(t > 0, self._act[e, np.maximum(t - 1, 0), 1], 0.0)
        return WindowBatch(
            history=framed[:, : spec.history].astype(np.float32),
            future=framed[:, spec.history :].astype(np.float32),
            road=road.astype(np.float32),
            actions=self._act[e[:, None], t[:, None] + np.arange(spec.horizon)].astype(np.float32),
            ego_speed_mps=speed.astype(np.float32),
            ego_steer_rad=steer.astype(np.float32),
            slots=slots,
        )


def torch_windows(dataset: Dataset, spec: WindowSpec, index: np.ndarray):
    """A ``torch.utils.data.Dataset`` of windows (imports torch only when called)."""
    import torch

    class TorchWindows(torch.utils.data.Dataset):
        """Windows as a torch Dataset; ``__getitems__`` returns a whole batch as a dict of tensors."""

        def __init__(self) -> None:
            self.windows = Windows(dataset, spec)
            self.index = np.asarray(index)

        def __len__(self) -> int:
            return len(self.index)

        def __getitems__(self, items: list[int]) -> dict:
            b = self.windows.batch(self.index[np.asarray(items)])
            return {k: torch.from_numpy(getattr(b, k)) for k in b.__dataclass_fields__ if k != "slots"}

        def __getitem__(self, item: int) -> dict:
            return {k: v[0] for k, v in self.__getitems__([item]).items()}

    return TorchWindows()


assert NUM_ROAD_FEATURES == 6

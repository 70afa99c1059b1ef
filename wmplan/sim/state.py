"""The batched traffic state: a frozen dataclass of numpy arrays with a leading scene axis.

Letters used in shapes: S scenes, V vehicle slots (slot 0 is always the ego), NT hidden traits.
Absent vehicles are masked out by ``valid``, never removed. A state is immutable: the engine returns a new one
each step, so a state *is* a snapshot; :meth:`TrafficState.to_arrays` / :meth:`TrafficState.from_arrays` turn it
into plain arrays (for saving) and back.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from wmplan.sim.features import VEHICLE_FEATURES

EGO = 0  # slot of the ego vehicle in every scene


@dataclass(frozen=True, eq=False)
class TrafficState:
    """State of S scenes with V vehicle slots each.

    Attributes (shapes):
        key (S,) uint64: the scene's random key; every random event is a hash of it.
        step (S,) int64: steps taken since the scene began.
        next_id (S,) int64: identity to give the next vehicle that enters.
        x_m, y_m (S, V): centre position along and across the road.
        vx_mps, vy_mps (S, V): world-frame velocity of the centre.
        heading_rad (S, V): yaw angle, 0 along the road.
        length_m, width_m (S, V): footprint.
        valid (S, V) bool: slot holds a vehicle.
        vehicle_id (S, V) int64: identity within the scene (a freed slot gets a new id).
        lane (S, V) int64: lane a traffic vehicle is in or moving to; the ego's centre lane.
        traits (S, V, NT): hidden driver traits, see ``params.TRAIT_NAMES`` (unused for the ego).
        yield_state (S, V) int8: 0 no merging partner, 1 yields to it, 2 does not.
        brake_timer_s, brake_decel_mps2 (S, V): an ongoing hard-braking event.
        cooldown_s (S, V): time until a traffic vehicle may change lanes again.
        ego_speed_mps, ego_steer_rad (S,): ego's speed (centre of gravity) and current steering angle.
        collided, offroad, reached_goal (S,) bool: sticky ego outcome flags.
    """

    key: np.ndarray
    step: np.ndarray
    next_id: np.ndarray
    x_m: np.ndarray
    y_m: np.ndarray
    vx_mps: np.ndarray
    vy_mps: np.ndarray
    heading_rad: np.ndarray
    length_m: np.ndarray
    width_m: np.ndarray
    valid: np.ndarray
    vehicle_id: np.ndarray
    lane: np.ndarray
    traits: np.ndarray
    yield_state: np.ndarray
    brake_timer_s: np.ndarray
    brake_decel_mps2: np.ndarray
    cooldown_s: np.ndarray
    ego_speed_mps: np.ndarray
    ego_steer_rad: np.ndarray
    collided: np.ndarray
    offroad: np.ndarray
    reached_goal: np.ndarray

    @classmethod
    def _trusted(cls, fields: dict[str, np.ndarray]) -> TrafficState:
        """A state from a dict of fields, without the dataclass's per-field assignment (the engine's hot path; the
        caller guarantees every field is present with its documented dtype and shape, or ``fields["_packed"]``
        holds the engine's packed arrays, whose ``field(name)`` gives the missing ones when first read)."""
        state = object.__new__(cls)
        state.__dict__.update(fields)
        return state

    def __getattr__(self, name: str):
        # only reached for attributes not yet in __dict__: fields of an engine-made state, made on first read
        packed = self.__dict__.get("_packed")
        if packed is None or name.startswith("__"):
            raise AttributeError(name)
        try:
            value = packed.field(name)
        except KeyError:
            raise AttributeError(name) from None
        self.__dict__[name] = value
        return value

    def __getstate__(self) -> dict:
        """Pickled as its fields alone (the engine's packed arrays are rebuilt on the next step)."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}

    @property
    def num_scenes(self) -> int:
        """Scenes in the batch (the arrays' first axis)."""
        return int(self.x_m.shape[0])

    @property
    def num_vehicles(self) -> int:
        """Vehicle slots per scene, the ego's included (the arrays' second axis)."""
        return int(self.x_m.shape[1])

    @property
    def done(self) -> np.ndarray:
        """(S,) True where the ego has collided, left the road or reached its goal."""
        return self.collided | self.offroad | self.reached_goal

    def replace(self, **changes: np.ndarray) -> TrafficState:
        """A copy with some fields replaced (arrays are shared, never written in place)."""
        return dataclasses.replace(self, **changes)

    def take(self, scene_idx: np.ndarray | list[int] | int) -> TrafficState:
        """Select (and repeat, if indices repeat) scenes along the first axis; a copy."""
        idx = np.atleast_1d(np.asarray(scene_idx, dtype=np.int64))
        return TrafficState(**{f.name: getattr(self, f.name)[idx] for f in dataclasses.fields(self)})

    def rows(self, start: int, stop: int) -> TrafficState:
        """Scenes [start, stop) as views of this state's arrays (no copy; states are never written in place)."""
        return TrafficState(**{f.name: getattr(self, f.name)[start:stop] for f in dataclasses.fields(self)})

    def vehicles(self) -> np.ndarray:
        """World-frame vehicle rows (S, V, F) in the order of ``features.VEHICLE_FEATURES``."""
        cols = [
            self.x_m,
            self.y_m,
            self.vx_mps,
            self.vy_mps,
            self.heading_rad,
            self.length_m,
            self.width_m,
            self.valid.astype(np.float64),
        ]
        assert len(cols) == len(VEHICLE_FEATURES)
        return np.stack(cols, axis=-1)

    def to_arrays(self) -> dict[str, np.ndarray]:
        """A snapshot as a dict of array copies (for np.savez or pickling-free transport)."""
        return {f.name: np.array(getattr(self, f.name), copy=True) for f in dataclasses.fields(self)}

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> TrafficState:
        """Restore a snapshot made by :meth:`to_arrays`; checks that every field is present and shapes agree."""
        names = [f.name for f in dataclasses.fields(cls)]
        missing = [n for n in names if n not in arrays]
        if missing:
            raise ValueError(f"snapshot is missing field(s) {missing}")
        state = cls(**{n: np.array(arrays[n], copy=True) for n in names})
        s, v = state.x_m.shape
        for n in names:
            shape = getattr(state, n).shape
            if shape[0] != s or (getattr(state, n).ndim >= 2 and shape[1] != v):
                raise ValueError(f"snapshot field {n} has shape {shape}, expected leading axes ({s}, {v})")
        return state

    @staticmethod
    def concat(states: list[TrafficState]) -> TrafficState:
        """Stack several batches of scenes into one (all must have the same vehicle count)."""
        return TrafficState(
            **{f.name: np.concatenate([getattr(s, f.name) for s in states]) for f in dataclasses.fields(TrafficState)}
        )

"""Episodes as pictures: run one episode, draw one moment as a PNG, or animate the whole episode (GIF, MP4).

Letters in shapes: T frames (the initial state and one per simulator step), V vehicle slots, F = 8 features.

:func:`render_to_file` is what ``wmplan render SCENARIO --out FILE`` calls. Every file is written atomically
(``wmplan.io.atomic_write_bytes``: a temporary file in the same folder, then a rename), so an interrupted run never
leaves half a file.
"""

from __future__ import annotations

import io
import shutil
import subprocess
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from wmplan.errors import ConfigError
from wmplan.io import atomic_write_bytes
from wmplan.scenario import load_scenario
from wmplan.sim.ego_rules import held_rule_policy
from wmplan.sim.engine import step as engine_step
from wmplan.sim.features import F_VX, F_VY, NUM_VEHICLE_FEATURES
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO, TrafficState
from wmplan.viz.scene import SceneRenderer, check_vehicles, scene_figure

PICTURE_SUFFIXES = (".png",)
ANIMATION_SUFFIXES = (".gif", ".mp4")
GIF_END_PAUSE_MS = 1500
"""The last frame of a GIF stays this long before the loop starts again."""

Policy = Callable[[TrafficState, SimParams], np.ndarray]


@dataclass(frozen=True)
class EpisodeOutcome:
    """How an episode ended. ``*_at`` give the first frame index (= steps taken) that shows the event, or None.

    Attributes:
        num_steps: simulator steps taken (the episode has ``num_steps + 1`` frames).
        collided, offroad, reached_goal: the ego's outcome flags at the end.
    """

    num_steps: int
    collided: bool
    offroad: bool
    reached_goal: bool
    collided_at: int | None
    offroad_at: int | None
    goal_at: int | None


def _resolve_policy(policy: str | Policy, params: SimParams) -> Policy:
    if callable(policy):
        return policy
    if policy == "rules":  # the same driver as the "rules" planner: decides every 0.2 s, holds in between
        return held_rule_policy(params)
    raise ConfigError(f"policy must be 'rules' or a callable (state, params) -> actions (S, 2), got {policy!r}")


def episode_frames(
    params: SimParams, seed: int, policy: str | Policy = "rules", num_steps: int | None = None
) -> tuple[np.ndarray, EpisodeOutcome]:
    """Run one episode and keep every moment.

    The episode stops when the ego collides, leaves the road or reaches its goal, or after ``num_steps``
    (default: the scenario's duration).

    Args:
        params: the scenario's arrays.
        seed: the scene seed (``wmplan.sim.spawn.initial_state(params, [seed])``).
        policy: ``"rules"`` (``wmplan.sim.ego_rules.rule_actions``) or a callable ``(state, params) -> (1, 2)``
            actions (accel_mps2, steer_rad).
        num_steps: most steps to take.

    Returns:
        frames (T, V, 8) world-frame rows in ``VEHICLE_FEATURES`` order (frame 0 the initial state), and the
        :class:`EpisodeOutcome`.
    """
    act = _resolve_policy(policy, params)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ConfigError(f"seed must be an integer >= 0, got {seed!r}")
    limit = params.num_steps if num_steps is None else int(num_steps)
    if limit < 0:
        raise ConfigError(f"num_steps must be >= 0, got {num_steps!r}")
    state = initial_state(params, [int(seed)])
    frames = [state.vehicles()[0]]
    first: dict[str, int | None] = {"collided": None, "offroad": None, "reached_goal": None}
    while len(frames) - 1 < limit and not state.done[0]:
        state, _ = engine_step(state, np.asarray(act(state, params), dtype=np.float64).reshape(1, 2), params)
        frames.append(state.vehicles()[0])
        for name in first:
            if first[name] is None and bool(getattr(state, name)[0]):
                first[name] = len(frames) - 1
    outcome = EpisodeOutcome(
        num_steps=len(frames) - 1,
        collided=bool(state.collided[0]),
        offroad=bool(state.offroad[0]),
        reached_goal=bool(state.reached_goal[0]),
        collided_at=first["collided"],
        offroad_at=first["offroad"],
        goal_at=first["reached_goal"],
    )
    return np.stack(frames), outcome


def _check_frames(frames: np.ndarray) -> np.ndarray:
    arr = np.asarray(frames, dtype=np.float64)
    if arr.ndim != 3 or arr.shape[0] < 1 or arr.shape[2] != NUM_VEHICLE_FEATURES:
        raise ConfigError(f"frames must have shape (T, V, {NUM_VEHICLE_FEATURES}) with T >= 1, got {arr.shape}")
    for t in (0, arr.shape[0] - 1):
        check_vehicles(arr[t], name=f"frames[{t}]")
    return arr


def _frame_title(prefix: str | None, t: int, params: SimParams, ego_row: np.ndarray, events: str) -> str:
    """Title of a frame drawn at simulator step ``t``."""
    speed = float(np.hypot(ego_row[F_VX], ego_row[F_VY]))
    head = f"{prefix}   " if prefix else ""
    return f"{head}t = {t * params.dt_s:4.1f} s   ego {speed:4.1f} m/s{events}"


def _events_text(t: int, collided_at: int | None, offroad_at: int | None, goal_at: int | None) -> str:
    words = [
        w
        for at, w in ((collided_at, "collision"), (offroad_at, "off the road"), (goal_at, "goal reached"))
        if at is not None and t >= at
    ]
    return ("   — " + ", ".join(words)) if words else ""


def save_episode_animation(
    frames: np.ndarray,
    params: SimParams,
    path: str | Path,
    *,
    fps: float = 10.0,
    collided_at: int | None = None,
    offroad_at: int | None = None,
    goal_at: int | None = None,
    title: str | None = None,
    width_px: int = 1000,
    frame_steps: np.ndarray | None = None,
) -> Path:
    """Write an animation of an episode: a GIF (through pillow), or an MP4 if ``path`` ends in ``.mp4`` and the
    ``ffmpeg`` program is on PATH.

    Args:
        frames: (T, V, 8) world-frame rows per moment, as :func:`episode_frames` returns.
        params: the scenario's arrays.
        path: ``*.gif`` or ``*.mp4``.
        fps: frames per second of playback (10 plays a 0.1 s-step episode in real time).
        collided_at, offroad_at, goal_at: first frame of each event; a black cross marks the collision from
            ``collided_at`` on, and the title names the events.
        title: text before the time stamp in every frame's title (e.g. the scenario name and seed).
        width_px: frame width in pixels.
        frame_steps: the simulator step each frame shows, for the time stamps (default 0, 1, 2, ...: every step;
            pass them when drawing a subset of the steps).

    Returns:
        The path written.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in ANIMATION_SUFFIXES:
        raise ConfigError(f"{path}: an animation must be written to .gif or .mp4, not {suffix or 'no suffix'!r}")
    if not (np.isfinite(fps) and fps > 0):
        raise ConfigError(f"fps must be a positive number of frames per second, got {fps!r}")
    ffmpeg = shutil.which("ffmpeg") if suffix == ".mp4" else None
    if suffix == ".mp4" and ffmpeg is None:
        raise ConfigError(
            f"{path}: writing .mp4 needs the ffmpeg program on PATH, which was not found; "
            "install ffmpeg or write a .gif"
        )
    frames = _check_frames(frames)
    steps = np.arange(len(frames)) if frame_steps is None else np.asarray(frame_steps, dtype=np.int64)
    if steps.shape != (len(frames),):
        raise ConfigError(f"frame_steps must give one step per frame ({len(frames)}), got shape {steps.shape}")
    renderer = SceneRenderer(params, width_px=width_px)
    images = []
    for t, rows in enumerate(frames):
        text = _frame_title(title, int(steps[t]), params, rows[EGO], _events_text(t, collided_at, offroad_at, goal_at))
        images.append(renderer.render(rows, title=text, collided=collided_at is not None and t >= collided_at))
    renderer.close()
    data = _gif_bytes(images, fps) if suffix == ".gif" else _mp4_bytes(images, fps, ffmpeg, path)
    atomic_write_bytes(path, data)
    return path


def _gif_bytes(images: list[np.ndarray], fps: float) -> bytes:
    from PIL import Image

    pics = [
        Image.fromarray(im).quantize(colors=96, method=Image.Quantize.MEDIANCUT, dither=Image.Dither.NONE)
        for im in images
    ]
    frame_ms = max(int(round(1000.0 / fps)), 10)  # GIF delays count in hundredths of a second
    durations = [frame_ms] * (len(pics) - 1) + [max(frame_ms, GIF_END_PAUSE_MS)]
    buf = io.BytesIO()
    pics[0].save(
        buf, format="GIF", save_all=True, append_images=pics[1:], duration=durations, loop=0, optimize=False, disposal=1
    )
    return buf.getvalue()


def _mp4_bytes(images: list[np.ndarray], fps: float, ffmpeg: str, path: Path) -> bytes:
    h, w, _ = images[0].shape
    with tempfile.TemporaryDirectory(prefix="wmplan-mp4-") as work:
        tmp = Path(work) / "episode.mp4"
        cmd = [
            ffmpeg,
            "-y",
            "-loglevel",
            "error",
            "-f",
            "rawvideo",
            "-pix_fmt",
            "rgb24",
            "-s",
            f"{w}x{h}",
            "-r",
            f"{fps:g}",
            "-i",
            "-",
            "-c:v",
            "libx264",
            "-pix_fmt",
            "yuv420p",
            "-f",
            "mp4",
            str(tmp),
        ]
        proc = subprocess.run(cmd, input=b"".join(im.tobytes() for im in images), capture_output=True, check=False)
        if proc.returncode != 0:
            last = (proc.stderr.decode(errors="replace").strip().splitlines() or ["no message"])[-1]
            raise ConfigError(f"{path}: ffmpeg failed with exit status {proc.returncode}: {last}")
        return tmp.read_bytes()


def render_to_file(
    scenario_name_or_path: str | Path, out_path: str | Path, *, seed: int = 0, step: int | None = None
) -> Path:
    """Draw one episode of a scenario, driven by the rule-based ego, into a file chosen by its suffix.

    * ``.png``: one moment, simulator step ``step`` (default: the middle of the episode).
    * ``.gif`` / ``.mp4``: the whole episode, or its steps ``0..step`` if ``step`` is given (MP4 needs ffmpeg).

    Args:
        scenario_name_or_path: a built-in scenario name or a scenario YAML file.
        out_path: the file to write (missing folders are created).
        seed: the scene seed.
        step: see above.

    Returns:
        The path written.

    Raises:
        ConfigError: unsupported suffix, a step beyond the episode's end, or (MP4) no ffmpeg.
        ScenarioError: the scenario cannot be loaded.
    """
    out = Path(out_path)
    suffix = out.suffix.lower()
    if suffix not in PICTURE_SUFFIXES + ANIMATION_SUFFIXES:
        raise ConfigError(
            f"{out}: unsupported output suffix {suffix or '(none)'!r}; use .png for one moment, "
            ".gif or .mp4 for the whole episode"
        )
    if step is not None and (isinstance(step, bool) or not isinstance(step, (int, np.integer)) or step < 0):
        raise ConfigError(f"step must be an integer >= 0, got {step!r}")
    scn = load_scenario(scenario_name_or_path)
    params = SimParams.from_scenario(scn)
    frames, oc = episode_frames(params, seed)
    last = len(frames) - 1
    if step is not None and step > last:
        why = (
            "its duration"
            if last == params.num_steps
            else "its end (the ego "
            + ("collided" if oc.collided else "left the road" if oc.offroad else "reached its goal")
            + ")"
        )
        raise ConfigError(
            f"step {step} is beyond this episode, which has steps 0..{last} ({why}); choose a step <= {last}"
        )
    label = f"{scn.name}   seed {seed}"
    if suffix in ANIMATION_SUFFIXES:
        end = last if step is None else int(step)
        return save_episode_animation(
            frames[: end + 1],
            params,
            out,
            fps=1.0 / params.dt_s,
            collided_at=oc.collided_at,
            offroad_at=oc.offroad_at,
            goal_at=oc.goal_at,
            title=label,
        )
    t = last // 2 if step is None else int(step)
    text = _frame_title(label, t, params, frames[t, EGO], _events_text(t, oc.collided_at, oc.offroad_at, oc.goal_at))
    fig = scene_figure(frames[t], params, title=text, collided=oc.collided_at is not None and t >= oc.collided_at)
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    atomic_write_bytes(out, buf.getvalue())
    return out


def animate_failure(
    scenario_file: Path, seed: int, planner: str, out_file: Path, *, options: dict | None = None
) -> Path:
    """Replay one episode (a saved failure) with its planner through the closed loop and draw it as an animation.

    Args:
        scenario_file: the scenario (variant) file the failure was found in.
        seed: the scene seed.
        planner: the planner spec.
        out_file: FILE.gif (or FILE.mp4 where ffmpeg exists).
        options: the planner's options (model folders, ...).
    """
    from wmplan.evaluate.closed_loop import record_episode

    scn = load_scenario(scenario_file)
    frames, row = record_episode(scn, planner, seed, options=options)
    params = SimParams.from_scenario(scn)
    keep = np.unique(np.r_[np.arange(0, len(frames), 2), len(frames) - 1])  # every other step, and the last one
    last = len(keep) - 1
    return save_episode_animation(
        frames[keep],
        params,
        out_file,
        fps=5.0,
        frame_steps=keep,
        collided_at=last if row["collision"] else None,
        offroad_at=last if row["offroad"] else None,
        title=f"{planner}, seed {seed}",
    )

"""Running a sweep: one task per cell through the ``concurrent.futures`` interface, resumable, deterministic.

Executors:

* ``workers=1`` (default): cells run one after another in this process (easy to debug and profile).
* ``workers=N > 1``: a :class:`~concurrent.futures.ProcessPoolExecutor` whose worker processes are *spawned* (not
  forked), which is safe with torch and threads; each worker limits its math libraries to one thread.
* ``scheduler="tcp://host:port"``: a Dask distributed cluster, through ``distributed.Client(address).get_executor()``
  (the ``cluster`` extra, imported only when asked for). The cluster's workers decide the parallelism.

Output folder::

    out/sweep.json          the sweep as given and its cells (ids, planners, swept values)
    out/cells/<id>.parquet  one file per finished cell, written atomically (temporary file, then rename) by this
                            process as soon as the cell's result arrives
    out/results.parquet     one row per episode of every finished cell, sorted by cell id then seed
    out/summary.json        per cell: swept values, planner, n, collision rate with a Wilson 95% interval, ...
    out/*.png               collision rate against the swept values (see ``wmplan.sweep.plots``)

A rerun skips every cell whose file exists. ``results.parquet`` and ``summary.json`` are rebuilt from the cell
files at the end of every run (also after failures), so a killed run or a dead worker loses no finished cell, and
the tables never hold part of a cell or a cell twice. A cell's rows depend only on the cell (its variant, planner
and seeds), so any executor and worker count give identical rows.
"""

from __future__ import annotations

import json
import multiprocessing
import os
import sys
import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import FIRST_COMPLETED, BrokenExecutor, Executor, Future, ProcessPoolExecutor, wait
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from wmplan.caution import CAUTION
from wmplan.errors import ConfigError
from wmplan.evaluate.closed_loop import run_episodes
from wmplan.evaluate.planners import BUILTIN_PLANNERS, planner_names, resolve_planner
from wmplan.evaluate.rows import COLUMN_NAMES, ROWS_VERSION, rows_table
from wmplan.intervals import wilson_interval
from wmplan.io import atomic_write_bytes, atomic_write_json
from wmplan.sweep.cells import (
    Cell,
    expand_cells,
    param_column_kinds,
    param_column_value,
)
from wmplan.sweep.spec import Sweep, SweepError, load_sweep

SCHEDULER_TIMEOUT_S = 20.0
"""How long to try to reach a Dask scheduler before giving up."""
Progress = bool | Callable[[int, int], None] | None


# --- one cell (runs in a worker) --------------------------------------------------------------------------------


def _cell_rows(cell: Cell, kinds: dict[str, str]) -> list[dict]:
    """The table rows of one cell: its episodes' rows (:mod:`wmplan.evaluate.rows`, run by the one closed loop
    with the run seed 0) with the cell's id and swept values in front."""
    rows = run_episodes(
        [cell.load_scenario()], [np.asarray(cell.seeds)], cell.planner, options=cell.planner_options, seed=0
    )[0].rows
    out = []
    for row in rows:
        r: dict[str, Any] = {"cell_id": cell.cell_id, "variant_id": cell.variant_id}
        for path, value in cell.params:
            r[path] = param_column_value(kinds[path], value)
        r.update(row)
        out.append(r)
    return out


def _exit_when_orphaned(parent_pid: int) -> None:
    while True:
        if os.getppid() != parent_pid:  # the run was killed: its results have nowhere to go
            os._exit(1)
        time.sleep(0.5)


def _init_worker(parent_pid: int) -> None:
    """Keep each worker's math libraries and the engine (``wmplan.sim.threads``) to one thread, so N workers use
    N cores and no more; end the worker if the process that started it dies (a killed run must not leave workers
    behind).

    ``parent_pid`` is the run's process id, passed in rather than read here: a worker still importing when the run
    is killed has already been re-parented by the time this runs, and ``os.getppid()`` would name its new parent.
    """
    for var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS", "WMPLAN_SIM_THREADS"):
        os.environ.setdefault(var, "1")
    if os.getppid() != parent_pid:
        os._exit(1)
    threading.Thread(target=_exit_when_orphaned, args=(parent_pid,), daemon=True).start()


class InlineExecutor(Executor):
    """An executor that runs each task at ``submit`` in the calling process (``workers=1``)."""

    def submit(self, fn, /, *args, **kwargs) -> Future:  # type: ignore[override]
        """Run ``fn`` now and return a finished future holding its result or exception."""
        fut: Future = Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except Exception as err:  # delivered through the future, like any executor
            fut.set_exception(err)
        return fut


@contextmanager
def make_executor(workers: int = 1, scheduler: str | None = None) -> Iterator[tuple[Executor, int]]:
    """The executor for a run, and how many tasks to keep in flight.

    Raises:
        ConfigError: bad ``workers``, or a scheduler asked for without the ``cluster`` extra installed.
        SweepError: the scheduler cannot be reached.
    """
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ConfigError(f"workers must be an integer >= 1, got {workers!r}")
    if scheduler:
        try:
            import distributed
        except ImportError:
            raise ConfigError(
                "a Dask scheduler was given but the Dask distributed client is not installed; "
                "install it with: pip install 'wmplan[cluster]'"
            ) from None
        try:
            client = distributed.Client(scheduler, timeout=f"{SCHEDULER_TIMEOUT_S}s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as err:
            first = (str(err).strip().splitlines() or [""])[0]
            raise SweepError(f"cannot reach the Dask scheduler at {scheduler}: {type(err).__name__}: {first}") from None
        try:
            threads = sum(client.nthreads().values())
            yield client.get_executor(pure=False), max(2, 2 * threads)
        finally:
            client.close()
    elif workers == 1:
        yield InlineExecutor(), 1
    else:
        pool = ProcessPoolExecutor(
            max_workers=workers,
            mp_context=multiprocessing.get_context("spawn"),
            initializer=_init_worker,
            initargs=(os.getpid(),),
        )
        try:
            yield pool, 2 * workers
        except BaseException:  # interrupted: do not wait for the cells still running, their results are lost anyway
            pool.shutdown(wait=False, cancel_futures=True)
            raise
        pool.shutdown(wait=True)


def execute_cells(
    cells: list[Cell],
    task: Callable[..., Any],
    args_of: Callable[[Cell], tuple],
    executor: Executor,
    window: int,
    on_done: Callable[[Cell, Any], None],
) -> list[tuple[Cell, BaseException | None]]:
    """Run ``task(*args_of(cell))`` for every cell, at most ``window`` at a time, calling ``on_done`` as each
    finishes (in completion order). Returns the cells that did not finish, with their error (None: never started
    because the executor broke)."""
    failures: list[tuple[Cell, BaseException | None]] = []
    pending = iter(cells)
    in_flight: dict[Future, Cell] = {}
    broken = [False]

    def submit_next() -> None:
        cell = next(pending, None) if not broken[0] else None
        if cell is None:
            return
        try:
            in_flight[executor.submit(task, *args_of(cell))] = cell
        except BrokenExecutor as err:  # a worker died since the last check
            failures.append((cell, err))
            broken[0] = True

    for _ in range(window):
        submit_next()
    while in_flight:
        done, _ = wait(list(in_flight), return_when=FIRST_COMPLETED)
        for fut in sorted(done, key=lambda f: in_flight[f].cell_id):
            cell = in_flight.pop(fut)
            err = fut.exception()
            if err is not None:
                failures.append((cell, err))
                broken[0] = broken[0] or isinstance(err, BrokenExecutor)
            else:
                on_done(cell, fut.result())
            submit_next()
    failures.extend((cell, None) for cell in pending)
    return failures


# --- files --------------------------------------------------------------------------------------------------------


def _table_bytes(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink)
    return sink.getvalue().to_pybytes()


def cell_path(out_dir: Path, cell_id: str) -> Path:
    """The file of one cell's rows."""
    return Path(out_dir) / "cells" / f"{cell_id}.parquet"


def write_cell(out_dir: Path, cell: Cell, rows: list[dict]) -> Path:
    """Write one finished cell's rows atomically."""
    table = rows_table(rows)
    meta = {
        "cell_id": cell.cell_id,
        "rows_version": ROWS_VERSION,
        "planner": cell.planner,
        "params": [[p, v] for p, v in cell.params],
    }
    table = table.replace_schema_metadata({**table.schema.metadata, b"wmplan_cell": json.dumps(meta).encode()})
    path = cell_path(out_dir, cell.cell_id)
    atomic_write_bytes(path, _table_bytes(table))
    return path


def read_cell(out_dir: Path, cell_id: str) -> pa.Table:
    """Read a cell file and check that it belongs to ``cell_id``."""
    path = cell_path(out_dir, cell_id)
    try:
        table = pq.read_table(path)
        meta = json.loads((table.schema.metadata or {}).get(b"wmplan_cell", b"{}"))
    except (OSError, ValueError, pa.ArrowException) as err:
        raise SweepError(f"{path}: unreadable cell file ({type(err).__name__}); delete it and rerun") from None
    if meta.get("cell_id") != cell_id or meta.get("rows_version") != ROWS_VERSION:
        raise SweepError(
            f"{path}: the file belongs to cell {meta.get('cell_id')!r}, not {cell_id!r}; delete it and rerun"
        )
    return table


def results_table(out_dir: Path, cells: list[Cell], kinds: dict[str, str]) -> pa.Table | None:
    """All rows of the finished cells among ``cells``: sorted by cell id then seed, fixed leading columns."""
    tables = [
        read_cell(out_dir, c.cell_id)
        for c in sorted(cells, key=lambda c: c.cell_id)
        if cell_path(out_dir, c.cell_id).is_file()
    ]
    if not tables:
        return None
    table = pa.concat_tables([t.replace_schema_metadata(None) for t in tables], promote_options="permissive")
    table = table.sort_by([("cell_id", "ascending"), ("seed", "ascending")])
    lead = ["cell_id", "variant_id", *kinds, *(n for n in COLUMN_NAMES if n in table.column_names)]
    order = lead + [n for n in table.column_names if n not in lead]
    return table.select(order).replace_schema_metadata(rows_table([]).schema.metadata)


def _cell_summary(cell: Cell, table: pa.Table) -> dict:
    cols = table.to_pydict()
    n = len(cols["seed"])
    k = sum(bool(v) for v in cols["collision"])
    s = sum(bool(v) for v in cols["success"])
    off = sum(bool(v) for v in cols["offroad"])
    return {
        "cell_id": cell.cell_id,
        "variant_id": cell.variant_id,
        "planner": cell.planner,
        "params": {p: v for p, v in cell.params},
        "n": n,
        "collisions": k,
        "collision_rate": k / n,
        "collision_ci95": list(wilson_interval(k, n)),
        "offroad_rate": off / n,
        "near_miss_rate": sum(bool(v) for v in cols["near_miss"]) / n,
        "success_rate": s / n,
        "success_ci95": list(wilson_interval(s, n)),
        "mean_speed_mps": sum(cols["mean_speed_mps"]) / n,
        "mean_progress_m": sum(cols["progress_m"]) / n,
    }


def rebuild_outputs(sweep: Sweep, cells: list[Cell], out_dir: Path, *, plots: bool = True) -> dict:
    """Rebuild ``results.parquet``, ``summary.json`` and the plots from the cell files on disk; returns the summary."""
    out_dir = Path(out_dir)
    kinds = param_column_kinds(sweep)
    table = results_table(out_dir, cells, kinds)
    done = [c for c in cells if cell_path(out_dir, c.cell_id).is_file()]
    done_ids = {c.cell_id for c in done}
    per_cell = []
    if table is not None:
        ids = table.column("cell_id").to_pylist()
        for cell in sorted(done, key=lambda c: c.cell_id):
            start, stop = ids.index(cell.cell_id), len(ids) - ids[::-1].index(cell.cell_id)
            per_cell.append(_cell_summary(cell, table.slice(start, stop - start)))
        atomic_write_bytes(out_dir / "results.parquet", _table_bytes(table))
    missing = sorted(c.cell_id for c in cells if c.cell_id not in done_ids)
    spec = sweep.spec
    summary = {
        "sweep": spec.name,
        "source": sweep.source,
        "seed": spec.seed,
        "episodes_per_cell": spec.episodes_per_cell,
        "parameters": list(spec.vary),
        "planners": list(spec.planners),
        "num_cells": len(cells),
        "cells_done": len(done),
        "complete": not missing,
        "missing_cells": missing,
        "num_episodes": 0 if table is None else table.num_rows,
        "caution": CAUTION,
        "cells": per_cell,
        "plots": [],
    }
    if plots and per_cell:
        from wmplan.sweep.plots import write_summary_plots

        summary["plots"] = [p.name for p in write_summary_plots(summary, out_dir)]
    atomic_write_json(out_dir / "summary.json", summary)
    return summary


# --- the run ------------------------------------------------------------------------------------------------------


def _as_sweep(sweep: Sweep | str | Path) -> Sweep:
    return sweep if isinstance(sweep, Sweep) else load_sweep(sweep)


def _resolve_planners(sweep: Sweep) -> None:
    for i, name in enumerate(sweep.spec.planners):
        try:
            resolve_planner(name)
        except ConfigError as err:
            raise SweepError(f"{sweep.source}: planners[{i}]: {err}") from None


def check_workers_can_resolve(name: str) -> None:
    """Worker processes resolve a planner spec again by importing it: refuse a planner that only this process
    knows (added with ``register_planner``, or an import path into ``__main__``)."""
    if name in planner_names() and name not in BUILTIN_PLANNERS:
        raise ConfigError(
            f"planner {name!r} was registered in this process only, so worker processes cannot find "
            "it; name it by import path (module:factory) or run with one worker"
        )
    if name.split("+", 1)[-1].startswith("__main__"):
        raise ConfigError(
            f"planner {name!r} lives in __main__, which worker processes cannot import; move it to a "
            "module, or run with one worker"
        )


def _progress_bar(progress: Progress, total: int, initial: int):
    from tqdm import tqdm

    show = sys.stderr.isatty() if progress is None else progress is True
    return tqdm(
        total=total, initial=initial, desc="cells", unit="cell", file=sys.stderr, disable=not show, dynamic_ncols=True
    )


def run_sweep(
    sweep: Sweep | str | Path,
    out_dir: str | Path,
    *,
    workers: int = 1,
    scheduler: str | None = None,
    progress: Progress = None,
    plots: bool = True,
) -> dict:
    """Run every cell of a sweep that has no file yet, then rebuild the tables and plots.

    Args:
        sweep: a :class:`~wmplan.sweep.spec.Sweep` or the path of a sweep file.
        out_dir: output folder (created); see the module docstring for its layout.
        workers: processes of the local pool (1: run in this process). Ignored with ``scheduler``.
        scheduler: address of a Dask scheduler, e.g. ``"tcp://127.0.0.1:8786"``; needs ``wmplan[cluster]``.
        progress: None shows a tqdm bar on stderr when stderr is a terminal; True / False force it on / off; a
            callable ``progress(cells_done, cells_total)`` is called instead after each cell.
        plots: write the summary plots.

    Returns:
        The summary dict (also written to ``out/summary.json``).

    Raises:
        SweepError: bad sweep file or paths, or some cells did not finish (after saving the others and rebuilding
            the tables from them: rerun the same command to run the rest).
    """
    sweep = _as_sweep(sweep)
    out_dir = Path(out_dir)
    _resolve_planners(sweep)
    if workers != 1 or scheduler:
        for name in sweep.spec.planners:
            check_workers_can_resolve(name)
    cells = expand_cells(sweep)
    kinds = param_column_kinds(sweep)
    atomic_write_json(
        out_dir / "sweep.json",
        {
            "spec": sweep.spec.model_dump(mode="json"),
            "source": sweep.source,
            "cells": [
                {
                    "cell_id": c.cell_id,
                    "variant_id": c.variant_id,
                    "planner": c.planner,
                    "params": {p: v for p, v in c.params},
                }
                for c in cells
            ],
        },
    )
    todo = [c for c in cells if not cell_path(out_dir, c.cell_id).is_file()]
    bar = (
        None
        if callable(progress) and not isinstance(progress, bool)
        else _progress_bar(progress, len(cells), len(cells) - len(todo))
    )
    count = [len(cells) - len(todo)]

    def on_done(cell: Cell, rows: list[dict]) -> None:
        write_cell(out_dir, cell, rows)
        count[0] += 1
        if bar is not None:
            bar.update(1)
        else:
            progress(count[0], len(cells))  # type: ignore[operator]

    failures: list[tuple[Cell, BaseException | None]] = []
    try:
        if todo:
            with make_executor(workers, scheduler) as (executor, window):
                failures = execute_cells(todo, _cell_rows, lambda c: (c, kinds), executor, window, on_done)
    finally:
        if bar is not None:
            bar.close()
        summary = rebuild_outputs(sweep, cells, out_dir, plots=plots)
    if failures:
        cell, err = next(((c, e) for c, e in failures if e is not None), failures[0])
        why = "never started" if err is None else f"{type(err).__name__}: {(str(err).strip().splitlines() or [''])[0]}"
        raise SweepError(
            f"sweep {sweep.spec.name}: {len(failures)} of {len(cells)} cells did not finish; first: cell "
            f"{cell.cell_id} ({cell.describe()}): {why}; the {summary['cells_done']} finished cells are saved in "
            f"{out_dir / 'cells'}; rerun the same command to run the rest"
        )
    return summary


def format_summary(summary: dict, out_dir: Path, max_cells: int = 40) -> str:
    """The terminal text of a sweep's summary: one line per cell (at most ``max_cells``), rates with intervals."""
    cells = summary.get("cells", [])
    lines = [f"sweep {summary.get('sweep', '')}: {len(cells)} cells; results in {Path(out_dir) / 'results.parquet'}"]
    for c in cells[:max_cells]:
        ci = c.get("collision_ci95", [float("nan")] * 2)
        params = ", ".join(f"{k}={v}" for k, v in c.get("params", {}).items())
        lines.append(
            f"  {c.get('planner', ''):<22} {params:<60} collision {c.get('collision_rate', float('nan')):.3f} "
            f"[{ci[0]:.3f}, {ci[1]:.3f}] near miss {c.get('near_miss_rate', float('nan')):.3f} "
            f"n={c.get('n', '')}"
        )
    if len(cells) > max_cells:
        lines.append(f"  ... {len(cells) - max_cells} more cells in summary.json")
    return "\n".join(lines)


def read_results(out_dir: str | Path) -> pa.Table:
    """``out/results.parquet`` of a finished sweep."""
    path = Path(out_dir) / "results.parquet"
    if not path.is_file():
        raise SweepError(f"{path}: no results yet; run the sweep first")
    return pq.read_table(path)

"""Running sweeps: identical rows on every executor and worker count, resuming after deleted cells, a raising
planner and a killed worker, and the summary's Wilson intervals.

Contract tests (docs/references.md#practice-determinism). The interval check compares with
scipy.stats.binomtest(...).proportion_ci(method="wilson") (docs/references.md#wilson-1927,
docs/references.md#lib-scipy).
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest
import yaml
from scipy.stats import binomtest

from tests.sweep import sweep_planners
from wmplan.errors import ConfigError
from wmplan.evaluate.planners import register_planner, unregister_planner
from wmplan.evaluate.rows import TIMING_COLUMNS
from wmplan.scenario import load_scenario, scenario_to_dict
from wmplan.sweep import SweepError, expand_cells, load_sweep, read_results, run_sweep

TWIN = "tests.sweep.sweep_planners:rules_twin"
GENTLE = "tests.sweep.sweep_planners:gentle"
FLAKY = "tests.sweep.sweep_planners:flaky"
REPO = Path(__file__).resolve().parents[2]


def same_rows(a, b) -> bool:
    """Two results tables hold the same rows, but for the planner's wall-clock timing, which differs by nature."""
    return a.drop_columns(list(TIMING_COLUMNS)).equals(b.drop_columns(list(TIMING_COLUMNS)))


def _sweep_file(tmp_path: Path, planners: list[str], episodes: int = 4, seed: int = 17) -> Path:
    """A 2 x 2 grid on a short on-ramp merge (6 s episodes), written next to its base scenario file."""
    base = scenario_to_dict(load_scenario("onramp-merge"))
    base["name"] = "short-merge"
    base["duration_s"] = 6.0
    (tmp_path / "short-merge.yaml").write_text(yaml.safe_dump(base))
    spec = {
        "name": "grid",
        "base": "short-merge.yaml",
        "vary": {
            "traffic.density_veh_per_km[1]": [12.0, sweep_planners.CRASH_DENSITY],
            "drivers.yield_prob.mean": [0.2, 0.8],
        },
        "planners": planners,
        "seed": seed,
        "episodes_per_cell": episodes,
    }
    path = tmp_path / "grid.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def test_rows_identical_for_one_and_two_workers_and_well_formed(tmp_path: Path) -> None:
    """workers=1 (in process) and workers=2 (spawned pool) write the same rows; rows are sorted by cell id then
    seed, one per episode, each cell's seeds shared by both planners; the twin of "rules" gives identical outcomes
    (paired seeds); "gentle" differs only where it should."""
    path = _sweep_file(tmp_path, ["rules", TWIN, GENTLE])
    s1 = run_sweep(path, tmp_path / "w1", workers=1, progress=False)
    s2 = run_sweep(path, tmp_path / "w2", workers=2, progress=False)
    a, b = read_results(tmp_path / "w1"), read_results(tmp_path / "w2")
    assert same_rows(a, b)
    assert s1["cells"] == s2["cells"] and s1["complete"] and s1["num_cells"] == 12
    rows = a.to_pylist()
    assert len(rows) == 12 * 4
    keys = [(r["cell_id"], r["seed"]) for r in rows]
    assert keys == sorted(keys) and len(set(keys)) == len(keys)
    assert a.column_names[:7] == [
        "cell_id",
        "variant_id",
        "traffic.density_veh_per_km[1]",
        "drivers.yield_prob.mean",
        "planner",
        "episode",
        "seed",
    ]
    by = {(r["variant_id"], r["planner"], r["seed"]): r for r in rows}
    variants = {r["variant_id"] for r in rows}
    assert len(variants) == 4
    for v in variants:
        seeds = {p: sorted(s for (vv, pp, s) in by if vv == v and pp == p) for p in ("rules", TWIN, GENTLE)}
        assert seeds["rules"] == seeds[TWIN] == seeds[GENTLE]
        for s in seeds["rules"]:
            r, t = by[(v, "rules", s)], by[(v, TWIN, s)]
            for k in ("collision", "offroad", "success", "progress_m", "mean_speed_mps", "min_ttc_s"):
                assert r[k] == t[k]
    gentle = [r["progress_m"] for r in rows if r["planner"] == GENTLE]
    rules = [r["progress_m"] for r in rows if r["planner"] == "rules"]
    assert gentle != rules  # the gentle planner drives differently
    assert (tmp_path / "w1" / "collision_rate.png").stat().st_size > 1000


def test_dask_cluster_gives_the_same_rows_as_the_process_pool(tmp_path: Path) -> None:
    """A local Dask cluster (2 worker processes, started here) and the process pool write identical rows."""
    distributed = pytest.importorskip("distributed")
    path = _sweep_file(tmp_path, ["rules", TWIN])
    run_sweep(path, tmp_path / "pool", workers=2, progress=False)
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None) as cl:
        summary = run_sweep(path, tmp_path / "dask", scheduler=cl.scheduler_address, progress=False)
    assert summary["complete"]
    assert same_rows(read_results(tmp_path / "dask"), read_results(tmp_path / "pool"))


def test_missing_dask_gives_the_pip_command(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Without the cluster extra, asking for a scheduler names the exact install command."""
    monkeypatch.setitem(sys.modules, "distributed", None)
    path = _sweep_file(tmp_path, ["rules"])
    with pytest.raises(
        ConfigError,
        match=re.escape(
            "a Dask scheduler was given but the Dask distributed client is not installed; install it with: "
            "pip install 'wmplan[cluster]'"
        ),
    ):
        run_sweep(path, tmp_path / "out", scheduler="tcp://127.0.0.1:1", progress=False)


def test_rerun_after_deleting_cells_gives_identical_rows(tmp_path: Path) -> None:
    """Delete two cell files and rerun: only those cells run again, and the rows equal the first run's."""
    path = _sweep_file(tmp_path, ["rules", GENTLE])
    out = tmp_path / "out"
    run_sweep(path, out, progress=False)
    first = read_results(out)
    for f in sorted((out / "cells").glob("*.parquet"))[:2]:
        f.unlink()
    (out / "results.parquet").unlink()
    calls = []
    summary = run_sweep(path, out, progress=lambda done, total: calls.append((done, total)))
    assert calls == [(7, 8), (8, 8)]  # only the two deleted cells ran again
    assert summary["complete"] and same_rows(read_results(out), first)


@pytest.mark.parametrize(("broken", "workers"), [("raise", 1), ("raise", 2), ("exit", 2)])
def test_interrupted_run_resumes_to_the_uninterrupted_rows(
    tmp_path: Path, broken: str, workers: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A planner that raises, or a worker that dies, stops the run with a one-line error after saving the
    finished cells; no partial cell reaches the tables; rerunning with a working planner completes the sweep with
    rows identical to an uninterrupted run."""
    path = _sweep_file(tmp_path, ["rules", FLAKY])
    monkeypatch.setenv(sweep_planners.FLAKY_ENV, "")
    run_sweep(path, tmp_path / "clean", progress=False)
    reference = read_results(tmp_path / "clean")

    monkeypatch.setenv(sweep_planners.FLAKY_ENV, broken)
    out = tmp_path / "out"
    with pytest.raises(SweepError) as info:
        run_sweep(path, out, workers=workers, progress=False)
    msg = str(info.value)
    # (a worker that dies takes the cells in flight on the other worker with it: the first unfinished cell, in
    # cell-id order, may then be a rules cell)
    assert "\n" not in msg and re.search(
        r"cells did not finish; first: cell [0-9a-f]{16} \(planner (tests\.sweep\.sweep_planners:flaky|rules), "
        r"traffic\.density_veh_per_km\[1\]=",
        msg,
    )
    assert msg.endswith(f"are saved in {out / 'cells'}; rerun the same command to run the rest")
    summary = json.loads((out / "summary.json").read_text())
    assert not summary["complete"] and summary["missing_cells"]
    partial = pq.read_table(out / "results.parquet")
    done_ids = set(partial.column("cell_id").to_pylist())
    assert len(done_ids) == summary["cells_done"] and partial.num_rows == 4 * len(done_ids)
    assert set(summary["missing_cells"]).isdisjoint(done_ids)
    ref_rows = [r for r in reference.to_pylist() if r["cell_id"] in done_ids]
    strip = lambda rows: [{k: v for k, v in r.items() if k not in TIMING_COLUMNS} for r in rows]  # noqa: E731
    assert strip(partial.to_pylist()) == strip(ref_rows)  # finished cells are complete and right, nothing else is there

    monkeypatch.setenv(sweep_planners.FLAKY_ENV, "")
    final = run_sweep(path, out, workers=workers, progress=False)
    assert final["complete"] and same_rows(read_results(out), reference)


def _children(pid: int) -> list[int]:
    """Process ids whose parent is ``pid`` (Linux /proc)."""
    out = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == pid:
            out.append(int(stat.parent.name))
    return out


@pytest.mark.parametrize("workers", [1, 2])
def test_killed_run_resumes_without_lost_or_duplicate_rows(tmp_path: Path, workers: int) -> None:
    """SIGKILL the process running a sweep after two cells are written: every cell file left is complete (it
    reads back and belongs to its cell), no pool worker outlives the run, and rerunning completes the sweep with
    the uninterrupted rows."""
    path = _sweep_file(tmp_path, ["rules", TWIN], episodes=32)
    run_sweep(path, tmp_path / "clean", progress=False)
    reference = read_results(tmp_path / "clean")
    out = tmp_path / "out"
    script = tmp_path / "run.py"
    script.write_text(
        "from wmplan.sweep import run_sweep\n"
        f"if __name__ == '__main__':\n    run_sweep({str(path)!r}, {str(out)!r}, workers={workers}, progress=False)\n"
    )
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")])}
    proc = subprocess.Popen([sys.executable, str(script)], stderr=subprocess.DEVNULL, cwd=REPO, env=env)
    deadline = time.monotonic() + 120.0
    while len(list((out / "cells").glob("*.parquet"))) < 2 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    assert proc.poll() is None, "the sweep finished before it could be killed; give it more work"
    kids = _children(proc.pid) if sys.platform.startswith("linux") else []
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    left = sorted((out / "cells").glob("*.parquet"))
    assert 2 <= len(left) < 8 and not (out / "results.parquet").exists()
    from wmplan.sweep.runner import read_cell

    for f in left:
        assert read_cell(out, f.stem).num_rows == 32
    summary = run_sweep(path, out, progress=False)
    assert summary["complete"] and same_rows(read_results(out), reference)
    if workers > 1 and sys.platform.startswith("linux"):
        assert len(kids) >= workers
        deadline = time.monotonic() + 10.0
        while any(Path(f"/proc/{k}").exists() for k in kids) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert not any(Path(f"/proc/{k}").exists() for k in kids), "pool workers outlived the killed run"


def test_summary_rates_and_wilson_intervals(tmp_path: Path) -> None:
    """Per cell: n, collision count and rate from the rows, and the Wilson interval of scipy's binomtest."""
    path = _sweep_file(tmp_path, ["rules"], episodes=6)
    summary = run_sweep(path, tmp_path / "out", progress=False)
    rows = read_results(tmp_path / "out").to_pylist()
    from wmplan.caution import CAUTION

    assert summary["caution"] == CAUTION
    for cell in summary["cells"]:
        mine = [r for r in rows if r["cell_id"] == cell["cell_id"]]
        k = sum(r["collision"] for r in mine)
        s = sum(r["success"] for r in mine)
        assert cell["n"] == len(mine) == 6 and cell["collisions"] == k
        ci = binomtest(k, 6).proportion_ci(method="wilson")
        assert cell["collision_ci95"] == pytest.approx([ci.low, ci.high], abs=1e-12)
        ci = binomtest(s, 6).proportion_ci(method="wilson")
        assert cell["success_ci95"] == pytest.approx([ci.low, ci.high], abs=1e-12)
        assert cell["mean_speed_mps"] == pytest.approx(sum(r["mean_speed_mps"] for r in mine) / 6)
    cells = expand_cells(load_sweep(path))
    assert {c["cell_id"] for c in summary["cells"]} == {c.cell_id for c in cells}


def test_a_planner_registered_in_process_is_refused_for_the_process_pool(tmp_path: Path) -> None:
    """Spawned workers resolve planners by import path; one registered in this process only cannot travel, and
    the message says what to do."""
    register_planner("local", sweep_planners.rules_twin, replace=True)
    try:
        path = _sweep_file(tmp_path, ["local"])
        with pytest.raises(
            ConfigError,
            match=re.escape(
                "planner 'local' was registered in this process only, so worker processes cannot find it; name it "
                "by import path (module:factory) or run with one worker"
            ),
        ):
            run_sweep(path, tmp_path / "out", workers=2, progress=False)
        assert run_sweep(path, tmp_path / "out", workers=1, progress=False)["complete"]
    finally:
        unregister_planner("local")


def test_bad_workers_and_unreachable_scheduler(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """workers must be a positive integer; an unreachable scheduler is one line naming the address."""
    pytest.importorskip("distributed")
    monkeypatch.setattr("wmplan.sweep.runner.SCHEDULER_TIMEOUT_S", 2.0)
    path = _sweep_file(tmp_path, ["rules"])
    with pytest.raises(ConfigError, match=re.escape("workers must be an integer >= 1, got 0")):
        run_sweep(path, tmp_path / "a", workers=0, progress=False)
    with pytest.raises(SweepError, match=r"^cannot reach the Dask scheduler at tcp://127\.0\.0\.1:9: "):
        run_sweep(path, tmp_path / "b", scheduler="tcp://127.0.0.1:9", progress=False)

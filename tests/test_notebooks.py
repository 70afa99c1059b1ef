"""The four notebooks: stored without outputs, in step with ``notebooks/_build.py``, and runnable top to bottom.

The execution tests (marker ``notebooks``) run every notebook headless through nbclient, the way CI does, with
``WMPLAN_QUICK=1`` in the environment (the kernel inherits it) and a fresh temporary folder as the kernel's working
directory, so the notebooks' outputs (``runs/notebooks/...``) land there and no notebook sees another's files.
Executing notebooks headless as a smoke test is common practice, no source (docs/references.md#practice-smoke-test,
docs/references.md#lib-jupyter). Each test checks that no cell raised,
that the notebook showed its figures and left its files, and prints the wall time (the quick mode aims at well under
three minutes on two idle cores; speed is measured, not asserted, per DEVELOPERS.md). The notebooks seed everything
they draw (``SEED`` in each config cell).

The kernel named ``python3`` must be the project's interpreter: jupyter_client replaces a kernelspec command that
starts with ``python`` by ``sys.executable`` (seen in ``jupyter_client/manager.py``, ``format_kernel_cmd``), and
:func:`test_kernel_is_this_interpreter` checks that this holds here.
"""

from __future__ import annotations

import importlib
import os
import sys
import time
from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOK_DIR = ROOT / "notebooks"
NAMES = ("01_traffic_sandbox", "02_train_world_model", "03_plan_under_uncertainty", "04_sweeps_and_stress")
CELL_TIMEOUT_S = 1800  # per cell; generous because CI machines may be shared
QUICK_TARGET_S = 180

# Files each notebook must leave in its output folder (runs/notebooks/<name>/), and the least number of pictures
# (PNG or GIF outputs) it must show.
EXPECTED = {
    "01_traffic_sandbox": (("episode.gif",), 5),
    "02_train_world_model": (("data/manifest.json", "latent/latest", "latent/metrics.csv", "deterministic/latest"), 2),
    # run alone in a fresh folder, notebook 03 trains its own small model instead of reading notebook 02's
    "03_plan_under_uncertainty": (("latent/latest",), 7),
    "04_sweeps_and_stress": (
        (
            "merge-density-yield.yaml",
            "sweep/results.parquet",
            "sweep/summary.json",
            "stress/stress.json",
            "failure.gif",
        ),
        3,
    ),
}


def _read(name: str) -> nbformat.NotebookNode:
    return nbformat.read(NOTEBOOK_DIR / f"{name}.ipynb", as_version=4)


def _execute(nb: nbformat.NotebookNode, folder: Path) -> None:
    """Run every cell in order in a ``python3`` kernel whose working directory is ``folder``; raises
    ``nbclient.exceptions.CellExecutionError`` at the first cell that fails."""
    client = NotebookClient(
        nb, timeout=CELL_TIMEOUT_S, kernel_name="python3", resources={"metadata": {"path": str(folder)}}
    )
    client.execute()


def _outputs(nb: nbformat.NotebookNode) -> list[dict]:
    return [out for cell in nb.cells if cell.cell_type == "code" for out in cell.get("outputs", [])]


# --- the stored files (fast) ----------------------------------------------------------------------------------------


def test_the_four_notebooks_and_one_config_cell_each():
    """notebooks/ holds exactly the four notebooks of the brief; in each, the first code cell is the only one that
    reads WMPLAN_QUICK, and markdown (a title and an introduction) comes before it."""
    assert tuple(sorted(p.stem for p in NOTEBOOK_DIR.glob("*.ipynb"))) == NAMES
    for name in NAMES:
        nb = _read(name)
        code = [c for c in nb.cells if c.cell_type == "code"]
        reading = [i for i, c in enumerate(code) if "WMPLAN_QUICK" in c.source]
        assert reading == [0], f"{name}: WMPLAN_QUICK is read in code cells {reading}, expected only the first"
        assert nb.cells[0].cell_type == "markdown" and nb.cells[0].source.startswith("# "), name


def test_notebooks_are_stored_without_outputs():
    """Committed notebooks carry no outputs and no execution counts (the brief: stored without outputs)."""
    for name in NAMES:
        for cell in _read(name).cells:
            if cell.cell_type == "code":
                assert cell.outputs == [] and cell.execution_count is None, f"{name}: cell {cell.id} has outputs"


def test_notebooks_match_their_build_script():
    """The notebooks are what notebooks/_build.py writes: edit the script, then rebuild (its --check mode)."""
    module = importlib.import_module("notebooks._build")
    stale = [path.name for path, text in module.rendered().items() if path.read_text(encoding="utf-8") != text]
    assert stale == [], f"out of date (run python notebooks/_build.py): {stale}"


# --- execution (slow: marker notebooks) -----------------------------------------------------------------------------


@pytest.mark.notebooks
def test_kernel_is_this_interpreter(tmp_path, monkeypatch):
    """The ``python3`` kernel nbclient starts runs this interpreter (the project's venv), inherits the environment
    and works in the folder given as ``resources['metadata']['path']``."""
    monkeypatch.setenv("WMPLAN_QUICK", "1")
    nb = nbformat.v4.new_notebook()
    nb.cells = [
        nbformat.v4.new_code_cell(
            "import os, sys\nprint(sys.executable)\nprint(os.getcwd())\nprint(os.environ.get('WMPLAN_QUICK'))"
        )
    ]
    _execute(nb, tmp_path)
    executable, cwd, quick = nb.cells[0].outputs[0]["text"].splitlines()
    assert os.path.realpath(executable) == os.path.realpath(sys.executable)
    assert os.path.realpath(cwd) == os.path.realpath(tmp_path)
    assert quick == "1"


@pytest.mark.notebooks
@pytest.mark.parametrize("name", NAMES)
def test_notebook_runs_in_quick_mode(name, tmp_path, monkeypatch, record_property):
    """Every cell runs without error in quick mode; the notebook shows its pictures and writes its files."""
    monkeypatch.setenv("WMPLAN_QUICK", "1")
    nb = _read(name)
    t0 = time.perf_counter()
    _execute(nb, tmp_path)
    seconds = time.perf_counter() - t0
    record_property("seconds", round(seconds, 1))
    print(f"{name}: {seconds:.0f} s in quick mode (aim: < {QUICK_TARGET_S} s on two idle cores)")

    outputs = _outputs(nb)
    errors = [f"{o.get('ename')}: {o.get('evalue')}" for o in outputs if o.get("output_type") == "error"]
    assert errors == []
    files, min_pictures = EXPECTED[name]
    pictures = [o for o in outputs if {"image/png", "image/gif"} & set(o.get("data", {}))]
    assert len(pictures) >= min_pictures, f"{name}: showed {len(pictures)} pictures, expected >= {min_pictures}"
    out_dir = tmp_path / "runs" / "notebooks" / name
    missing = [f for f in files if not (out_dir / f).is_file()]
    assert missing == [], f"{name}: did not write {missing} under {out_dir}"

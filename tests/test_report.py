"""Tests of the run report (wmplan.report): what a run left on disk in, report.html and report.md out.

Sources: docs/references.md#wilson-1927 for the Wilson 95% intervals shown in the closed-loop table (3/200 ->
[0.005114, 0.043166], 0/200 -> [0, 0.018845], 7/50 -> [0.069508, 0.261862], [D]); docs/references.md#brier-1950 and
docs/references.md#naeini-2015-ece for the calibration example (Brier 0.165, ECE 0.03 with two bins, [D]); the
README's cautions; Python's html.parser (standard library) for the
structure of the HTML page; PIL for the PNG files. The run folders are written here by hand in the shapes the
training, assessment and evaluation code write, plus a tiny simulated dataset (wmplan.data.simulate_dataset).
"""

from __future__ import annotations

import base64
import io
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from wmplan.data import simulate_dataset
from wmplan.errors import ConfigError
from wmplan.evaluate.tables import calibration
from wmplan.intervals import wilson_interval
from wmplan.model.train import write_metrics_csv
from wmplan.report import ASSESS_METRICS, build_report, cli_report
from wmplan.scenario import load_scenario, scenario_to_yaml
from wmplan.sim.features import F_LENGTH, F_VALID, F_WIDTH, F_X, F_Y

P_93 = [0.1, 0.2, 0.2, 0.3, 0.4, 0.6, 0.7, 0.8, 0.9, 0.9]
Y_93 = [0, 0, 1, 0, 0, 1, 0, 1, 1, 1]


def _planner(k: int, n: int) -> dict:
    """A planner's summary as wmplan.evaluate.tables.summarise_planner shapes it (collisions k of n episodes)."""
    lo, hi = wilson_interval(k, n)
    return {
        "episodes": n,
        "collision_rate": k / n,
        "collision_ci95": [float(lo), float(hi)],
        "offroad_rate": 0.0,
        "offroad_ci95": [0.0, float(wilson_interval(0, n)[1])],
        "success_rate": (n - k) / n,
        "success_ci95": [float(v) for v in wilson_interval(n - k, n)],
        "mean_speed_mps": 26.84,
        "mean_speed_ci95": [26.5, 27.2],
        "progress_m": 512.3,
        "progress_ci95": [505.0, 519.6],
        "rms_jerk_mps3": 0.8,
        "rms_jerk_ci95": [0.7, 0.9],
        "min_ttc_s_median": 3.75,
        "share_min_ttc_below_1_5s": 0.02,
        "decision_ms_median": 41.25,
    }


def _futures(k: int = 6, h: int = 15, n: int = 4) -> dict[str, np.ndarray]:
    gen = np.random.default_rng(2)
    t = np.arange(1, h + 1) * 0.2
    rows = np.zeros((k, h, n, 8))
    rows[..., F_VALID], rows[..., F_LENGTH], rows[..., F_WIDTH] = 1.0, 4.6, 1.8
    rows[..., 0, F_X] = 25.0 * t
    rows[..., 1:, F_X] = np.array([20.0, -15.0, 40.0]) + t[:, None] * gen.uniform(20, 28, (k, 1, n - 1))
    rows[..., 1:, F_Y] = np.array([0.0, 3.6, 3.6])
    rows[:, :, 2, F_Y] -= np.outer(gen.integers(0, 2, k), np.clip(t / 2, 0, 1)) * 3.6  # some cut in
    hist = np.repeat(rows[:1, :1], 5, axis=1)[0]
    hist[..., F_X] -= np.arange(4, -1, -1)[:, None] * 5.0
    return {
        "history": hist,
        "model_rows": rows,
        "oracle_rows": rows[::-1].copy(),
        "deterministic_rows": rows.mean(0),
        "anchor_pose": np.array([150.0, 5.4, 0.0]),
    }


def _write_run(run: Path, *, gif: bool = True) -> dict:
    """A complete synthetic run folder; returns the numbers the report must show."""
    run.mkdir(parents=True, exist_ok=True)
    (run / "scenario.yaml").write_text(scenario_to_yaml(load_scenario("onramp-merge")))
    latent = [
        {
            "epoch": e,
            "loss/nll": 12.0 - e,
            "loss/kl": 1.5,
            "val/nll": 12.5 - e,
            "val/kl": 1.6,
            "val/min_fde_k6_m": 2.0 - 0.1 * e,
            "sched/kl_weight": min(1.0, (e + 1) / 3),
        }
        for e in range(5)
    ]
    det = [{"epoch": e, "loss/mse": 1.0 / (e + 1), "val/mse": 1.1 / (e + 1), "val/min_fde_k6_m": 2.6} for e in range(5)]
    write_metrics_csv(run / "latent" / "metrics.csv", latent)
    write_metrics_csv(run / "deterministic" / "metrics.csv", det)
    predictors = {
        "latent": {
            "min_ade_k6_m": 0.4321,
            "min_fde_k6_m": 0.9876,
            "nll": 1.2345,
            "coverage_90": 0.8912,
            "num_objects": 4321,
            "energy_distance": 0.3141,
            "collision_prob_gap": 0.0217,
            "energy_distance_resampled": 0.4,
            "collision_prob_gap_resampled": 0.03,
            "collision_prob_mean": 0.04,
        },
        "deterministic": {
            "min_ade_k6_m": 0.7654,
            "min_fde_k6_m": 1.6543,
            "nll": 2.2,
            "coverage_90": 0.71,
            "num_objects": 4321,
            "energy_distance": 0.95,
            "collision_prob_gap": 0.06,
        },
        "constant_velocity": {
            "min_ade_k6_m": 1.1111,
            "min_fde_k6_m": 2.5,
            "nll": 3.0,
            "coverage_90": 0.6,
            "num_objects": 4321,
        },
    }
    (run / "assess.json").write_text(
        json.dumps(
            {
                "scenario": "onramp-merge",
                "seed": 0,
                "heldout_episodes": 96,
                "predictors": predictors,
                "oracle_collision_prob_mean": {"known": 0.05, "resampled": 0.06},
            }
        )
    )
    gen = np.random.default_rng(0)
    p = gen.beta(0.4, 5.0, 300)
    y = (gen.random(300) < p).astype(int)
    summary = {
        "scenario": "onramp-merge",
        "episodes": 200,
        "seed": 0,
        "results": {
            "rules": {**_planner(3, 200), "collisions_by_contact_side": {"front": 2, "left": 1}},
            "mpc+latent": _planner(0, 200),
            "mpc+constant-velocity": _planner(7, 50),
        },
        "calibration": {
            "mpc+latent": calibration(P_93, Y_93, 2),
            "mpc+constant-velocity": calibration(p.tolist(), y.tolist()),
        },
    }
    (run / "evaluate").mkdir(exist_ok=True)
    (run / "evaluate" / "summary.json").write_text(json.dumps(summary))
    np.savez(run / "futures.npz", **_futures())
    fut = _futures()["model_rows"]
    np.savez(
        run / "candidates.npz",
        ego_paths=fut[0, None, :, 0].repeat(3, axis=0) + np.array([0, 0.5, 1.0])[:, None, None],
        costs=np.array([1.0, 0.5, 2.0]),
        p_collision=np.array([0.0, 0.125, 0.5]),
        chosen=np.array(1),
        futures=fut,
        current=_futures()["history"][-1],
        anchor_pose=np.array([150.0, 5.4, 0.0]),
    )
    Image.new("RGB", (320, 60), (205, 209, 214)).save(run / "scene.png")
    if gif:
        frames = [Image.new("RGB", (64, 32), (200, 70 + 20 * i, 12)) for i in range(3)]
        frames[0].save(run / "episode.gif", save_all=True, append_images=frames[1:], duration=100, loop=0)
    return summary


class _Structure(HTMLParser):
    """Collects tags, image sources and links, and checks that non-void tags close in order."""

    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self):
        super().__init__()
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.images: list[str] = []
        self.refs: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.images.append(a.get("src", ""))
        for key in ("href", "src"):
            if key in a:
                self.refs.append(a[key])
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"unexpected </{tag}> with open {self.stack[-3:]}")
        else:
            self.stack.pop()


def test_full_report_shows_tables_figures_and_cautions(tmp_path):
    """Every section present; the closed-loop numbers with Wilson intervals ([D], docs/references.md#wilson-1927); the
    assessment numbers; the calibration scores ([D], docs/references.md#brier-1950,
    docs/references.md#naeini-2015-ece); figures embedded as base64 PNG (and the GIF); the README's
    cautions."""
    run = tmp_path / "run"
    _write_run(run)
    html_path, md_path = build_report(run)
    assert html_path == run / "report.html" and md_path == run / "report.md"
    page = html_path.read_text(encoding="utf-8")
    for text in (
        "0.015 [0.005, 0.043]",
        "0.000 [0.000, 0.019]",
        "0.140 [0.070, 0.262]",  # Wilson: 3/200 0/200 7/50
        "0.985 [0.957, 0.995]",  # success 197/200 (Wilson, computed by wmplan.evaluate.stats)
        "26.8 [26.5, 27.2]",
        "41.2",
        "3.75",
        "0.432",
        "0.988",
        "1.234",
        "0.891",
        "0.314",
        "0.022",
        "1.111",  # assessment, 3 decimals
        "0.1650",
        "0.0300",
    ):  # Brier and ECE of the calibration example
        assert text in page, text
    for _key, label, explanation in ASSESS_METRICS[:6]:
        assert label.replace("&", "&amp;") in page and explanation.replace("'", "&#x27;") in page
    assert "onramp-merge" in page and "120 km/h" in page
    assert "certify nothing about a real vehicle" in page
    assert "ISO 26262" in page and "ISO 21448" in page and "research sandbox" in page
    parser = _Structure()
    parser.feed(page)
    assert parser.errors == [] and parser.stack == []
    pngs = [s for s in parser.images if s.startswith("data:image/png;base64,")]
    assert len(pngs) == 6  # training, futures, closed loop, candidates, reliability, and scene.png
    assert any(s.startswith("data:image/gif;base64,") for s in parser.images)
    assert all(r.startswith("data:") for r in parser.refs)  # self-contained: no external assets
    assert "http://" not in page and "https://" not in page
    for src in pngs:
        with Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))) as img:
            assert img.format == "PNG" and img.width >= 300
    gif = [s for s in parser.images if s.startswith("data:image/gif")][0]
    assert base64.b64decode(gif.split(",", 1)[1]) == (run / "episode.gif").read_bytes()

    md = md_path.read_text(encoding="utf-8")
    assert "| rules | 200 | 0.015 [0.005, 0.043] |" in md
    assert re.search(r"\| rules \| 200 \|.*\| front 2, left 1 \|", md)  # collisions by the side touched
    assert re.search(r"\| mpc\+latent \| 200 \|.*\| - \|", md)
    assert "certify nothing about a real vehicle" in md
    linked = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md)
    assert set(linked) == {
        "figures/training.png",
        "figures/futures.png",
        "figures/closed_loop.png",
        "figures/candidates.png",
        "figures/reliability.png",
        "scene.png",
        "episode.gif",
    }
    for rel in linked:
        assert (run / rel).is_file(), rel
        if rel.endswith(".png"):
            with Image.open(run / rel) as img:
                assert img.format == "PNG"
    assert not list(run.rglob("*.tmp")), "atomic writes leave no temporary files"


def test_cli_report_lists_what_it_wrote(tmp_path):
    run = tmp_path / "run"
    _write_run(run, gif=False)
    out = cli_report(run)
    assert out["html"] == str(run / "report.html") and out["markdown"] == str(run / "report.md")
    assert sorted(Path(f).name for f in out["figures"]) == [
        "candidates.png",
        "closed_loop.png",
        "futures.png",
        "reliability.png",
        "training.png",
    ]
    assert all(Path(f).is_file() for f in out["figures"])
    assert out["sections"] == [
        "scenario",
        "training",
        "assessment",
        "futures",
        "closed_loop",
        "candidates",
        "calibration",
        "media",
    ]
    assert out["skipped"] == []
    json.dumps(out)  # the CLI prints it with --json


def test_partial_run_notes_what_is_missing(tmp_path):
    """Only a closed-loop summary: the report is written, the missing pieces are named in a note each, and the
    calibration of the planners that predicted risk is still shown."""
    run = tmp_path / "partial"
    (run / "evaluate").mkdir(parents=True)
    summary = {"results": {"rules": _planner(3, 200)}, "calibration": {"mpc+latent": calibration(P_93, Y_93, 2)}}
    (run / "evaluate" / "summary.json").write_text(json.dumps(summary))
    out = cli_report(run)
    assert out["sections"] == ["closed_loop", "calibration"]
    assert "No scenario.yaml and no data/manifest.json in this run: the scenario is not described." in out["skipped"]
    assert "No assess.json: the models' assessment is not shown." in out["skipped"]
    assert "No scene.png or episode.gif in this run." in out["skipped"]
    page = (run / "report.html").read_text(encoding="utf-8")
    assert "No assess.json" in page and "0.015 [0.005, 0.043]" in page and "Brier" in page
    assert "certify nothing about a real vehicle" in page


def test_an_evaluate_folder_is_a_run_of_its_own(tmp_path):
    """``wmplan report R`` on the folder ``wmplan evaluate --out R`` wrote (summary.json beside episodes.parquet) shows
    its closed loop; a lone summary.json of another command is not taken for one."""
    run = tmp_path / "evaluated"
    run.mkdir()
    (run / "summary.json").write_text(json.dumps({"results": {"rules": _planner(3, 200)}}))
    with pytest.raises(ConfigError, match="nothing to report"):
        cli_report(run)
    (run / "episodes.parquet").write_bytes(b"")
    out = cli_report(run)
    assert out["sections"][0] == "closed_loop"
    assert "0.015 [0.005, 0.043]" in (run / "report.html").read_text(encoding="utf-8")


def test_unreadable_pieces_are_skipped_with_the_file_named(tmp_path):
    """A broken assess.json and a summary.json without results: both named in a note, the rest still reported."""
    run = tmp_path / "broken"
    _write_run(run, gif=False)
    (run / "assess.json").write_text("{not json")
    (run / "evaluate" / "summary.json").write_text(json.dumps({"results": []}))
    out = cli_report(run)
    assert any(
        s.startswith(f"Assessment skipped: {run / 'assess.json'}: not readable JSON (JSONDecodeError")
        for s in out["skipped"]
    )
    assert (
        f"Closed-loop results skipped: {run / 'evaluate' / 'summary.json'}: "
        "'results' must map each planner to its summary" in out["skipped"]
    )
    assert "assessment" not in out["sections"] and "closed_loop" not in out["sections"]
    assert "training" in out["sections"]


def test_report_from_a_simulated_dataset(tmp_path):
    """A real (tiny) dataset folder is enough: the scenario comes from its manifest, with the dataset's counts."""
    run = tmp_path / "sim"
    ds = simulate_dataset(load_scenario("onramp-merge"), run / "data", episodes=3, seed=5, batch_size=3)
    out = cli_report(run)
    assert out["sections"] == ["scenario", "dataset"]
    page = (run / "report.html").read_text(encoding="utf-8")
    assert "Training data (data/manifest.json)" in page
    assert f'<td>episodes</td><td class="num">{ds.traj.num_episodes}</td>' in page
    assert f'<td class="num">{ds.manifest["num_decisions"]}</td>' in page


def test_missing_folder_is_a_one_line_error(tmp_path):
    missing = tmp_path / "nowhere"
    with pytest.raises(ConfigError) as err:
        build_report(missing)
    assert str(err.value) == f"{missing}: no such run folder"
    assert "\n" not in str(err.value)


def test_folder_with_nothing_usable_is_a_one_line_error(tmp_path):
    (tmp_path / "notes.txt").write_text("nothing for the report")
    with pytest.raises(ConfigError) as err:
        build_report(tmp_path)
    assert str(err.value) == (
        f"{tmp_path}: nothing to report; expected one of scenario.yaml, data/manifest.json, "
        "latent/metrics.csv, assess.json, evaluate/summary.json (or summary.json beside episodes.parquet), "
        "futures.npz, scene.png"
    )
    assert not (tmp_path / "report.html").exists()


def test_a_file_instead_of_a_folder_is_refused(tmp_path):
    path = tmp_path / "summary.json"
    path.write_text("{}")
    with pytest.raises(ConfigError, match=re.escape(f"{path}: is a file, not a run folder")):
        build_report(path)


def _row(name: str, latent: float, cv: float, ls: float, coverage: float) -> dict:
    """A row of ``assess.json`` ``table`` as wmplan.model.assess.scenario_row shapes it."""
    return {
        "scenario": name,
        "latent_min_ade_k6_m": latent / 2,
        "latent_min_fde_k6_m": latent,
        "constant_velocity_min_fde_k6_m": cv,
        "deterministic_min_fde_k6_m": ls,
        "latent_coverage_90": coverage,
        "latent_nll": 1.5,
        "latent_energy_distance": 0.75,
        "latent_collision_prob_gap": 0.0625,
        "fde_ratio_constant_velocity": latent / cv,
        "fde_ratio_deterministic": latent / ls,
    }


def test_the_assessment_of_several_scenarios_is_one_row_each(tmp_path):
    """An assess.json of two scenarios (``wmplan assess --scenario a,b``) gives the per-scenario table, one row per
    scenario with its ratios, and no single-scenario table; a dataset of several scenarios lists them; a table of
    rows without names is skipped with a note."""
    run = tmp_path / "library"
    ds = simulate_dataset(
        [load_scenario("short-gap-cut-in"), load_scenario("cut-in")], run / "data", episodes=2, seed=5, batch_size=2
    )
    rows = [_row("short-gap-cut-in", 0.5, 2.0, 0.8, 0.9), _row("cut-in", 0.25, 1.0, 0.5, 0.875)]
    (run / "assess.json").write_text(json.dumps({"scenarios": ["short-gap-cut-in", "cut-in"], "table": rows}))
    out = cli_report(run)
    assert "assessment_by_scenario" in out["sections"] and "assessment" not in out["sections"]
    assert "dataset" in out["sections"]
    page = (run / "report.html").read_text(encoding="utf-8")
    assert "Assessment per scenario (assess.json)" in page
    table = page[page.index("Assessment per scenario (assess.json)") :]
    for cells in (("short-gap-cut-in", "0.250", "0.625", "0.900"), ("cut-in", "0.250", "0.500", "0.875")):
        row = re.search(r"<tr><td>" + re.escape(cells[0]) + r"</td>.*?</tr>", table, re.S)
        assert row is not None, cells[0]
        for value in cells[1:]:
            assert f'<td class="num">{value}</td>' in row.group(0), (cells[0], value)
    for e in ds.manifest["scenarios"]:
        assert f"<td>{e['hash'][:12]}</td>" in page
    (run / "assess.json").write_text(json.dumps({"table": [{"latent_min_fde_k6_m": 1.0}]}))
    out = cli_report(run)
    assert any(s.startswith("Assessment skipped: assess.json: 'table' must be a list") for s in out["skipped"])


def test_paired_comparisons_with_the_differences_off_zero_and_their_figure(tmp_path):
    """A closed loop on another scenario than the training data's: the report says so; the comparison table, the
    differences whose interval excludes zero in words (here constant velocity colliding in 10 of 40 scenes where
    the oracle never does: exact McNemar p = 2 / 2**10 = 0.0020, by hand from the binomial) and the figure of the
    paired differences. Without such a difference the report says that the data cannot tell the planners apart."""
    from wmplan.evaluate.paired import paired_comparison

    def rows(collide: int) -> list[dict]:
        return [
            {
                "seed": s,
                "collision": s < collide,
                "success": s >= collide,
                "near_miss": False,
                "mean_speed_mps": 20.0 + 0.3 * (s % 4) - (0.5 if s % 2 else 0.0) * (collide > 0),
                "progress_m": 150.0 + (s % 5),
            }
            for s in range(40)
        ]

    run = tmp_path / "run"
    simulate_dataset(load_scenario("onramp-merge"), run / "data", episodes=2, seed=5, batch_size=2)
    cmp = paired_comparison(rows(0), rows(10), reference="mpc+oracle", planner="mpc+constant-velocity")
    summary = {
        "scenario": "short-gap-cut-in",
        "episodes": 40,
        "seed": 0,
        "planners": ["mpc+constant-velocity", "mpc+oracle"],
        "results": {"mpc+constant-velocity": _planner(10, 40), "mpc+oracle": _planner(0, 40)},
        "reference": "mpc+oracle",
        "comparisons": {"mpc+constant-velocity": cmp},
    }
    (run / "evaluate").mkdir()
    (run / "evaluate" / "summary.json").write_text(json.dumps(summary))
    out = cli_report(run)
    assert "paired_differences" in out["sections"]
    assert str(run / "figures" / "paired_differences.png") in out["figures"]
    md = (run / "report.md").read_text(encoding="utf-8")
    assert (
        "The forward models were trained on onramp-merge; the closed loop runs on short-gap-cut-in, which their "
        "training data did not include." in md
    )
    assert "### Paired comparisons with mpc+oracle" in md
    low, high = cmp["collision_rate_diff_ci95"]
    assert low > 0
    line = (
        f"- mpc+constant-velocity vs mpc+oracle: collision rate +0.250 [{low:+.3f}, {high:+.3f}] over 40 pairs, "
        "McNemar p = 0.0020"
    )
    assert line in md.splitlines()
    assert md.index("whose 95% interval excludes zero") < md.index("figures/paired_differences.png")

    summary["comparisons"] = {"mpc+constant-velocity": paired_comparison(rows(0), rows(0), reference="mpc+oracle")}
    summary["results"]["mpc+constant-velocity"] = _planner(0, 40)
    (run / "evaluate" / "summary.json").write_text(json.dumps(summary))
    build_report(run)
    md = (run / "report.md").read_text(encoding="utf-8")
    assert "No difference to mpc+oracle has a 95% interval that excludes zero" in md


def test_the_assessment_says_how_many_contested_pairs_it_found(tmp_path):
    """The single-scenario assessment names the contested pairs' screening and count, and says in words when
    there were none (the gap is then not measured, not zero)."""
    run = tmp_path / "assessed"
    run.mkdir()
    contested = {
        "band": [0.02, 0.98],
        "oracle_samples": 8,
        "screened_states": 504,
        "states": 6,
        "pairs": 12,
        "drawn": "every held-out episode still running",
    }
    preds = {"latent": {"collision_prob_gap": 0.01, "collision_prob_gap_contested": 0.3}}
    (run / "assess.json").write_text(json.dumps({"predictors": preds, "contested": contested}))
    build_report(run)
    md = (run / "report.md").read_text(encoding="utf-8")
    assert "screened 504 states (every held-out episode still running); 6 had a plan" in md
    assert "[0.02, 0.98], 12 pairs in all." in md
    assert "| \\|ΔP(collision)\\|, contested pairs [1] | 0.300 |" in md
    preds["latent"]["collision_prob_gap_contested"] = None
    (run / "assess.json").write_text(
        json.dumps({"predictors": preds, "contested": {**contested, "states": 0, "pairs": 0}})
    )
    build_report(run)
    md = (run / "report.md").read_text(encoding="utf-8")
    assert "0 pairs in all: none, so the contested gap is not measured" in md

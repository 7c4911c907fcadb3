"""``skymoments compare`` against a real SQLite store holding a fake sweep.

The sweep is made with ``skymoments.tracking``: a parent run and three children, each with
params, metrics, ``calibration/arrays.npz`` and (except one) ``maps/grid.png``; one child
FAILED. The two finished children disagree on purpose: job0 is the better calibrated
(smaller calibration_score), job1 has the smaller ``eval/mse_B``.
"""

from __future__ import annotations

import base64
import html.parser
import os
import shutil
import struct
import subprocess
import sys
import uuid
from pathlib import Path

import numpy as np
import pytest

from skymoments.calibration.metrics import COVERAGE_LEVELS, coverage_curve
from skymoments.compare import (
    ReportInputs,
    build_comparison,
    compare_runs,
    render_html,
    resolve_objective,
    select_runs,
    write_html,
)
from skymoments.compare.artifacts import _curves_from
from skymoments.tracking import download_artifact, find_runs, get_run, tracked_run
from skymoments.tracking.settings import settings_from

EXPERIMENT = "fakesweep"
CHROMIUM = "/usr/bin/chromium"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
Z_EDGES = np.linspace(-5.0, 5.0, 41)

# name, model choice, width, lr, z std of its (fake) validation z, mse_B, calib scores, fails,
# has a map grid
JOBS = [
    ("job0", "unet", 16, 0.01, 1.0, 2.0, (0.05, 0.07), False, True),
    ("job1", "resnet", 32, 0.001, 1.4, 1.0, (0.20, 0.30), False, False),
    ("job2", "unet", 16, 0.1, 1.0, 9.0, (0.5, 0.5), True, True),
]


def tracking_node(root: Path, experiment: str = EXPERIMENT) -> dict:
    return {
        "kind": "local",
        "root": str(root),
        "uri": None,
        "artifact_location": None,
        "experiment": experiment,
        "register_as": None,
    }


def write_grid_png(path: Path, seed: int) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rng = np.random.default_rng(seed)
    fig, axes = plt.subplots(1, 2, figsize=(4, 2))
    for ax in axes:
        ax.imshow(rng.normal(size=(16, 16)), cmap="RdBu_r")
        ax.set_axis_off()
    fig.savefig(path, format="png", dpi=60)
    plt.close(fig)
    return path


def write_arrays(path: Path, z_std: float, seed: int) -> Path:
    """Calibration arrays of a fake run whose z is N(0, z_std^2) (seeded)."""
    rng = np.random.default_rng(seed)
    arrays = {"coverage_levels": COVERAGE_LEVELS, "z_hist_edges": Z_EDGES}
    for c in "EB":
        z = rng.normal(0.0, z_std, size=4000)
        arrays[f"coverage_{c}"] = coverage_curve(z, COVERAGE_LEVELS)
        arrays[f"z_hist_{c}"] = np.histogram(z, bins=Z_EDGES, density=True)[0]
    np.savez(path, **arrays)
    return path


def make_fake_sweep(root: Path, work: Path) -> dict:
    """A parent run and the three children of JOBS in a fresh store under ``root``."""
    settings = settings_from(tracking_node(root))
    sweep_id = uuid.uuid4().hex[:12]
    ids = {}
    with tracked_run(
        settings,
        run_name="sweep fake",
        tags={"skymoments.run_kind": "sweep", "skymoments.sweep_id": sweep_id},
    ) as parent:
        ids["parent"] = parent.run_id
    for k, (name, model, width, lr, z_std, mse_b, scores, fails, grid) in enumerate(JOBS):
        tags = {
            "mlflow.parentRunId": ids["parent"],
            "skymoments.sweep_id": sweep_id,
            "skymoments.run_kind": "sweep-job",
            "skymoments.overrides": f"model={model} train.lr={lr}",
        }
        try:
            with tracked_run(settings, run_name=name, tags=tags) as run:
                ids[name] = run.run_id
                run.log_params(
                    {
                        "seed": 0,
                        "patch.npix": 32,
                        "model.mean._target_": f"skymoments.nets.{model}",
                        "model.mean.width": width,
                        "train.lr": lr,
                        "tracking.root": str(root),
                    }
                )
                if fails:
                    raise RuntimeError("diverged on purpose")
                metrics = {"eval/mse_B": mse_b, "eval/mse_E": 0.5 * mse_b}
                for c, score in zip("EB", scores, strict=True):
                    metrics.update(
                        {
                            f"calib/score_{c}": score,
                            f"calib/z_mean_{c}": 0.01 * (k + 1),
                            f"calib/z_std_{c}": z_std,
                            f"calib/cov68_{c}": 0.68 / z_std,
                            f"calib/cov95_{c}": 0.95,
                            f"calib/ks_{c}": 0.02 * (k + 1),
                            f"eval/mse_ratio_wiener_{c}": 0.8 + 0.1 * k,
                        }
                    )
                run.log_metrics(metrics)
                folder = work / name
                folder.mkdir(parents=True)
                run.log_artifact(write_arrays(folder / "arrays.npz", z_std, k), "calibration")
                if grid:
                    run.log_artifact(write_grid_png(folder / "grid.png", k), "maps")
        except RuntimeError:
            pass
    return {"root": root, "ids": ids, "sweep_id": sweep_id}


@pytest.fixture(scope="module")
def sweep(tmp_path_factory):
    base = tmp_path_factory.mktemp("compare-store")
    return make_fake_sweep(base / "store", base / "work")


def test_fake_sweep_is_as_intended(sweep):
    runs = find_runs(tracking_node(sweep["root"]), parent_run_id=sweep["ids"]["parent"])
    assert {r.name: r.status for r in runs} == {
        "job0": "FINISHED",
        "job1": "FINISHED",
        "job2": "FAILED",
    }


def test_sweep_selected_by_parent_id_or_sweep_id_without_the_parent(sweep):
    node = tracking_node(sweep["root"], experiment="some-other-name")
    by_run = select_runs(node, sweep=sweep["ids"]["parent"])
    by_tag = select_runs(node, sweep=sweep["sweep_id"])
    names = [r.name for r in by_run.runs]
    assert names == ["job0", "job1", "job2"]
    assert [r.run_id for r in by_tag.runs] == [r.run_id for r in by_run.runs]
    assert by_run.parent.run_id == sweep["ids"]["parent"]
    assert by_run.experiment_name == EXPERIMENT  # the parent's, not the config's


@pytest.fixture(scope="module")
def sweep_report(sweep, tmp_path_factory):
    """One full comparison of the sweep by eval/mse_B, logged to its parent run."""
    out = tmp_path_factory.mktemp("compare-report") / "report.html"
    result = compare_runs(
        tracking_node(sweep["root"]), sweep=sweep["ids"]["parent"], objective="eval/mse_B", out=out
    )
    return result


def test_sweep_report_ranks_degrades_and_is_logged_to_the_parent(sweep, sweep_report, tmp_path):
    comp = sweep_report.comparison
    ids = sweep["ids"]
    assert [(e.run.name, e.rank) for e in comp.entries] == [
        ("job1", 1),
        ("job0", 2),
        ("job2", None),
    ]
    assert {p.key for p in comp.params} == {"model", "train.lr"}
    model = next(p for p in comp.params if p.key == "model")
    assert set(model.aliases) == {"model.mean._target_", "model.mean.width"}

    text = sweep_report.report_path.read_text()
    for name in ("job0", "job1", "job2"):
        assert f'data-run-id="{ids[name]}"' in text
    assert "status-FAILED" in text and "diverged on purpose" in text
    # job1 is best here and has no map grid: the report says so instead of failing.
    assert f"Map grid not available for run {ids['job1']}" in text
    assert "<script" not in text and "http://" not in text and "https://" not in text
    images = [base64.b64decode(s) for s in _data_uris(text)]
    # Two params, z histograms, coverage, and one map grid (the worst run's).
    assert len(images) == 5 and all(i.startswith(PNG_MAGIC) for i in images)

    assert sweep_report.logged_run_id == ids["parent"]
    parent = get_run(tracking_node(sweep["root"]), ids["parent"])
    assert parent.tags["skymoments.compare.best_run"] == ids["job1"]
    local = download_artifact(
        tracking_node(sweep["root"]), ids["parent"], "compare/report.html", tmp_path / "dl"
    )
    assert local.read_bytes() == sweep_report.report_path.read_bytes()


def test_both_directions_and_calibration_score(sweep):
    selection = select_runs(tracking_node(sweep["root"]), sweep=sweep["ids"]["parent"])
    calib = build_comparison(selection, resolve_objective("calibration_score"))
    # job0's logged scores (0.05, 0.07) average 0.06; job1's (0.2, 0.3) 0.25.
    assert [(e.run.name, e.value) for e in calib.ranked] == [
        ("job0", pytest.approx(0.06)),
        ("job1", pytest.approx(0.25)),
    ]
    worst_first = build_comparison(selection, resolve_objective("eval/mse_B", "max"))
    assert [e.run.name for e in worst_first.ranked] == ["job0", "job1"]
    assert worst_first.unranked[0].run.name == "job2"


def test_experiment_and_filter_log_to_a_new_compare_run(sweep, tmp_path):
    node = tracking_node(sweep["root"])
    first = compare_runs(node, experiment=EXPERIMENT, out=tmp_path / "e.html")
    logged = get_run(node, first.logged_run_id)
    assert logged.name == "compare" and logged.status == "FINISHED"
    assert logged.tags["skymoments.run_kind"] == "compare"
    assert (tmp_path / "e.html").is_file()
    # Neither the sweep parent nor the compare run is compared itself.
    again = select_runs(node, experiment=EXPERIMENT)
    assert sorted(r.name for r in again.runs) == ["job0", "job1", "job2"]
    one = select_runs(node, filter_string="params.`train.lr` = '0.001'")
    assert [r.name for r in one.runs] == ["job1"]
    comp = build_comparison(one, resolve_objective("eval/mse_B"))
    assert comp.params == []
    assert "No param varies" in render_html(comp, ReportInputs())


def test_clear_errors_name_what_was_searched_and_where(sweep, tmp_path):
    node = tracking_node(sweep["root"])
    missing_root = tmp_path / "no-store-here"
    with pytest.raises(ValueError, match="no tracking store at .*no-store-here"):
        select_runs(tracking_node(missing_root))
    assert not missing_root.exists()  # refused before MLflow could create an empty store
    with pytest.raises(ValueError, match="no experiment named 'nope'"):
        select_runs(node, experiment="nope")
    with pytest.raises(ValueError, match="no sweep 'abc123' in sqlite"):
        select_runs(node, sweep="abc123")
    with pytest.raises(ValueError, match="not a run id or sweep id"):
        select_runs(node, sweep="x' or '1'='1")
    with pytest.raises(ValueError, match=r"nothing to compare: experiment 'fakesweep', filter"):
        select_runs(node, filter_string="params.`train.lr` = '42'")
    with pytest.raises(ValueError, match="not a valid MLflow search filter"):
        select_runs(node, filter_string="params.train.lr ~~ 3")
    with pytest.raises(ValueError, match="should name an .html file"):
        write_html("<html></html>", tmp_path / "r.txt")


def test_missing_arrays_become_notes():
    class Arrays(dict):
        @property
        def files(self):
            return list(self)

    partial = _curves_from(Arrays(coverage_levels=COVERAGE_LEVELS))
    assert not partial.has_coverage and not partial.has_z_hist
    assert any("coverage_E" in n for n in partial.notes)
    assert any("z_hist_edges" in n for n in partial.notes)


def _cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "COLUMNS": "200"}
    for key in ("SKYMOMENTS_PARENT_RUN_ID", "SKYMOMENTS_SWEEP_DIR", "SKYMOMENTS_RUN_ID"):
        env.pop(key, None)
    # The timeout only guards against a hung child process; nothing is asserted about time.
    return subprocess.run(
        [sys.executable, "-m", "skymoments.cli", "compare", *args],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
    )


@pytest.mark.slow
def test_cli_reads_the_sweep_back_from_a_second_process(sweep, tmp_path):
    done = _cli(
        f"compare.sweep={sweep['ids']['parent']}",
        f"tracking.root={sweep['root']}",
        "compare.objective=calibration_score",
        cwd=tmp_path,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    assert "job0" in done.stdout and "job1" in done.stdout and "FAILED" in done.stdout
    assert "not ranked: job2 (status FAILED)" in done.stdout
    reports = list((tmp_path / "outputs").rglob("compare.html"))  # default: the job folder
    assert len(reports) == 1 and 'class="run ranked best"' in reports[0].read_text()
    missing = _cli(f"tracking.root={tmp_path / 'absent'}", cwd=tmp_path)
    assert missing.returncode != 0
    assert "no tracking store at" in missing.stderr + missing.stdout


def _data_uris(text: str) -> list[str]:
    class Images(html.parser.HTMLParser):
        def __init__(self):
            super().__init__()
            self.sources: list[str] = []

        def handle_starttag(self, tag, attrs):
            if tag == "img":
                self.sources.append(dict(attrs).get("src", ""))

    parser = Images()
    parser.feed(text)
    prefix = "data:image/png;base64,"
    assert all(s.startswith(prefix) for s in parser.sources)
    return [s[len(prefix) :] for s in parser.sources]


class _Rows(html.parser.HTMLParser):
    def __init__(self):
        super().__init__()
        self.run_rows: list[str] = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "tr" and "run" in (attrs.get("class") or "").split():
            self.run_rows.append(attrs.get("data-run-id", ""))


def _png_size(data: bytes) -> tuple[int, int]:
    # PNG spec: the 8-byte signature, then the IHDR chunk whose data starts with width and
    # height as big-endian 32-bit integers (bytes 16..24 of the file).
    assert data.startswith(PNG_MAGIC) and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def _chromium(*args: str, profile: Path) -> subprocess.CompletedProcess:
    flags = [
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={profile}",
    ]
    # The timeout only guards against a hung browser; nothing is asserted about time.
    return subprocess.run([CHROMIUM, *flags, *args], capture_output=True, text=True, timeout=300)


@pytest.mark.slow
@pytest.mark.skipif(
    not Path(CHROMIUM).exists(),
    reason="needs Debian's chromium at /usr/bin/chromium (apt-get install chromium; CI has it)",
)
def test_headless_chromium_renders_the_table_and_figures(sweep_report, tmp_path):
    out = sweep_report.report_path
    dom = _chromium("--dump-dom", out.as_uri(), profile=tmp_path / "profile-dom")
    assert dom.returncode == 0, dom.stderr[-2000:]
    rows = _Rows()
    rows.feed(dom.stdout)
    assert sorted(rows.run_rows) == sorted(e.run.run_id for e in sweep_report.comparison.entries)
    images = [base64.b64decode(s) for s in _data_uris(dom.stdout)]
    # Two params, z histograms, coverage, the worst run's map grid (the best's is missing).
    assert len(images) == 5
    assert all(min(_png_size(i)) > 0 for i in images)

    shot = tmp_path / "shot.png"
    done = _chromium(
        f"--screenshot={shot}",
        "--window-size=1200,2400",
        "--hide-scrollbars",
        out.as_uri(),
        profile=tmp_path / "profile-shot",
    )
    assert done.returncode == 0 and shot.is_file(), done.stderr[-2000:]
    import matplotlib.image

    pixels = matplotlib.image.imread(shot)[..., :3]
    # Non-blank: a white page has one colour; the table, text and figures give many, and
    # a sizeable fraction of pixels that are not background.
    assert len(np.unique(pixels.reshape(-1, 3), axis=0)) > 50
    assert np.mean(np.any(pixels < 0.9, axis=-1)) > 0.02
    shutil.rmtree(tmp_path / "profile-dom", ignore_errors=True)


def test_command_composes_from_conf_and_refuses_a_sweep_id_read_as_a_number(sweep, tmp_path):
    from hydra import compose, initialize_config_dir

    from skymoments.commands.compare import compare
    from skymoments.config import conf_dir

    overrides = [f"tracking.root={sweep['root']}", f"compare.out={tmp_path / 'c.html'}"]
    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        cfg = compose("compare", overrides=[*overrides, "compare.sweep=123e4567"])
        numeric = compose("compare", overrides=[*overrides, "compare.sweep='123e4567'"])
    assert cfg.compare.objective == "eval/mse_B"  # the study's objective by default
    with pytest.raises(ValueError, match="read by Hydra as the float"):
        compare(cfg)
    with pytest.raises(ValueError, match="no sweep '123e4567'"):
        compare(numeric)

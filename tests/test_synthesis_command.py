"""`skymoments synthesize` writes the documented bank and tracks the run."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest


def _filaments_image(n=32, seed=3):
    from skymoments.maps.geometry import FlatPatch
    from skymoments.sky.foregrounds import make_foreground

    return make_foreground("filaments").draw(FlatPatch(n, 3.0), np.random.default_rng(seed), 1)[0]


@pytest.mark.slow
def test_synthesize_writes_bank_and_reuses_it(tmp_path):
    np.save(tmp_path / "img.npy", _filaments_image())
    args = [
        sys.executable, "-m", "skymoments.cli", "synthesize",
        f"synthesis.image={tmp_path / 'img.npy'}", "synthesis.n_images=3",
        f"synthesis.out={tmp_path / 'banks'}", "synthesis.max_iter=10", "synthesis.n_scales=4",
        "synthesis.threads=1", "patch=flat32", f"tracking.root={tmp_path / 'runs'}",
    ]  # fmt: skip
    proc = subprocess.run(args, cwd=tmp_path, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    npz = list((tmp_path / "banks").glob("bank-*.npz"))
    assert len(npz) == 1
    with np.load(npz[0]) as f:
        assert f["images"].shape == (3, 2, 32, 32)
    meta = json.loads(npz[0].with_suffix(".json").read_text())
    assert meta["settings"]["n_images"] == 3 and meta["source"].endswith("img.npy")
    assert "synth/ks_pix" in proc.stderr and "perf/synthesis_s_per_image" in proc.stderr
    # The same command again reuses the bank.
    proc = subprocess.run(args, cwd=tmp_path, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "reused" in proc.stderr
    assert len(list((tmp_path / "banks").glob("bank-*.npz"))) == 1


@pytest.mark.slow
def test_bad_setting_is_refused_before_work(tmp_path):
    np.save(tmp_path / "img.npy", _filaments_image())
    args = [
        sys.executable, "-m", "skymoments.cli", "synthesize",
        f"synthesis.image={tmp_path / 'img.npy'}", "synthesis.n_scales=9", "patch=flat32",
        f"synthesis.out={tmp_path / 'banks'}", f"tracking.root={tmp_path / 'runs'}",
    ]  # fmt: skip
    proc = subprocess.run(args, cwd=tmp_path, capture_output=True, text=True, timeout=600)
    assert proc.returncode != 0
    assert "2^n_scales" in proc.stderr
    assert not (tmp_path / "banks").exists() or not list((tmp_path / "banks").glob("*.npz"))


def test_synthesis_progress_prints_plain_lines_when_not_a_terminal():
    import io

    from rich.console import Console

    from skymoments.synthesis.pipeline import progress_bar

    buf = io.StringIO()
    console = Console(file=buf, force_terminal=False, width=200)
    with progress_bar(120, console=console) as progress:
        for stage in ("coarse", "fine"):
            for it in range(1, 121):
                progress(
                    {
                        "iteration": it,
                        "max_iter": 120,
                        "batch": 0,
                        "n_batches": 2,
                        "loss": 1.0 / it,
                        "stage": stage,
                    }
                )
        # The closing call (the mean over every image) is its own line, not another batch's.
        progress(
            {
                "iteration": 120,
                "max_iter": 120,
                "batch": 2,
                "n_batches": 2,
                "loss": 0.25,
                "n_images": 16,
                "stage": "done",
            }
        )
    lines = buf.getvalue().splitlines()
    # One line at the start of each stage, every 50 iterations and at the last: 1, 50,
    # 100, 120 per stage, then the closing line; no bar control characters in a log file.
    assert len(lines) == 9
    assert lines[0].startswith("synthesis batch 1/2 (half resolution): iter 1/120")
    assert lines[-2].startswith("synthesis batch 1/2: iter 120/120, loss 0.008333")
    assert lines[-1].startswith("synthesis done: 16 maps, mean loss 0.25")
    assert "\x1b" not in buf.getvalue()

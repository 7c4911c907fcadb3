"""`skymoments simulate` writes the documented .npz, a PNG and a summary."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from skymoments.cli import main as cli_main

DOCUMENTED = ("signal_qu", "signal_eb", "foreground_qu", "noise_qu", "data_qu", "params")


def _skymoments(*args: str, cwd) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "skymoments.cli", *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=600)


@pytest.mark.slow
def test_simulate_quickstart_writes_the_documented_npz(tmp_path):
    out = tmp_path / "sim"
    proc = _skymoments("simulate", "experiment=quickstart", "n=8", f"out={out}", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]
    with np.load(out / "simulation.npz") as f:
        for key in DOCUMENTED:
            assert key in f.files, key
        for key in DOCUMENTED[:-1]:
            assert f[key].shape == (8, 2, 64, 64), key
        assert f["params"].shape[0] == 8
        assert int(f["npix"]) == 64 and float(f["pixel_arcmin"]) == 3.0
        # The data are the sum of their parts (signal + foreground + noise; no beam here).
        np.testing.assert_allclose(
            f["data_qu"], f["signal_qu"] + f["foreground_qu"] + f["noise_qu"], atol=1e-9
        )
    assert (out / "simulation.png").stat().st_size > 0
    assert "foreground / signal power" in proc.stdout
    assert "rms" in proc.stdout


def test_bad_value_fails_before_work_with_the_key(tmp_path):
    proc = _skymoments("simulate", "patch.pixel_arcmin=-1", f"out={tmp_path}", cwd=tmp_path)
    assert proc.returncode != 0
    assert "patch.pixel_arcmin" in proc.stderr
    assert not (tmp_path / "simulation.npz").exists()


def test_unknown_subcommand_is_refused(capsys):
    assert cli_main(["transmogrify"]) == 2
    assert "unknown subcommand" in capsys.readouterr().err


def test_help_lists_subcommands(capsys):
    assert cli_main(["--help"]) == 0
    out = capsys.readouterr().out
    for sub in ("simulate", "run", "synthesize", "evaluate", "compare", "predict"):
        assert sub in out

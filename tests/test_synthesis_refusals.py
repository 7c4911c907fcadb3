"""`skymoments synthesize` refuses a bad training image before a run exists.

Each case runs the real command entry point (Hydra parses the overrides, as on the command
line) on a store that already holds a finished run, and checks: exit status 2, one line on
stderr naming the file and what to change, no traceback, no new run (so no FAILED one), and
the earlier run intact (SQLite's own PRAGMA integrity_check, sqlite.org/pragma.html).
"""

from __future__ import annotations

import contextlib
import re
import sqlite3
import sys

import mlflow
import numpy as np
import pytest
from astropy.io import fits
from omegaconf import OmegaConf

from skymoments.tracking import tracked_run

NPIX = 32


def _image(shape=(2, NPIX, NPIX), seed=0):
    return np.random.default_rng(seed).normal(size=shape) * 3.0


def _npy(path, arr):
    np.save(path, arr)
    return path


def _nan(d):
    img = _image()
    img[0, 3, 4] = np.nan
    return _npy(d / "nan.npy", img)


def _inf(d):
    img = _image()
    img[1, 0, 0] = np.inf
    return _npy(d / "inf.npy", img)


def _truncated_npy(d):
    full = _npy(d / "full.npy", _image())
    data = full.read_bytes()
    (d / "cut.npy").write_bytes(data[: len(data) // 2])
    return d / "cut.npy"


def _truncated_fits(d):
    fits.PrimaryHDU(_image()).writeto(d / "full.fits")
    data = (d / "full.fits").read_bytes()
    (d / "cut.fits").write_bytes(data[: len(data) // 2])
    return d / "cut.fits"


def _empty(d, name):
    (d / name).write_bytes(b"")
    return d / name


def _text_fits(d):
    (d / "notes.fits").write_text("Q and U maps, to be sent later\n")
    return d / "notes.fits"


CASES = {
    "nan": (_nan, r"1 NaN or infinite pixels; fill or inpaint"),
    "inf": (_inf, r"1 NaN or infinite pixels; fill or inpaint"),
    "constant": (
        lambda d: _npy(d / "flat.npy", np.ones((2, NPIX, NPIX))),
        r"constant in channel\(s\) \[0, 1\]",
    ),
    "three_channels": (
        lambda d: _npy(d / "tqu.npy", _image((3, NPIX, NPIX))),
        r"shape \(3, 32, 32\); expected \(2, n, n\)",
    ),
    "non_square": (
        lambda d: _npy(d / "rect.npy", _image((2, NPIX, NPIX // 2))),
        r"shape \(2, 32, 16\).*square",
    ),
    "empty_npy": (lambda d: _empty(d, "empty.npy"), r"is empty \(0 bytes\)"),
    "empty_fits": (lambda d: _empty(d, "empty.fits"), r"is empty \(0 bytes\)"),
    "truncated_npy": (_truncated_npy, r"is truncated or corrupt"),
    "truncated_fits": (_truncated_fits, r"is truncated: HDU 0 needs"),
    "text_as_fits": (_text_fits, r"is not a FITS file \(it holds text"),
    "wrong_size": (
        lambda d: _npy(d / "small.npy", _image((2, 16, 16))),
        r"16x16 pixels but the patch is 32x32 .*patch\.npix=16",
    ),
    "beyond_any_sky": (
        lambda d: _npy(d / "huge.npy", _image() * 1e30),
        r"values beyond 1e\+06 uK .*check the map's unit",
    ),
}


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    root = tmp_path_factory.mktemp("store")
    tracking = {"kind": "local", "root": str(root), "experiment": "synthesis"}
    with tracked_run(OmegaConf.create({"tracking": tracking}), run_name="earlier") as run:
        run.log_metrics({"synth/ks_pix": 0.5})
    return root, run.run_id


def _query(db, sql):
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        return con.execute(sql).fetchall()


def _runs(root):
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    return client.search_runs([e.experiment_id for e in client.search_experiments()])


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_training_image_is_refused_before_a_run(case, store, tmp_path, monkeypatch, capsys):
    from skymoments.commands.synthesize import main

    root, earlier = store
    make, message = CASES[case]
    path = make(tmp_path)
    before = {r.info.run_id: r.info.status for r in _runs(root)}
    monkeypatch.chdir(tmp_path)
    argv = [
        "skymoments-synthesize",
        f"synthesis.image={path}",
        f"patch.npix={NPIX}",
        f"synthesis.out={tmp_path / 'banks'}",
        f"tracking.root={root}",
        "tracking.experiment=synthesis",
    ]
    monkeypatch.setattr(sys, "argv", argv)
    with pytest.raises(SystemExit) as exit_info:
        main()
    assert exit_info.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert str(path) in err
    assert re.search(message, err), err
    # Nothing was started and nothing tracked was touched.
    assert {r.info.run_id: r.info.status for r in _runs(root)} == before
    assert before[earlier] == "FINISHED"
    assert _query(root / "mlflow.db", "PRAGMA integrity_check") == [("ok",)]
    assert not (tmp_path / "banks").exists()

"""A store this user cannot write is still read, and a write to it is refused in one line.

Permission bits do not bind root, so when the tests run as root (CI does) the commands run
under ``setpriv`` without the capabilities that override them (CAP_DAC_OVERRIDE,
CAP_DAC_READ_SEARCH): root then meets the same read-only store as any other user.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import sqlite3
import stat
import subprocess
import sys
from pathlib import Path

import pytest
from omegaconf import OmegaConf

pytestmark = pytest.mark.slow

SETPRIV = shutil.which("setpriv")
NO_OVERRIDE = "-dac_override,-dac_read_search"


def _as_plain_user(cmd: list[str]) -> list[str]:
    if os.geteuid() != 0:
        return cmd
    if SETPRIV is None:
        pytest.skip("running as root without setpriv: a read-only store cannot be made")
    return [SETPRIV, f"--inh-caps={NO_OVERRIDE}", f"--bounding-set={NO_OVERRIDE}", *cmd]


def _cli(cwd: Path, *args: str) -> subprocess.CompletedProcess:
    cmd = _as_plain_user([sys.executable, "-m", "skymoments.cli", *args])
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)


def _snapshot(root: Path) -> dict[str, tuple[int, int]]:
    """Every file of the store with its size and modification time."""
    return {
        str(p.relative_to(root)): (p.stat().st_size, p.stat().st_mtime_ns)
        for p in sorted(root.rglob("*"))
    }


def _set_writable(root: Path, writable: bool) -> None:
    for path in [root, *root.rglob("*")]:
        mode = path.stat().st_mode
        if writable:
            path.chmod(mode | stat.S_IWUSR)
        else:
            path.chmod(mode & ~(stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH))


@pytest.fixture
def read_only_store(tmp_path):
    """A store with a FINISHED and a FAILED run, then made read-only (restored afterwards)."""
    from skymoments.tracking import tracked_run

    root = tmp_path / "store"
    cfg = OmegaConf.create(
        {"tracking": {"kind": "local", "root": str(root), "experiment": "shared"}}
    )
    with tracked_run(cfg, run_name="good") as good:
        good.log_metrics({"eval/mse_B": 1.0})
        good.log_text("kept", "notes/kept.txt")
    with contextlib.suppress(RuntimeError), tracked_run(cfg, run_name="broken") as broken:
        raise RuntimeError("a failed job")
    before = {good.run_id: "FINISHED", broken.run_id: "FAILED"}
    _set_writable(root, False)
    try:
        yield root, before
    finally:
        _set_writable(root, True)


def test_read_only_store_is_read_and_writes_are_refused_in_one_line(read_only_store, tmp_path):
    root, before = read_only_store
    files = _snapshot(root)
    work = tmp_path / "work"
    work.mkdir()
    track = f"tracking.root={root}"

    compare = _cli(
        work, "compare", track, "compare.experiment=shared", "compare.log_report=false",
        f"compare.out={work / 'compare.html'}",
    )  # fmt: skip
    assert compare.returncode == 0, compare.stderr[-3000:]
    for run_id in before:
        assert run_id[:8] in compare.stdout
    # The store is named as one that cannot be written, and read all the same.
    assert f"{root / 'mlflow.db'} cannot be written; reading a copy of it" in (
        compare.stdout + compare.stderr
    )

    settle = _cli(work, "settle", track)
    assert settle.returncode == 0, settle.stderr[-3000:]
    assert "0 lost" in settle.stdout

    refused = f"skymoments: the tracking store {root / 'mlflow.db'} cannot be written"
    for args in (
        ("run", "experiment=smoke", track),  # refused before any work
        ("compare", track, "compare.experiment=shared", f"compare.out={work / 'c2.html'}"),
        ("settle", track, "settle.mark=true"),
    ):
        proc = _cli(work, *args)
        assert proc.returncode == 2, (args, proc.stderr[-3000:])
        last = proc.stderr.strip().splitlines()[-1]
        assert last.startswith(refused), (args, proc.stderr[-3000:])
        assert "Traceback" not in proc.stderr

    # Nothing in the store changed: same files, same sizes and times, same runs.
    assert _snapshot(root) == files
    with contextlib.closing(sqlite3.connect(f"file:{root / 'mlflow.db'}?mode=ro", uri=True)) as con:
        assert con.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        rows = dict(con.execute("SELECT run_uuid, status FROM runs").fetchall())
    assert rows == before


def test_a_missing_store_in_a_read_only_folder_is_named(tmp_path):
    folder = tmp_path / "locked"
    folder.mkdir()
    _set_writable(folder, False)
    try:
        proc = _cli(tmp_path, "settle", f"tracking.root={folder}")
    finally:
        _set_writable(folder, True)
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert proc.stderr.strip().splitlines()[-1].startswith("skymoments: no tracking store at")
    assert list(folder.iterdir()) == []

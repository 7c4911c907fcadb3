"""Bank metadata that is valid JSON but not an object is untrusted: the bank is rebuilt."""

from __future__ import annotations

import contextlib
import json
import sqlite3
import subprocess
import sys

import numpy as np
import pytest

from skymoments.synthesis.bank import ensure_bank, load_bank
from skymoments.synthesis.synthesize import SynthesisSettings

TINY = SynthesisSettings(
    n_images=2, n_scales=2, n_orientations=2, max_iter=3, batch=2, scale_reach=1, tol=0.0
)


def _image(seed=0, n=16):
    """A seeded smooth Q/U image."""
    rng = np.random.default_rng(seed)
    k = np.hypot(*np.meshgrid(np.fft.fftfreq(n), np.fft.fftfreq(n), indexing="ij"))
    return np.fft.ifft2(
        np.fft.fft2(rng.standard_normal((2, n, n))) * np.exp(-((k / 0.15) ** 2))
    ).real


@pytest.mark.parametrize("text", ["[1, 2]", "3", '"bank"', "null", "true"])
def test_non_object_metadata_is_refused_and_the_bank_rebuilt(tmp_path, text):
    img = _image()
    npz, images, meta = ensure_bank(img, TINY, tmp_path, seed=1)
    meta_path = npz.with_suffix(".json")
    meta_path.write_text(text)
    kind = type(json.loads(text)).__name__
    with pytest.raises(ValueError, match=f"holds a JSON {kind}, not an object; rebuild"):
        load_bank(npz)
    npz2, images2, meta2 = ensure_bank(img, TINY, tmp_path, seed=1)
    assert npz2 == npz and meta2["reused"] is False
    # Same image, settings and seed: the rebuilt bank is the same synthesis, bit for bit.
    np.testing.assert_array_equal(images2, images)
    assert isinstance(json.loads(meta_path.read_text()), dict)
    assert load_bank(npz)[1]["key"] == meta["key"]


@pytest.mark.slow
def test_synthesize_rebuilds_a_bank_whose_metadata_is_a_list(tmp_path):
    root, banks = tmp_path / "store", tmp_path / "banks"
    args = (
        "synthesize", "experiment=smoke", f"synthesis.out={banks}", f"tracking.root={root}",
    )  # fmt: skip
    cmd = [sys.executable, "-m", "skymoments.cli", *args]
    first = subprocess.run(cmd, cwd=tmp_path, capture_output=True, text=True)
    assert first.returncode == 0, first.stderr[-3000:]
    (meta_path,) = banks.glob("bank-*.json")
    meta_path.write_text("[]")
    second = subprocess.run(cmd, cwd=tmp_path, capture_output=True, text=True)
    assert second.returncode == 0, second.stderr[-3000:]
    with contextlib.closing(sqlite3.connect(f"file:{root / 'mlflow.db'}?mode=ro", uri=True)) as con:
        assert con.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        runs = con.execute("SELECT run_uuid, status FROM runs ORDER BY start_time").fetchall()
        params = {
            (run, key): value
            for run, key, value in con.execute("SELECT run_uuid, key, value FROM params")
        }
    assert [status for _, status in runs] == ["FINISHED", "FINISHED"]
    (first_id, _), (second_id, _) = runs
    # The same bank (same image, settings and seed) was built again, not reused.
    key = meta_path.stem.removeprefix("bank-")
    assert params[(first_id, "synthesis.bank_key")] == key
    assert params[(second_id, "synthesis.bank_key")] == key
    assert params[(first_id, "synthesis.reused")] == "false"
    assert params[(second_id, "synthesis.reused")] == "false"
    assert isinstance(json.loads(meta_path.read_text()), dict)

"""skymoments.heap: the malloc settings are applied once, on glibc only, and can be turned off."""

from __future__ import annotations

import os
import platform
import subprocess
import sys

import pytest

PROBE = "from skymoments.heap import keep_freed_memory as k; print(k(), k())"


def _probe(**env) -> str:
    run = subprocess.run(
        [sys.executable, "-c", PROBE], env={**os.environ, **env}, capture_output=True, text=True
    )
    assert run.returncode == 0, run.stderr
    return run.stdout.strip()


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="mallopt(3) is glibc's")
def test_settings_apply_once_on_glibc():
    # mallopt(3) returns 1 on success: both settings took, and a second call reports the same.
    assert _probe(SKYMOMENTS_KEEP_HEAP="1") == "True True"


def test_settings_can_be_turned_off():
    assert _probe(SKYMOMENTS_KEEP_HEAP="0") == "False False"

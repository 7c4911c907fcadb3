"""The README's two commands and .ci/run stay in sync."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _bash_blocks(text: str) -> list[str]:
    return [b.strip() for b in re.findall(r"```bash\n(.*?)```", text, flags=re.S)]


def test_readme_gives_the_main_job_and_the_test_command_first():
    blocks = _bash_blocks((ROOT / "README.md").read_text())
    main_job, tests = blocks[0], blocks[1]
    assert main_job.startswith("bash .ci/setup && ") and "experiment=quickstart" in main_job
    assert tests.startswith("bash .ci/setup") and "pytest" in tests


def test_ci_runs_the_readme_test_command():
    readme_tests = _bash_blocks((ROOT / "README.md").read_text())[1]
    setup_cmd, test_cmd = (part.strip() for part in readme_tests.split("&&", 1))
    ci = (ROOT / ".ci" / "run").read_text()
    assert setup_cmd in ci
    assert test_cmd in ci

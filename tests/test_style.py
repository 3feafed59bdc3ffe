"""The code base is ruff-clean (the project's lint settings in pyproject.toml)."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


def test_ruff_clean() -> None:
    ruff = shutil.which("ruff") or str(Path(sys.executable).parent / "ruff")
    if not Path(ruff).exists():
        pytest.fail("ruff is not installed (it is part of the test extras)")
    res = subprocess.run(
        [ruff, "check", "src", "tests", "benchmarks"],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert res.returncode == 0, res.stdout + res.stderr

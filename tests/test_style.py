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


def test_safety_rules() -> None:
    """YAML is only safe-loaded; no shell is ever handed a string (rules use script:)."""
    sources = list((REPO / "src").rglob("*.py")) + list((REPO / "workflow").rglob("*.smk"))
    sources += [REPO / "Snakefile", *(REPO / "workflow/scripts").glob("*.py")]
    for path in sources:
        text = path.read_text()
        assert "yaml.load(" not in text and "yaml.unsafe_load" not in text, path
        assert "shell=True" not in text and "os.system(" not in text, path
        assert "\n    shell:" not in text and "\n        shell:" not in text, path


def test_rule_scripts_are_thin() -> None:
    """Each workflow script calls one package function."""
    for script in (REPO / "workflow/scripts").glob("*.py"):
        code = [ln for ln in script.read_text().splitlines() if ln.strip()]
        assert code[0] == "from lesprep.jobs.steps import run", script
        assert len(code) == 2 and code[1].startswith("run("), script

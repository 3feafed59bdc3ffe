"""Shared fixtures: small synthetic demo archives and their canonical stores."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from lesprep.config import load_config
from lesprep.demo import DEMO_CASES, write_demo_case

REPO = Path(__file__).resolve().parents[1]
SMALL = {"nx": 24, "ny": 24, "nz": 24, "ntimes": 5}
VARMAPS = {
    "alpha": REPO / "config/varmaps/flavour-alpha.yaml",
    "beta": REPO / "config/varmaps/flavour-beta.yaml",
}


@pytest.fixture(scope="session")
def small_specs():
    """The demo cases at a small test size (24 x 24 x 24, 5 output times)."""
    return {c.case: c.with_size(**SMALL) for c in DEMO_CASES}


@pytest.fixture(scope="session")
def demo_root(tmp_path_factory, small_specs) -> Path:
    """Every demo case written once per test session (read-only for the tests)."""
    root = tmp_path_factory.mktemp("demo")
    for spec in small_specs.values():
        write_demo_case(spec, root)
    return root


@pytest.fixture(scope="session")
def repo_config():
    """The repository's default config, validated and default-filled."""
    return load_config(REPO / "config/config.yaml")


@pytest.fixture
def case_copy(tmp_path, demo_root):
    """Copy one demo case into tmp_path so a test may damage it."""

    def _copy(case: str) -> Path:
        dst = tmp_path / "raw" / case
        shutil.copytree(demo_root / case, dst)
        return dst

    return _copy

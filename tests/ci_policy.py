"""What a test does when something it needs is missing: skip outside CI, fail in CI."""

from __future__ import annotations

import os

import pytest


def unavailable(reason: str) -> None:
    """Skip outside CI; fail in CI (``CI=true``), where SLURM must be there."""
    if os.environ.get("CI") == "true":
        pytest.fail(f"SLURM tests cannot run in CI: {reason}", pytrace=False)
    pytest.skip(reason)

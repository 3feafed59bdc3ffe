"""lesprep: turn large-eddy-simulation archives into multi-scale training data."""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]

"""Compiled kernels when numba is importable, and the choice between the two engines.

Every compiled kernel in lesprep has a plain-numpy twin that is the reference: the tests
run both and compare them. ``engine="auto"`` uses numba when it can be imported (it is a
declared dependency), ``"numpy"`` forces the reference path.
"""

from __future__ import annotations

import os
from typing import Literal

from lesprep.errors import ConfigError

# numba's OpenMP threading layer lets idle workers spin after every parallel kernel by
# default. lesprep launches hundreds of short kernels per slab while its I/O threads
# compress and decompress on the same cores, so spinning workers steal those cores
# (measured: about 10 CPU-s of a 60 s coarsening on 2 cores). Workers that sleep at once
# cost a wake-up per launch instead. Set before the layer is loaded; a value the user
# gave wins.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

try:  # numba is a declared dependency; fall back to numpy if it cannot be imported
    from numba import njit, prange

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover - exercised only where numba is missing
    HAVE_NUMBA = False
    njit = None  # type: ignore[assignment]
    prange = range  # type: ignore[assignment]

Engine = Literal["auto", "numba", "numpy"]

__all__ = ["HAVE_NUMBA", "Engine", "njit", "prange", "resolve_engine"]


def resolve_engine(engine: str) -> str:
    """``"numba"`` or ``"numpy"`` for an engine request (``"auto"`` picks numba if present).

    Raises
    ------
    ConfigError
        For an unknown engine, or ``"numba"`` when numba cannot be imported.
    """
    if engine == "auto":
        return "numba" if HAVE_NUMBA else "numpy"
    if engine == "numba":
        if not HAVE_NUMBA:
            raise ConfigError(
                "engine 'numba' was requested but numba cannot be imported",
                hint="install numba or use engine='auto' or 'numpy'",
            )
        return "numba"
    if engine == "numpy":
        return "numpy"
    raise ConfigError(f"engine {engine!r} is not one of 'auto', 'numba', 'numpy'")

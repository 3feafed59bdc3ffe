"""Figures drawn without a screen and written atomically (shared by the report's figures)."""

from __future__ import annotations

import os
from pathlib import Path

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from lesprep import __version__

__all__ = ["DPI", "new_figure", "save_png"]

DPI = 120
"""Resolution of every report figure (dots per inch)."""


def new_figure(width: float, height: float) -> Figure:
    """An empty figure of ``width`` x ``height`` inches on the Agg canvas (no screen)."""
    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def save_png(fig: Figure, out_png: str | Path) -> Path:
    """Write ``fig`` as PNG into a temporary sibling and rename it to ``out_png``."""
    out = Path(out_png)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp-{os.getpid()}")
    try:
        fig.savefig(tmp, format="png", metadata={"Software": f"lesprep {__version__}"})
        os.replace(tmp, out)
    finally:
        if tmp.exists():
            tmp.unlink()
    return out

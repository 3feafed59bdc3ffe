"""Figures of the scene regimes, and the job that labels the scenes and draws them.

Three figures (PNG via matplotlib's Agg canvas without ``pyplot``, written atomically
into a temporary sibling renamed into place): the mean silhouette by k with the chosen k marked; the
descriptors of every scene, pair by pair, coloured by label; and each case's label
through time, cases grouped by split.

Conventions
-----------
* Label ``L >= 0`` is drawn in colour ``L mod 10`` of matplotlib's ``tab10`` cycle;
  clear scenes (:data:`lesprep.report.regimes.CLEAR_LABEL`) in light grey.
* Train scenes are circles, scenes of the other splits crosses (they were labelled by the
  nearest train centroid, not fitted).
* Descriptor pairs: every pair of the first (up to) four descriptors the fit kept, in
  physical units; clear scenes with a non-finite value are left out of a panel.
* Times are in hours since each case's time origin (``time_s / 3600``).
"""

from __future__ import annotations

from collections.abc import Mapping
from itertools import combinations
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from lesprep.layout import REGIME_FIGURES
from lesprep.report.canvas import new_figure, save_png
from lesprep.report.regimes import CLEAR_LABEL, descriptor_frame, read_regime_fit, write_regimes
from lesprep.report.settings import RegimeSettings

__all__ = [
    "draw_regime_figures",
    "label_colours",
    "regime_descriptors",
    "regime_silhouette",
    "regime_timeline",
    "write_regime_outputs",
]

_CLEAR_COLOUR = "0.8"
_MAX_PANELS_DESCRIPTORS = 4


def label_colours(labels: np.ndarray) -> list[Any]:
    """Colour of each label: ``tab10`` cycle for regimes, light grey for clear scenes.

    Examples
    --------
    >>> label_colours(np.array([-1, 0]))[0]
    (0.8, 0.8, 0.8, 1.0)
    """
    from matplotlib import colormaps
    from matplotlib.colors import to_rgba

    cycle = colormaps["tab10"]
    return [to_rgba(_CLEAR_COLOUR) if int(v) == CLEAR_LABEL else cycle(int(v) % 10) for v in labels]


def _label_handles(labels: pd.Series) -> list[Line2D]:
    used = sorted(int(v) for v in labels.unique())
    return [
        Line2D([], [], ls="", marker="s", color=c, label="clear" if v == CLEAR_LABEL else f"{v}")
        for v, c in zip(used, label_colours(np.array(used)), strict=True)
    ]


def regime_silhouette(fit_json: str | Path, out_png: str | Path) -> Figure:
    """Mean silhouette (Rousseeuw 1987) per k, the chosen k marked.

    Parameters
    ----------
    fit_json
        ``regimes.json`` (:func:`lesprep.report.regimes.write_regimes`).
    out_png
        Figure to write.

    Returns
    -------
    matplotlib.figure.Figure
        The figure drawn (one axes; a note instead of a curve when no k was possible).
    """
    fit = read_regime_fit(fit_json)
    scores = {int(k): float(v) for k, v in fit["silhouette"].items()}
    fig = new_figure(5.0, 3.5)
    ax = fig.add_subplot()
    if scores:
        ks = sorted(scores)
        ax.plot(ks, [scores[k] for k in ks], "o-", color="C0", label="mean silhouette")
        ax.plot([fit["k"]], [scores[fit["k"]]], "*", ms=16, color="C3", label=f"k = {fit['k']}")
        ax.set_xticks(ks)
        ax.legend(loc="best")
    else:
        ax.text(
            0.5,
            0.5,
            "no k of the range was possible\n(one regime)",
            ha="center",
            va="center",
            transform=ax.transAxes,
        )
    ax.set_xlabel("number of regimes k")
    ax.set_ylabel("mean silhouette (1)")
    ax.set_title(f"Regimes: k-means on {fit['n_fit']} cloudy train scenes")
    save_png(fig, out_png)
    return fig


def _joined(scenes_tsv: str | Path, regimes_tsv: str | Path, names: list[str]) -> pd.DataFrame:
    scenes = pd.read_csv(scenes_tsv, sep="\t")
    frame = descriptor_frame(scenes, names, source=str(scenes_tsv))
    labels = pd.read_csv(regimes_tsv, sep="\t")
    return frame.merge(labels, on=["case", "time_s"], how="inner", validate="one_to_one")


def regime_descriptors(
    scenes_tsv: str | Path, regimes_tsv: str | Path, fit_json: str | Path, out_png: str | Path
) -> Figure:
    """Every scene in pairs of the kept descriptors, coloured by its label.

    Parameters
    ----------
    scenes_tsv, regimes_tsv, fit_json
        The scene table, the label table and the fit.
    out_png
        Figure to write.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per pair of the first (up to four) kept descriptors; one descriptor
        against time when only one was kept; a note when none was.
    """
    fit = read_regime_fit(fit_json)
    names = list(fit["used"])[:_MAX_PANELS_DESCRIPTORS]
    table = _joined(scenes_tsv, regimes_tsv, names)
    pairs = list(combinations(names, 2))
    if len(names) == 1:
        table["time_h"] = table["time_s"] / 3600.0
        pairs = [("time_h", names[0])]
    ncol = min(3, max(1, len(pairs)))
    nrow = max(1, -(-len(pairs) // ncol))
    fig = new_figure(3.6 * ncol, 3.2 * nrow)
    if not pairs:
        ax = fig.add_subplot()
        ax.text(
            0.5,
            0.5,
            "no descriptor varies over the train scenes",
            ha="center",
            va="center",
            transform=ax.transAxes,
        )
    train = table["split"].eq("train").to_numpy()
    for i, (xn, yn) in enumerate(pairs):
        ax = fig.add_subplot(nrow, ncol, i + 1)
        for is_train, marker in ((True, "o"), (False, "x")):
            sub = table[(train == is_train) & np.isfinite(table[xn]) & np.isfinite(table[yn])]
            if len(sub):
                ax.scatter(
                    sub[xn],
                    sub[yn],
                    c=label_colours(sub["label"].to_numpy()),
                    marker=marker,
                    s=22,
                    linewidths=1.0,
                )
        ax.set_xlabel(xn)
        ax.set_ylabel(yn)
    handles = _label_handles(table["label"])
    handles += [
        Line2D([], [], ls="", marker="o", color="0.3", label="train"),
        Line2D([], [], ls="", marker="x", color="0.3", label="other splits"),
    ]
    fig.legend(handles=handles, loc="outside right upper", title="label")
    fig.suptitle("Scene descriptors coloured by regime label")
    save_png(fig, out_png)
    return fig


def regime_timeline(regimes_tsv: str | Path, out_png: str | Path) -> Figure:
    """Each case's regime label through time (one row per case, grouped by split).

    Parameters
    ----------
    regimes_tsv
        The label table.
    out_png
        Figure to write.

    Returns
    -------
    matplotlib.figure.Figure
        One axes; row ``i`` from the top is the ``i``-th case in (split, case) order.
    """
    table = pd.read_csv(regimes_tsv, sep="\t")
    order = {"train": 0, "validation": 1, "test": 2}
    cases = (
        table[["case", "split"]]
        .drop_duplicates()
        .assign(rank=lambda t: t["split"].map(order).fillna(3))
        .sort_values(["rank", "case"], kind="stable")
    )
    rows = {c: i for i, c in enumerate(cases["case"])}
    fig = new_figure(7.0, 1.2 + 0.35 * max(1, len(rows)))
    ax = fig.add_subplot()
    y = table["case"].map(rows).to_numpy(dtype=np.float64)
    ax.scatter(
        table["time_s"] / 3600.0, y, c=label_colours(table["label"].to_numpy()), marker="s", s=60
    )
    fig.legend(handles=_label_handles(table["label"]), loc="outside right upper", title="label")
    ax.set_yticks(list(rows.values()))
    ax.set_yticklabels([f"{c} ({s})" for c, s in zip(cases["case"], cases["split"], strict=True)])
    ax.invert_yaxis()
    ax.set_xlabel("time (h)")
    ax.set_title("Regime label of each case through time (grey: clear)")
    save_png(fig, out_png)
    return fig


def draw_regime_figures(
    scenes_tsv: str | Path,
    regimes_tsv: str | Path,
    fit_json: str | Path,
    figures: Mapping[str, str | Path],
) -> None:
    """Draw every regime figure.

    Parameters
    ----------
    scenes_tsv, regimes_tsv, fit_json
        The scene table, the label table and the fit.
    figures
        Kind (:data:`lesprep.layout.REGIME_FIGURES`) -> PNG to write.
    """
    regime_silhouette(fit_json, figures["silhouette"])
    regime_descriptors(scenes_tsv, regimes_tsv, fit_json, figures["descriptors"])
    regime_timeline(regimes_tsv, figures["timeline"])


def write_regime_outputs(
    scenes_tsv: str | Path,
    splits_tsv: str | Path,
    settings: RegimeSettings,
    *,
    table_out: str | Path,
    fit_out: str | Path,
    figures: Mapping[str, str | Path],
) -> None:
    """Label the scenes (:func:`lesprep.report.regimes.write_regimes`) and draw the figures.

    Parameters
    ----------
    scenes_tsv, splits_tsv
        The scene table and the split assignment (the only inputs).
    settings
        Regime settings.
    table_out, fit_out
        Label table and fit JSON to write.
    figures
        Kind (:data:`lesprep.layout.REGIME_FIGURES`) -> PNG to write.
    """
    missing = sorted(set(REGIME_FIGURES) - set(figures))
    if missing:
        raise ValueError(f"no output path for the regime figure(s) {missing}")
    write_regimes(scenes_tsv, splits_tsv, settings, table_out=table_out, fit_out=fit_out)
    draw_regime_figures(scenes_tsv, table_out, fit_out, figures)

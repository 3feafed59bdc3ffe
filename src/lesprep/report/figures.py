"""Report figures and tables of the workflow's stores (PNG via matplotlib's Agg canvas).

Every figure function reads one or two stores, draws one figure, writes it as a PNG to
``out_png`` (atomically: a temporary sibling renamed into place) and returns the
:class:`matplotlib.figure.Figure` so callers and tests can inspect what was drawn. The
figures are built on :class:`matplotlib.figure.Figure` with an Agg canvas, never through
``pyplot``, so no global backend state is touched and nothing has to be closed.

Conventions
-----------
* Times are plotted in hours since the store's ``time_origin`` attribute (the start of
  the run for duration time units, a date otherwise).
* Domain cloud cover is the fraction of columns with at least one cloudy cell
  (``cloud_mask`` over z); the domain-mean liquid water path is the plain mean of the
  ``(y, x)`` field (the horizontal grid is uniform).
* Profiles are time means over the kept (post spin-up) output times of per-time
  horizontal statistics: the cloud fraction of a level is the fraction of its cells
  flagged cloudy; the w variance of a level is the population variance (``ddof=0``)
  about that level's horizontal mean at each time.
* Statistics over training stores are accumulated over slices of ``chunk`` samples, so
  memory is bounded by one slice, and in float64.
* The Sundqvist et al. (1989) curve uses the store's ``rh_critical`` (root attribute, or
  the coarsening settings recorded in its provenance), else 0.8 (common practice).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from matplotlib.colors import LogNorm
from matplotlib.figure import Figure
from numpy.typing import ArrayLike, NDArray

from lesprep import provenance
from lesprep.errors import InputError
from lesprep.layout import ResultsLayout
from lesprep.report.canvas import new_figure, save_png
from lesprep.report.stores import SET_CHUNK, opened_store, set_slices
from lesprep.schemes import sundqvist_cloud_fraction

__all__ = [
    "DEFAULT_RH_CRITICAL",
    "case_lwp_map",
    "case_profiles",
    "case_timeseries",
    "draw_report_figures",
    "raw_output_times",
    "rh_critical_of",
    "scale_cf_vs_rh",
    "scale_target_distribution",
]

DEFAULT_RH_CRITICAL = 0.8
"""Critical relative humidity used when a store records none (common practice)."""

_SPINUP_COLOUR = "0.6"
_KG_M2 = "kg m$^{-2}$"


# --------------------------------------------------------------------------- helpers


def _case_name(ds: xr.Dataset, path: str | Path) -> str:
    return str(ds.attrs.get("case") or Path(path).parent.name)


def _origin_text(ds: xr.Dataset) -> str:
    """What the store's times count from: "the start of the run" or a date."""
    origin = str(ds.attrs.get("time_origin") or ds["time"].attrs.get("time_origin") or "")
    if not origin or origin == "start of run":
        return "the start of the run"
    return origin.replace("T", " ")


def _ingest_step(ds: xr.Dataset) -> dict[str, Any]:
    for step in provenance.load(dict(ds.attrs)).get("steps", []):
        if step.get("step") == "ingest":
            return step
    return {}


def raw_output_times(canonical_path: str | Path) -> tuple[NDArray[np.float64], float]:
    """Every raw output time of a case and its spin-up, from a canonical store.

    The canonical store holds only the kept times; the dropped ones are recorded in the
    ingest step of its provenance (``times_dropped_s``).

    Parameters
    ----------
    canonical_path
        A case's canonical store.

    Returns
    -------
    times
        Kept and dropped output times, sorted, in s since the store's time origin.
    spinup_s
        The spin-up the case was ingested with (root attribute ``spinup_s``), in s.

    Examples
    --------
    A case with output every 30 min for 2 h, ingested with a 1 h spin-up:

    >>> times, spinup = raw_output_times("results/cases/sc-ostra-01/canonical.zarr")
    >>> times.tolist(), spinup
    ([0.0, 1800.0, 3600.0, 5400.0, 7200.0], 3600.0)
    """
    with opened_store(canonical_path) as ds:
        kept = np.asarray(ds["time"].values, dtype=np.float64)
        dropped = np.asarray(_ingest_step(ds).get("times_dropped_s", []), dtype=np.float64)
        spinup = float(ds.attrs.get("spinup_s", 0.0))
    return np.sort(np.concatenate([dropped, kept])), spinup


def _set_scale(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("scale", "?"))


def _find_rh_critical(record: Mapping[str, Any]) -> float | None:
    for inp in record.get("inputs", []):
        found = _find_rh_critical(inp)
        if found is not None:
            return found
    for step in record.get("steps", []):
        value = (
            step.get("settings", {}).get("rh_critical") if step.get("step") == "coarsen" else None
        )
        if value is not None:
            return float(value)
    return None


def rh_critical_of(ds: xr.Dataset) -> float:
    """Critical relative humidity the store's ``cf_sundqvist`` was computed with.

    Parameters
    ----------
    ds
        A scale store or a training store.

    Returns
    -------
    float
        The root attribute ``rh_critical`` if present, else the ``rh_critical`` of the
        first coarsening step in the provenance, else :data:`DEFAULT_RH_CRITICAL`.

    Examples
    --------
    >>> rh_critical_of(xr.Dataset(attrs={"rh_critical": 0.7}))
    0.7
    >>> rh_critical_of(xr.Dataset())
    0.8
    """
    if "rh_critical" in ds.attrs:
        return float(ds.attrs["rh_critical"])
    found = _find_rh_critical(provenance.load(dict(ds.attrs)))
    return DEFAULT_RH_CRITICAL if found is None else found


# --------------------------------------------------------------------------- per case


def _domain_series(ds: xr.Dataset) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Cloud cover and mean LWP per kept time, reading one time at a time."""
    nt = ds.sizes["time"]
    cover = np.empty(nt, dtype=np.float64)
    lwp = np.empty(nt, dtype=np.float64)
    for j in range(nt):
        mask = np.asarray(ds["cloud_mask"].isel(time=j).values) > 0
        cover[j] = np.mean(np.any(mask, axis=0), dtype=np.float64)
        lwp[j] = np.mean(np.asarray(ds["lwp"].isel(time=j).values, dtype=np.float64))
    return cover, lwp


def case_timeseries(
    canonical_path: str | Path,
    raw_times_s: ArrayLike | None,
    spinup_s: float | None,
    out_png: str | Path,
) -> Figure:
    """Domain cloud cover and domain-mean LWP against time, spin-up shaded.

    Parameters
    ----------
    canonical_path
        A case's canonical store.
    raw_times_s
        Every raw output time (s since the store's time origin), kept and dropped; None
        takes them from the store (:func:`raw_output_times`).
    spinup_s
        Spin-up in s; None takes the store's ``spinup_s`` attribute.
    out_png
        PNG to write.

    Returns
    -------
    matplotlib.figure.Figure
        Two axes sharing time (h): cloud cover (top) and mean LWP (bottom). The window
        ``[first raw time, first raw time + spin-up]`` is shaded on both with
        ``axvspan`` (labelled ``"spin-up (dropped)"``); nothing is shaded for a zero
        spin-up.

    Examples
    --------
    >>> store = "results/cases/sc-ostra-01/canonical.zarr"
    >>> fig = case_timeseries(store, None, None, "timeseries.png")
    >>> [ax.get_ylabel() for ax in fig.axes]
    ['domain cloud cover (1)', 'domain-mean LWP (kg m$^{-2}$)']
    >>> [text.get_text() for text in fig.legends[0].get_texts()]
    ['kept output times', 'spin-up (dropped)']
    >>> Path("timeseries.png").stat().st_size > 0
    True
    """
    with opened_store(canonical_path, ("time", "cloud_mask", "lwp")) as ds:
        stored_raw, stored_spinup = raw_output_times(canonical_path)
        raw = stored_raw if raw_times_s is None else np.asarray(raw_times_s, dtype=np.float64)
        spinup = stored_spinup if spinup_s is None else float(spinup_s)
        kept = np.asarray(ds["time"].values, dtype=np.float64)
        cover, lwp = _domain_series(ds)
        case = _case_name(ds, canonical_path)
        xlabel = f"time since {_origin_text(ds)} (h)"
    first = float(np.min(raw)) if raw.size else float(kept[0])
    hours = kept / 3600.0
    fig = new_figure(7.0, 5.0)
    ax_cover, ax_lwp = fig.subplots(2, 1, sharex=True)
    ax_cover.plot(hours, cover, "o-", color="tab:blue", label="kept output times")
    ax_lwp.plot(hours, lwp, "o-", color="tab:green", label="kept output times")
    for ax in (ax_cover, ax_lwp):
        if spinup > 0:
            ax.axvspan(
                first / 3600.0,
                (first + spinup) / 3600.0,
                color=_SPINUP_COLOUR,
                alpha=0.35,
                lw=0,
                label="spin-up (dropped)",
            )
        ax.grid(True, alpha=0.3)
    ax_cover.set_ylabel("domain cloud cover (1)")
    ax_cover.set_ylim(-0.02, 1.02)
    ax_lwp.set_ylabel(f"domain-mean LWP ({_KG_M2})")
    ax_lwp.set_ylim(0.0, 1.1 * float(np.max(lwp)) if np.max(lwp) > 0 else 1e-3)
    ax_lwp.set_xlabel(xlabel)
    start = min(first, float(kept[0])) / 3600.0
    end = max(float(kept[-1]), first + spinup) / 3600.0
    pad = 0.03 * max(end - start, 1e-3)
    ax_lwp.set_xlim(start - pad, end + pad)
    handles, labels = ax_cover.get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=2, fontsize="small")
    fig.suptitle(f"Case {case}: domain cloud cover and mean liquid water path")
    save_png(fig, out_png)
    return fig


def _mean_profiles(ds: xr.Dataset) -> dict[str, NDArray[np.float64]]:
    nt, nz = ds.sizes["time"], ds.sizes["z"]
    acc = {k: np.zeros(nz, dtype=np.float64) for k in ("cf", "qc", "w_var")}
    for j in range(nt):
        mask = np.asarray(ds["cloud_mask"].isel(time=j).values) > 0
        acc["cf"] += np.mean(mask, axis=(1, 2), dtype=np.float64)
        qc = np.asarray(ds["qc"].isel(time=j).values, dtype=np.float64)
        acc["qc"] += qc.mean(axis=(1, 2))
        w = np.asarray(ds["w"].isel(time=j).values, dtype=np.float64)
        acc["w_var"] += w.var(axis=(1, 2))  # population variance (ddof=0)
    return {k: v / nt for k, v in acc.items()}


def case_profiles(canonical_path: str | Path, out_png: str | Path) -> Figure:
    """Time-mean profiles of cloud fraction, qc and w variance against height.

    Parameters
    ----------
    canonical_path
        A case's canonical store.
    out_png
        PNG to write.

    Returns
    -------
    matplotlib.figure.Figure
        Three axes sharing height (km): cloud fraction (1), qc (g kg-1) and the
        horizontal population variance of w (m2 s-2), each the mean over the kept times.

    Examples
    --------
    >>> fig = case_profiles("results/cases/sc-ostra-01/canonical.zarr", "profiles.png")
    >>> [ax.get_xlabel() for ax in fig.axes]
    ['cloud fraction (1)', 'qc (g kg$^{-1}$)', 'w variance (m$^{2}$ s$^{-2}$)']
    >>> fig.get_suptitle()
    'Case sc-ostra-01: mean profiles over 3 kept output time(s)'
    """
    with opened_store(canonical_path, ("z", "cloud_mask", "qc", "w")) as ds:
        prof = _mean_profiles(ds)
        z_km = np.asarray(ds["z"].values, dtype=np.float64) / 1000.0
        case = _case_name(ds, canonical_path)
        nt = ds.sizes["time"]
    fig = new_figure(8.0, 4.5)
    axes = fig.subplots(1, 3, sharey=True)
    series = (
        (prof["cf"], "cloud fraction (1)", "tab:blue"),
        (prof["qc"] * 1000.0, "qc (g kg$^{-1}$)", "tab:green"),
        (prof["w_var"], "w variance (m$^{2}$ s$^{-2}$)", "tab:red"),
    )
    for ax, (values, label, colour) in zip(axes, series, strict=True):
        ax.plot(values, z_km, color=colour)
        ax.set_xlabel(label)
        ax.set_xlim(left=0.0)
        ax.grid(True, alpha=0.3)
    axes[0].set_ylabel("height (km)")
    axes[0].set_ylim(0.0, float(z_km[-1]) + 0.5 * float(z_km[0]))
    fig.suptitle(f"Case {case}: mean profiles over {nt} kept output time(s)")
    save_png(fig, out_png)
    return fig


def case_lwp_map(canonical_path: str | Path, out_png: str | Path, time_index: int = -1) -> Figure:
    """Map of the liquid water path at one kept output time.

    Parameters
    ----------
    canonical_path
        A case's canonical store.
    out_png
        PNG to write.
    time_index
        Index into the kept times (negative counts from the end; -1 is the last).

    Returns
    -------
    matplotlib.figure.Figure
        One map axis (x, y in km, cell edges from the centres and ``dx``) and a colour
        bar of LWP (kg m-2).

    Raises
    ------
    InputError
        If ``time_index`` is out of range.

    Examples
    --------
    >>> store = "results/cases/sc-ostra-01/canonical.zarr"
    >>> fig = case_lwp_map(store, "lwp.png", time_index=0)
    >>> print(fig.axes[0].get_title())
    Case sc-ostra-01: liquid water path
    at 1.00 h since the start of the run
    >>> fig.axes[1].get_ylabel()  # the colour bar
    'liquid water path (kg m$^{-2}$)'
    >>> case_lwp_map(store, "lwp.png", time_index=3)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    lesprep.errors.InputError: file ...: time_index 3 is out of range; the store has 3 kept ...
    """
    with opened_store(canonical_path, ("time", "x", "y", "lwp")) as ds:
        nt = ds.sizes["time"]
        if not -nt <= int(time_index) < nt:
            raise InputError(
                f"time_index {time_index} is out of range; the store has {nt} kept time(s)",
                file=str(canonical_path),
                hint=f"use an index from {-nt} to {nt - 1}",
            )
        lwp = np.asarray(ds["lwp"].isel(time=int(time_index)).values, dtype=np.float64)
        x = np.asarray(ds["x"].values, dtype=np.float64)
        y = np.asarray(ds["y"].values, dtype=np.float64)
        dx = float(ds.attrs.get("dx", x[1] - x[0]))
        t_h = float(ds["time"].values[int(time_index)]) / 3600.0
        case = _case_name(ds, canonical_path)
        origin = _origin_text(ds)
    xe = np.concatenate([x - dx / 2, [x[-1] + dx / 2]]) / 1000.0
    ye = np.concatenate([y - dx / 2, [y[-1] + dx / 2]]) / 1000.0
    fig = new_figure(6.0, 5.0)
    ax = fig.subplots()
    top = float(lwp.max()) if lwp.size and float(lwp.max()) > 0 else 1e-3
    mesh = ax.pcolormesh(xe, ye, lwp, cmap="Blues_r", vmin=0.0, vmax=top, shading="flat")
    ax.set_aspect("equal")
    ax.set_xlabel("x (km)")
    ax.set_ylabel("y (km)")
    cbar = fig.colorbar(mesh, ax=ax, shrink=0.9)
    cbar.set_label(f"liquid water path ({_KG_M2})")
    ax.set_title(
        f"Case {case}: liquid water path\nat {t_h:.2f} h since {origin}", fontsize="medium"
    )
    save_png(fig, out_png)
    return fig


# --------------------------------------------------------------------------- per scale


def _histogram(
    path: str | Path, edges: NDArray[np.float64], chunk: int
) -> tuple[NDArray[np.float64], int, int, str]:
    """Counts of cloud_fraction in ``edges``, sample count, clear count, scale label."""
    with opened_store(path) as ds:
        counts = np.zeros(edges.size - 1, dtype=np.float64)
        n = clear = 0
        scale = _set_scale(ds)
        if "cloud_fraction" in ds.variables:
            for sl in set_slices(ds, chunk):
                v = np.asarray(ds["cloud_fraction"].isel(sample=sl).values, dtype=np.float64)
                v = v[~np.isnan(v)]
                counts += np.histogram(v, bins=edges)[0]
                n += v.size
                clear += int(np.count_nonzero(v == 0.0))
    return counts, n, clear, scale


def scale_target_distribution(
    train_set: str | Path,
    test_set: str | Path,
    out_png: str | Path,
    *,
    bins: int = 20,
    chunk: int = SET_CHUNK,
) -> Figure:
    """Histogram (density) of the target cloud fraction, train against test split.

    Parameters
    ----------
    train_set, test_set
        Training stores of the two splits at one scale.
    out_png
        PNG to write.
    bins
        Number of equal bins on [0, 1] (the last bin includes 1).
    chunk
        Samples read at a time.

    Returns
    -------
    matplotlib.figure.Figure
        One axis with a step histogram per split, normalised to unit area (density,
        log y axis); the legend names each split with its sample count and the share of
        clear samples (cloud fraction exactly 0).

    Examples
    --------
    >>> train = "results/sets/train/scale-400m.zarr"
    >>> test = "results/sets/test/scale-400m.zarr"
    >>> fig = scale_target_distribution(train, test, "cf.png")
    >>> [text.get_text() for text in fig.axes[0].get_legend().get_texts()]  # doctest: +ELLIPSIS
    ['train: 128 samples, ... % clear', 'test: 192 samples, ... % clear']
    """
    edges = np.linspace(0.0, 1.0, int(bins) + 1)
    width = 1.0 / int(bins)
    fig = new_figure(6.5, 4.5)
    ax = fig.subplots()
    scales = []
    drawn = False
    for name, path, colour in (("train", train_set, "tab:blue"), ("test", test_set, "tab:orange")):
        counts, n, clear, scale = _histogram(path, edges, chunk)
        scales.append(scale)
        if n == 0:
            ax.plot([], [], color=colour, label=f"{name}: no samples")
            continue
        density = counts / (n * width)
        label = f"{name}: {n:,} samples, {100.0 * clear / n:.0f} % clear"
        ax.stairs(density, edges, color=colour, lw=1.8, label=label)
        drawn = drawn or bool(np.any(density > 0))
    if drawn:
        ax.set_yscale("log")
    ax.set_xlim(0.0, 1.0)
    ax.set_xlabel("cloud fraction of the coarse cell (1)")
    ax.set_ylabel("probability density (1)")
    ax.grid(True, alpha=0.3, which="both")
    ax.legend(loc="upper center", fontsize="small")
    scale = scales[0] if scales[0] != "?" else scales[1]
    ax.set_title(f"Target cloud fraction at scale {scale}: train and test splits")
    save_png(fig, out_png)
    return fig


def scale_cf_vs_rh(
    train_set: str | Path,
    out_png: str | Path,
    *,
    rh_bins: int = 40,
    cf_bins: int = 25,
    chunk: int = SET_CHUNK,
) -> Figure:
    """Joint histogram of coarse cloud fraction and RH of the means, with Sundqvist.

    Parameters
    ----------
    train_set
        The train split's training store at one scale.
    out_png
        PNG to write.
    rh_bins, cf_bins
        Bins along relative humidity (over the data range) and cloud fraction ([0, 1]).
    chunk
        Samples read at a time.

    Returns
    -------
    matplotlib.figure.Figure
        One axis: sample counts per bin (log colour scale, empty bins blank), the mean
        cloud fraction of each RH bin (dots), the mean Gaussian-PDF baseline
        ``cf_gaussian`` of each bin (squares, when the store has it) and the Sundqvist et
        al. (1989) curve for the store's ``rh_critical`` (:func:`rh_critical_of`).

    Raises
    ------
    InputError
        If the store holds no ``rh_of_means`` or ``cloud_fraction``.

    Examples
    --------
    >>> fig = scale_cf_vs_rh("results/sets/train/scale-400m.zarr", "cf_rh.png")
    >>> fig.axes[0].get_title()
    'Cloud fraction against RH at scale 400m, train split (128 samples)'
    >>> for text in fig.axes[0].get_legend().get_texts():
    ...     print(text.get_text())
    mean cloud fraction per RH bin
    mean Gaussian-PDF cloud fraction per RH bin (LES sub-grid statistics)
    Sundqvist et al. (1989), RH$_c$ = 0.8
    """
    with opened_store(train_set, ("rh_of_means", "cloud_fraction")) as ds:
        rhc = rh_critical_of(ds)
        scale = _set_scale(ds)
        lo, hi = math.inf, -math.inf
        for sl in set_slices(ds, chunk):
            rh = np.asarray(ds["rh_of_means"].isel(sample=sl).values, dtype=np.float64)
            if np.any(np.isfinite(rh)):
                lo, hi = min(lo, float(np.nanmin(rh))), max(hi, float(np.nanmax(rh)))
        if not math.isfinite(lo):
            lo, hi = rhc, 1.0
        lo = math.floor(min(lo, rhc) * 20.0) / 20.0
        hi = max(1.05, math.ceil(hi * 20.0) / 20.0)
        rh_edges = np.linspace(lo, hi, int(rh_bins) + 1)
        cf_edges = np.linspace(0.0, 1.0, int(cf_bins) + 1)
        counts = np.zeros((rh_edges.size - 1, cf_edges.size - 1), dtype=np.float64)
        cf_sum = np.zeros(rh_edges.size - 1, dtype=np.float64)
        gauss = "cf_gaussian" in ds.variables
        g_sum = np.zeros(rh_edges.size - 1, dtype=np.float64)
        g_n = np.zeros(rh_edges.size - 1, dtype=np.float64)
        for sl in set_slices(ds, chunk):
            rh = np.asarray(ds["rh_of_means"].isel(sample=sl).values, dtype=np.float64)
            cf = np.asarray(ds["cloud_fraction"].isel(sample=sl).values, dtype=np.float64)
            ok = np.isfinite(rh) & np.isfinite(cf)
            counts += np.histogram2d(rh[ok], cf[ok], bins=(rh_edges, cf_edges))[0]
            cf_sum += np.histogram(rh[ok], bins=rh_edges, weights=cf[ok])[0]
            if gauss:
                g = np.asarray(ds["cf_gaussian"].isel(sample=sl).values, dtype=np.float64)
                okg = np.isfinite(rh) & np.isfinite(g)
                g_sum += np.histogram(rh[okg], bins=rh_edges, weights=g[okg])[0]
                g_n += np.histogram(rh[okg], bins=rh_edges)[0]
    fig = new_figure(6.5, 5.0)
    ax = fig.subplots()
    n = int(counts.sum())
    masked = np.ma.masked_equal(counts.T, 0.0)
    if n:
        mesh = ax.pcolormesh(
            rh_edges, cf_edges, masked, cmap="viridis", norm=LogNorm(vmin=1, vmax=counts.max())
        )
        cbar = fig.colorbar(mesh, ax=ax)
        cbar.set_label("samples per bin (1)")
    per_bin = counts.sum(axis=1)
    centres = 0.5 * (rh_edges[1:] + rh_edges[:-1])
    has = per_bin > 0
    ax.plot(
        centres[has],
        cf_sum[has] / per_bin[has],
        "o",
        ms=3.5,
        color="white",
        mec="black",
        mew=0.6,
        label="mean cloud fraction per RH bin",
    )
    if gauss and np.any(g_n > 0):
        ax.plot(
            centres[g_n > 0],
            g_sum[g_n > 0] / g_n[g_n > 0],
            "s",
            ms=3.5,
            color="tab:orange",
            mec="black",
            mew=0.6,
            label="mean Gaussian-PDF cloud fraction per RH bin (LES sub-grid statistics)",
        )
    rh_line = np.linspace(lo, hi, 400)
    ax.plot(
        rh_line,
        sundqvist_cloud_fraction(rh_line, rhc),
        color="tab:red",
        lw=2.0,
        label=f"Sundqvist et al. (1989), RH$_c$ = {rhc:g}",
    )
    ax.set_xlim(lo, hi)
    ax.set_ylim(-0.02, 1.02)
    ax.set_xlabel("relative humidity of the coarse means (1)")
    ax.set_ylabel("cloud fraction of the coarse cell (1)")
    ax.legend(loc="upper left", fontsize="small")
    ax.set_title(f"Cloud fraction against RH at scale {scale}, train split ({n:,} samples)")
    save_png(fig, out_png)
    return fig


def draw_report_figures(
    layout: ResultsLayout,
    cases: list[str],
    scales: list[str],
    layer_figures: Sequence[Sequence[str]] = (),
) -> None:
    """Draw every per-case figure and, for ``scales``, the train/test figures.

    Parameters
    ----------
    layout
        The results tree (where the stores are and where the figures go).
    cases
        Case ids.
    scales
        Scale labels whose train and test stores both exist.
    layer_figures
        ``(case, scale label, layer set)`` of each profile figure on LES levels and
        target layers (:func:`lesprep.report.layer_figures.case_layer_profiles`).
    """
    from lesprep.report.layer_figures import case_layer_profiles
    from lesprep.scales.layers import layer_store_label

    for case, label, layers in layer_figures:
        case_layer_profiles(
            layout.scale_store(case, label),
            layout.scale_store(case, layer_store_label(label, layers)),
            layout.layer_figure(case, label, layers),
        )
    for case in cases:
        canon = layout.canonical(case)
        case_timeseries(canon, None, None, layout.case_figure(case, "timeseries"))
        case_profiles(canon, layout.case_figure(case, "profiles"))
        case_lwp_map(canon, layout.case_figure(case, "lwp_map"))
    for label in scales:
        train, test = layout.set_store("train", label), layout.set_store("test", label)
        scale_target_distribution(train, test, layout.scale_figure(label, "target_distribution"))
        scale_cf_vs_rh(train, layout.scale_figure(label, "cf_vs_rh"))

"""One case's profiles on the LES levels beside the same case on stretched target layers.

A scale store (``scale-<L>.zarr``) holds block statistics on the LES levels; its layer
stores (``scale-<L>_layers-<name>.zarr``) hold the same case and scale averaged into the
layers of a target vertical grid, with the interfaces of each layer in ``z_bounds`` (named
by the ``bounds`` attribute of ``z``). The figure of :func:`case_layer_profiles` puts the
two side by side so a reader sees what the vertical averaging does to the profiles:

* every profile is the mean over time, y and x of a ``(time, z, y, x)`` variable (NaN
  cells left out), accumulated one output time at a time in float64;
* on the LES levels a profile is a line through the level heights;
* on the layers a profile is a step: a vertical segment over ``[lower, upper]`` of each
  layer at the layer's value, joined across shared interfaces (and broken where layers
  do not touch), so the stretched thicknesses show; faint horizontal lines mark the
  interfaces in every panel.

The computation (:func:`mean_profile`, :func:`step_profile`, :func:`plan_panels`,
:func:`read_layer_profiles`) is kept apart from the drawing so it can be checked without
an image.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Final

import numpy as np
import xarray as xr
from matplotlib.artist import Artist
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from numpy.typing import ArrayLike, NDArray

from lesprep.errors import InputError
from lesprep.report.canvas import new_figure, save_png
from lesprep.report.stores import opened_store
from lesprep.units import conversion

__all__ = [
    "FIELD_VARIABLES",
    "LAYER_CLOUD_VARIABLES",
    "LEVEL_CLOUD_VARIABLE",
    "LayerProfiles",
    "Panels",
    "case_layer_profiles",
    "layer_bounds",
    "mean_profile",
    "plan_panels",
    "read_layer_profiles",
    "step_profile",
]

LEVEL_CLOUD_VARIABLE: Final = "cloud_fraction"
"""Cloud fraction drawn from the store on the LES levels (the training target)."""

LAYER_CLOUD_VARIABLES: Final = ("cloud_volume_fraction", "cloud_area_fraction")
"""Cloud fractions drawn from the layer store: the cloudy share of the layer's weight and
the projected cover of the layer."""

FIELD_VARIABLES: Final = ("qc_mean", "qt_mean", "theta_l_mean")
"""Block means drawn in a panel each when both stores hold them."""

PROFILE_DIMS: Final = ("time", "z", "y", "x")
"""Dimensions of every variable drawn (any order in the store)."""

_FIELD_DISPLAY: Final = {
    # name: (axis label, display units in the label, display units, units when absent)
    "qc_mean": ("qc", "g kg$^{-1}$", "g kg-1", "kg kg-1"),
    "qt_mean": ("qt", "g kg$^{-1}$", "g kg-1", "kg kg-1"),
    "theta_l_mean": ("$\\theta_l$", "K", "K", "K"),
}
_STORE_HINT: Final = (
    "pass a case's store on the LES levels (scale-<L>.zarr) and one of its layer stores "
    "(scale-<L>_layers-<name>.zarr) as written by the coarsening step"
)
_LEVEL_COLOUR, _LAYER_COLOUR, _AREA_COLOUR = "tab:blue", "tab:orange", "tab:green"
_INTERFACE_COLOUR = "0.85"
_CONTIGUOUS_M = 1e-6  # interfaces closer than this (m) are shared by adjacent layers


# --------------------------------------------------------------------------- computation


def mean_profile(ds: xr.Dataset, name: str, path: str | Path | None = None) -> NDArray[np.float64]:
    """Mean over time, y and x of one ``(time, z, y, x)`` variable, per z.

    Parameters
    ----------
    ds
        A store (lazily opened or in memory).
    name
        The variable.
    path
        The store's file, named in errors.

    Returns
    -------
    numpy.ndarray
        float64 of length ``ds.sizes["z"]``: the mean of the finite values of each z,
        accumulated one time at a time; NaN where a z has no finite value.

    Raises
    ------
    InputError
        If ``name`` is missing or its dimensions are not ``time, z, y, x``.

    Examples
    --------
    >>> ds = xr.Dataset({"a": (PROFILE_DIMS, np.arange(8.0).reshape(2, 2, 1, 2))})
    >>> mean_profile(ds, "a").tolist()
    [2.5, 4.5]
    """
    where = {"file": None if path is None else str(path), "variable": name}
    if name not in ds.variables:
        raise InputError(
            f"is missing; the store holds {sorted(map(str, ds.data_vars))}",
            hint=_STORE_HINT,
            **where,
        )
    da = ds[name]
    if sorted(map(str, da.dims)) != sorted(PROFILE_DIMS):
        raise InputError(
            f"has dimensions {tuple(map(str, da.dims))}; expected {PROFILE_DIMS}",
            hint=_STORE_HINT,
            **where,
        )
    da = da.transpose(*PROFILE_DIMS)
    total = np.zeros(da.sizes["z"], dtype=np.float64)
    count = np.zeros(da.sizes["z"], dtype=np.float64)
    for j in range(da.sizes["time"]):
        values = np.asarray(da.isel(time=j).values, dtype=np.float64)
        finite = np.isfinite(values)
        total += np.sum(np.where(finite, values, 0.0), axis=(1, 2))
        count += np.sum(finite, axis=(1, 2))
    out = np.full_like(total, np.nan)
    np.divide(total, count, out=out, where=count > 0)
    return out


def step_profile(
    values: ArrayLike, bounds: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Vertices of a step profile: each layer's value held over its bounds.

    Parameters
    ----------
    values
        One value per layer, shape ``(n,)``.
    bounds
        Lower and upper interface of each layer, shape ``(n, 2)``, lower < upper.

    Returns
    -------
    x, z
        Vertex coordinates for a line plot: layer ``k`` contributes
        ``(values[k], lower[k])`` and ``(values[k], upper[k])``, layers taken from the
        lowest up. Where a layer does not start at the previous layer's upper interface
        (a gap or an overlap) a NaN vertex is put between them, which breaks the line.

    Raises
    ------
    ValueError
        If the shapes do not match or a layer's upper interface is not above its lower.

    Examples
    --------
    >>> x, z = step_profile([0.1, 0.3], [[0.0, 100.0], [100.0, 300.0]])
    >>> x.tolist(), z.tolist()
    ([0.1, 0.1, 0.3, 0.3], [0.0, 100.0, 100.0, 300.0])
    """
    v = np.asarray(values, dtype=np.float64)
    b = np.asarray(bounds, dtype=np.float64)
    if v.ndim != 1 or b.shape != (v.size, 2):
        raise ValueError(
            f"step_profile needs values of shape (n,) and bounds of shape (n, 2); "
            f"got values {v.shape} and bounds {b.shape}"
        )
    lower, upper = b[:, 0], b[:, 1]
    thin = np.flatnonzero(~(upper > lower))
    if thin.size:
        k = int(thin[0])
        raise ValueError(
            f"layer {k} has bounds [{lower[k]}, {upper[k]}]; expected lower < upper "
            f"({thin.size} such layer(s))"
        )
    order = np.argsort(lower, kind="stable")
    lower, upper, v = lower[order], upper[order], v[order]
    xs: list[float] = []
    zs: list[float] = []
    for k in range(v.size):
        if k and abs(lower[k] - upper[k - 1]) > _CONTIGUOUS_M:
            xs.append(np.nan)
            zs.append(np.nan)
        xs += [v[k], v[k]]
        zs += [lower[k], upper[k]]
    return np.asarray(xs, dtype=np.float64), np.asarray(zs, dtype=np.float64)


def layer_bounds(ds: xr.Dataset, path: str | Path | None = None) -> NDArray[np.float64]:
    """Lower and upper interface of each layer of a layer store (in the units of ``z``).

    Parameters
    ----------
    ds
        A layer store: coordinate ``z`` whose ``bounds`` attribute names a ``(z, 2)``
        variable (``z_bounds`` when the attribute is absent).
    path
        The store's file, named in errors.

    Returns
    -------
    numpy.ndarray
        float64 of shape ``(n_layers, 2)``.

    Raises
    ------
    InputError
        If the bounds are missing, of the wrong shape, not finite, not increasing
        within a layer, or a layer centre lies outside its bounds.

    Examples
    --------
    >>> ds = xr.Dataset(coords={"z": ("z", [50.0, 200.0])})
    >>> ds["z_bounds"] = (("z", "nv"), [[0.0, 100.0], [100.0, 300.0]])
    >>> layer_bounds(ds).tolist()
    [[0.0, 100.0], [100.0, 300.0]]
    """
    file = None if path is None else str(path)
    if "z" not in ds.variables:
        raise InputError(
            "has no coordinate 'z'; expected a layer store with z and its bounds",
            file=file,
            hint=_STORE_HINT,
        )
    name = str(ds["z"].attrs.get("bounds", "z_bounds"))
    where = {"file": file, "variable": name}
    if name not in ds.variables:
        raise InputError(
            "(the bounds of z) is missing; expected the lower and upper interface of each "
            "layer, shape (z, 2)",
            hint=_STORE_HINT,
            **where,
        )
    nz = ds.sizes["z"]
    if "z" not in ds[name].dims:
        raise InputError(
            f"has dimensions {tuple(map(str, ds[name].dims))}; expected ('z', <2 interfaces>)",
            **where,
        )
    bnds = np.asarray(ds[name].transpose("z", ...).values, dtype=np.float64)
    if bnds.shape != (nz, 2):
        raise InputError(
            f"has shape {bnds.shape}; expected ({nz}, 2): lower and upper interface of each layer",
            **where,
        )
    bad = np.flatnonzero(~(np.isfinite(bnds).all(axis=1) & (bnds[:, 1] > bnds[:, 0])))
    if bad.size:
        k = int(bad[0])
        raise InputError(
            f"layer {k} has bounds {bnds[k].tolist()}; expected finite interfaces with "
            f"lower < upper ({bad.size} such layer(s))",
            **where,
        )
    centre = np.asarray(ds["z"].values, dtype=np.float64)
    outside = np.flatnonzero(~((centre >= bnds[:, 0]) & (centre <= bnds[:, 1])))
    if outside.size:
        k = int(outside[0])
        raise InputError(
            f"layer {k} has centre z = {centre[k]} outside its bounds {bnds[k].tolist()}; "
            f"expected every centre within its layer ({outside.size} such layer(s))",
            **where,
        )
    return bnds


@dataclass(frozen=True)
class Panels:
    """What the figure draws, from the variables each store holds.

    Attributes
    ----------
    level_cloud
        True when the store on the LES levels holds :data:`LEVEL_CLOUD_VARIABLE`.
    layer_cloud
        The :data:`LAYER_CLOUD_VARIABLES` the layer store holds.
    fields
        The :data:`FIELD_VARIABLES` both stores hold (a panel each).
    skipped
        Each field left out, with the store(s) it is absent from.
    """

    level_cloud: bool
    layer_cloud: tuple[str, ...]
    fields: tuple[str, ...]
    skipped: dict[str, str] = field(default_factory=dict)

    @property
    def has_cloud(self) -> bool:
        """True when there is a cloud fraction to draw on either side."""
        return self.level_cloud or bool(self.layer_cloud)


def plan_panels(level_names: Iterable[str], layer_names: Iterable[str]) -> Panels:
    """Choose the panels from the variable names of the two stores.

    Parameters
    ----------
    level_names
        Variables of the store on the LES levels.
    layer_names
        Variables of the layer store.

    Returns
    -------
    Panels
        The cloud-fraction profiles either store holds, and the fields of
        :data:`FIELD_VARIABLES` present in both (the others in ``skipped``).

    Examples
    --------
    >>> p = plan_panels(["cloud_fraction", "qc_mean"], ["cloud_area_fraction", "qc_mean"])
    >>> p.level_cloud, p.layer_cloud, p.fields, p.skipped["qt_mean"]
    (True, ('cloud_area_fraction',), ('qc_mean',), 'both stores')
    """
    level, layer = set(map(str, level_names)), set(map(str, layer_names))
    fields, skipped = [], {}
    for name in FIELD_VARIABLES:
        absent = [
            side for side, names in (("LES levels", level), ("layers", layer)) if name not in names
        ]
        if not absent:
            fields.append(name)
        else:
            skipped[name] = "both stores" if len(absent) == 2 else f"the {absent[0]} store"
    return Panels(
        level_cloud=LEVEL_CLOUD_VARIABLE in level,
        layer_cloud=tuple(n for n in LAYER_CLOUD_VARIABLES if n in layer),
        fields=tuple(fields),
        skipped=skipped,
    )


@dataclass(frozen=True, kw_only=True)
class LayerProfiles:
    """The numbers of one layer-profile figure (stored units; heights in m).

    Attributes
    ----------
    level_path, layer_path
        The two stores.
    case, scale, layers, weighting
        From the stores' root attributes ("?" when not recorded).
    n_times
        Output times averaged over (of the level store, then the layer store).
    panels
        What is drawn.
    level_z
        Heights of the LES levels (m).
    bounds
        Lower and upper interface of each layer (m), shape ``(n_layers, 2)``.
    level, layer
        Mean profile (time, y, x) of each drawn variable on the levels and the layers.
    units
        Units attribute of each drawn field in the level store and in the layer store
        (None when absent: the lesprep units kg kg-1 or K are then assumed).
    """

    level_path: Path
    layer_path: Path
    case: str
    scale: str
    layers: str
    weighting: str
    n_times: tuple[int, int]
    panels: Panels
    level_z: NDArray[np.float64]
    bounds: NDArray[np.float64]
    level: dict[str, NDArray[np.float64]]
    layer: dict[str, NDArray[np.float64]]
    units: dict[str, tuple[str | None, str | None]]


def _heights_m(values: NDArray[np.float64], ds: xr.Dataset, path: Path) -> NDArray[np.float64]:
    conv = conversion(
        variable="z",
        raw_variable="z",
        found=ds["z"].attrs.get("units"),
        expected="m",
        assumed="m",
        file=str(path),
    )
    return conv.factor * values + conv.offset


def _agreed_attr(name: str, level: xr.Dataset, layer: xr.Dataset, paths: tuple[Path, Path]) -> str:
    """A root attribute both stores should share (case, scale): the layer store's value."""
    a, b = level.attrs.get(name), layer.attrs.get(name)
    if a is not None and b is not None and str(a) != str(b):
        raise InputError(
            f"the stores disagree on {name!r}: {paths[0]} has {a!r}, {paths[1]} has {b!r}; "
            "expected one case at one scale",
            hint=_STORE_HINT,
        )
    found = b if b is not None else a
    return "?" if found is None else str(found)


def read_layer_profiles(level_store: str | Path, layer_store: str | Path) -> LayerProfiles:
    """Read the mean profiles of one case on the LES levels and on a layer set.

    Parameters
    ----------
    level_store
        The case's store at one scale on the LES levels (``scale-<L>.zarr``).
    layer_store
        A layer store of the same case and scale (``scale-<L>_layers-<name>.zarr``).

    Returns
    -------
    LayerProfiles
        Every profile the figure draws (:func:`plan_panels`), as :func:`mean_profile`.

    Raises
    ------
    InputError
        If neither store holds a cloud fraction to draw, the stores disagree on case or
        scale, or a drawn variable or the layer bounds are malformed.

    Examples
    --------
    A case's 400 m store on its 16 LES levels and its store on the 4 layers of set ``l4``:

    >>> case = "results/cases/sc-ostra-01"
    >>> prof = read_layer_profiles(f"{case}/scale-400m.zarr", f"{case}/scale-400m_layers-l4.zarr")
    >>> prof.case, prof.scale, prof.layers, prof.weighting
    ('sc-ostra-01', '400m', 'l4', 'mass')
    >>> prof.level_z.size, prof.bounds.tolist()
    (16, [[0.0, 500.0], [500.0, 1000.0], [1000.0, 1500.0], [1500.0, 2500.0]])
    >>> prof.panels.fields
    ('qc_mean', 'qt_mean', 'theta_l_mean')
    """
    paths = (Path(level_store), Path(layer_store))
    with opened_store(paths[0], ("z",)) as lev, opened_store(paths[1], ("z",)) as lay:
        panels = plan_panels(lev.data_vars, lay.data_vars)
        if not panels.has_cloud:
            raise InputError(
                f"no cloud fraction to draw: {paths[0]} has no {LEVEL_CLOUD_VARIABLE!r} "
                f"(it holds {sorted(map(str, lev.data_vars))}) and {paths[1]} has neither "
                f"of {list(LAYER_CLOUD_VARIABLES)} (it holds {sorted(map(str, lay.data_vars))})"
                f"; expected {LEVEL_CLOUD_VARIABLE!r} on the LES levels or a layer cloud "
                "fraction",
                hint=_STORE_HINT,
            )
        case = _agreed_attr("case", lev, lay, paths)
        if case == "?":
            case = paths[1].parent.name
        scale = _agreed_attr("scale", lev, lay, paths)
        level_names = [LEVEL_CLOUD_VARIABLE] * panels.level_cloud + list(panels.fields)
        layer_names = list(panels.layer_cloud) + list(panels.fields)
        level = {n: mean_profile(lev, n, paths[0]) for n in level_names}
        layer = {n: mean_profile(lay, n, paths[1]) for n in layer_names}
        bounds = layer_bounds(lay, paths[1])
        return LayerProfiles(
            level_path=paths[0],
            layer_path=paths[1],
            case=case,
            scale=scale,
            layers=str(lay.attrs.get("layers", "?")),
            weighting=str(lay.attrs.get("vertical_weighting", "?")),
            n_times=(int(lev.sizes.get("time", 0)), int(lay.sizes.get("time", 0))),
            panels=panels,
            level_z=_heights_m(np.asarray(lev["z"].values, dtype=np.float64), lev, paths[0]),
            bounds=_heights_m(bounds, lay, paths[1]),
            level=level,
            layer=layer,
            units={
                n: (lev[n].attrs.get("units"), lay[n].attrs.get("units")) for n in panels.fields
            },
        )


def _display(prof: LayerProfiles, name: str, side: int) -> tuple[float, float]:
    """Factor and offset from a field's stored units to its display units."""
    display, assumed = _FIELD_DISPLAY[name][2:]
    conv = conversion(
        variable=name,
        raw_variable=name,
        found=prof.units[name][side],
        expected=display,
        assumed=assumed,
        file=str((prof.level_path, prof.layer_path)[side]),
    )
    return conv.factor, conv.offset


# --------------------------------------------------------------------------- drawing


def _mean_text(n_times: tuple[int, int]) -> str:
    if n_times[0] == n_times[1]:
        return f"means over time ({n_times[0]} output times), y and x"
    return (
        f"means over time ({n_times[0]} output times on the LES levels, {n_times[1]} on the "
        "layers), y and x"
    )


def _draw_interfaces(ax: Axes, bounds_km: NDArray[np.float64]) -> None:
    edges = np.unique(bounds_km.ravel())
    ax.hlines(edges, 0.0, 1.0, transform=ax.get_yaxis_transform(), colors=_INTERFACE_COLOUR, lw=0.6)


def _draw(prof: LayerProfiles) -> Figure:
    panels = prof.panels
    level_km = prof.level_z / 1000.0
    bounds_km = prof.bounds / 1000.0
    n = 1 + len(panels.fields)
    fig = new_figure(2.0 + 2.6 * n, 5.5)
    axes = list(np.atleast_1d(fig.subplots(1, n, sharey=True)))
    weighted = "layer" if prof.weighting == "?" else f"{prof.weighting}-weighted"
    level_label = "LES levels"
    layer_label = f"target layers: {weighted} mean (cloud panel: cloud volume fraction)"
    area_label = "target layers: cloud area fraction (projected cover)"
    for ax in axes:
        _draw_interfaces(ax, bounds_km)
    cloud = axes[0]
    if panels.level_cloud:
        cloud.plot(
            prof.level[LEVEL_CLOUD_VARIABLE], level_km, color=_LEVEL_COLOUR, label=level_label
        )
    for name, colour, label in zip(
        LAYER_CLOUD_VARIABLES, (_LAYER_COLOUR, _AREA_COLOUR), (layer_label, area_label), strict=True
    ):
        if name in panels.layer_cloud:
            x, z = step_profile(prof.layer[name], prof.bounds)
            cloud.plot(x, z / 1000.0, color=colour, lw=1.6, label=label)
    cloud.set_xlabel("cloud fraction (1)")
    cloud.set_xlim(-0.02, 1.02)
    for ax, name in zip(axes[1:], panels.fields, strict=True):
        f_lev, o_lev = _display(prof, name, 0)
        f_lay, o_lay = _display(prof, name, 1)
        ax.plot(f_lev * prof.level[name] + o_lev, level_km, color=_LEVEL_COLOUR, label=level_label)
        x, z = step_profile(f_lay * prof.layer[name] + o_lay, prof.bounds)
        ax.plot(x, z / 1000.0, color=_LAYER_COLOUR, lw=1.6, label=layer_label)
        symbol, units = _FIELD_DISPLAY[name][:2]
        ax.set_xlabel(f"{symbol} ({units})")
    for ax in axes:
        ax.grid(True, axis="x", alpha=0.3)
    axes[0].set_ylabel("height (km)")
    top = float(np.max(bounds_km))
    if level_km.size:
        top = max(top, float(np.nanmax(level_km)))
    axes[0].set_ylim(min(0.0, float(np.min(bounds_km))), 1.02 * top)
    handles: dict[str, Artist] = {}
    for ax in axes:
        for handle, label in zip(*ax.get_legend_handles_labels(), strict=True):
            handles.setdefault(label, handle)
    skipped = "; ".join(f"{k} (absent from {v})" for k, v in panels.skipped.items())
    fig.legend(
        list(handles.values()),
        list(handles),
        loc="outside lower center",
        ncols=1 if n < 3 else 2,
        fontsize="small",
        title=f"not drawn: {skipped}" if skipped else None,
        title_fontsize="small",
    )
    fig.suptitle(
        f"Case {prof.case}, scale {prof.scale}: LES levels and layer set {prof.layers} "
        f"({prof.weighting} weighting)\n{_mean_text(prof.n_times)}",
        fontsize="medium",
    )
    return fig


def case_layer_profiles(
    level_store: str | Path, layer_store: str | Path, out_png: str | Path
) -> Figure:
    """Mean profiles of one case on the LES levels beside those on a set of target layers.

    Parameters
    ----------
    level_store
        The case's store at one scale on the LES levels (``scale-<L>.zarr``).
    layer_store
        A layer store of the same case and scale (``scale-<L>_layers-<name>.zarr``).
    out_png
        PNG to write (atomically).

    Returns
    -------
    matplotlib.figure.Figure
        Axes sharing height (km), each a mean over time, y and x: cloud fraction first
        (``cloud_fraction`` on the LES levels as a line; ``cloud_volume_fraction`` and
        ``cloud_area_fraction`` of the layers as steps over each layer's bounds), then
        one axis per field of :data:`FIELD_VARIABLES` both stores hold (qc and qt in
        g kg-1, theta_l in K; the levels as a line, the layers as a step). Faint lines
        mark the layer interfaces; the legend title names any field not drawn.

    Raises
    ------
    InputError
        As :func:`read_layer_profiles`: neither store holds a cloud fraction, the stores
        disagree on case or scale, or a variable or the layer bounds are malformed.

    Examples
    --------
    >>> fig = case_layer_profiles(
    ...     "results/cases/sc-ostra-01/scale-400m.zarr",
    ...     "results/cases/sc-ostra-01/scale-400m_layers-l4.zarr",
    ...     "layers-l4_scale-400m.png",
    ... )
    >>> [ax.get_xlabel() for ax in fig.axes]
    ['cloud fraction (1)', 'qc (g kg$^{-1}$)', 'qt (g kg$^{-1}$)', '$\\\\theta_l$ (K)']
    >>> Path("layers-l4_scale-400m.png").stat().st_size > 0
    True
    """
    fig = _draw(read_layer_profiles(level_store, layer_store))
    save_png(fig, out_png)
    return fig

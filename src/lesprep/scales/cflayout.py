"""CF layout of the scale stores: dims, chunks, attributes and coarse-cell coordinates.

Attributes of moment and patch outputs come from the variable catalogue
(:mod:`lesprep.catalogue`): standard_name, label and units, variance units the square of
the field's; the fixed outputs (cloud fraction, GCM-view inputs, column quantities) have
their own entries here.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import xarray as xr

from lesprep import catalogue
from lesprep.canonical.mask import describe_threshold
from lesprep.raw.grid import horizontal_attrs
from lesprep.scales.layers import LayerGrid
from lesprep.scales.settings import CoarsenSettings
from lesprep.scales.spec import Scale
from lesprep.scales.step import GAUSSIAN_INPUTS, covariance_name, z_chunk_levels
from lesprep.store import (
    ArraySpec,
)


def _entry(name: str, canon: xr.Dataset | None) -> catalogue.Variable:
    attrs = canon[name].attrs if canon is not None and name in canon.variables else {}
    return catalogue.from_attrs(name, attrs)


def _covariance_attrs(a: str, b: str, canon: xr.Dataset | None) -> dict[str, str]:
    va, vb = _entry(a, canon), _entry(b, canon)
    attrs = {
        "long_name": f"sub-grid covariance of {va.label} and {vb.label}",
        "units": catalogue.product_units(va.units, vb.units),
        "comment": f"population covariance over the fine cells of the coarse cell: mean of "
        f"({a} - block mean of {a}) * ({b} - block mean of {b}); CF has no cell method for "
        "a covariance, so there is no cell_methods",
    }
    attrs.update(catalogue.temperature_metadata(attrs["units"], difference=True))
    return attrs


def output_attrs(
    name: str,
    s: Scale,
    threshold: float,
    *,
    threshold_units: str = "kg kg-1",
    canon: xr.Dataset | None = None,
    pairs: Sequence[tuple[str, str]] = (),
) -> dict[str, str]:
    """CF attributes of one scale-store output (``canon``: the canonical store, whose
    attributes describe variables the catalogue does not know; ``pairs``: the covariance
    pairs of the job)."""
    for a, b in pairs:
        if name == covariance_name(a, b):
            return _covariance_attrs(a, b, canon)
    base, _, kind = name.rpartition("_")
    table = {
        "cloud_fraction": {
            "standard_name": "cloud_area_fraction_in_atmosphere_layer",
            "long_name": "fraction of fine cells with "
            + describe_threshold(threshold, threshold_units),
            "units": "1",
            "cell_methods": "area: mean",
        },
        "cloud_fraction_zero": {
            "standard_name": "cloud_area_fraction_in_atmosphere_layer",
            "long_name": "fraction of fine cells with qc > 0 (zero threshold: the fraction a "
            "statistical scheme's P(s > 0) predicts)",
            "units": "1",
            "cell_methods": "area: mean",
        },
        "cf_gaussian": {
            "long_name": "Gaussian-PDF cloud fraction of a statistical scheme (Sommeria and "
            "Deardorff 1977; Mellor 1977) from the block means of qt, theta_l and p and the "
            "sub-grid variances and covariance of qt and theta_l",
            "units": "1",
            "comment": "the sub-grid (co)variances come from the LES: an upper bound on what a "
            "climate model could know; compare with cloud_fraction_zero",
        },
        "tke_sgs": {
            "long_name": "sub-grid turbulent kinetic energy 0.5 (u'u' + v'v' + w'w') of the "
            "coarse cell (population variances)",
            "units": "m2 s-2",
        },
        "rh_of_means": {
            "long_name": "relative humidity of the coarse means of qv, T and p (Bolton 1980)",
            "units": "1",
        },
        "drh_dz": {"long_name": "vertical derivative of rh_of_means", "units": "m-1"},
        "cf_sundqvist": {
            "long_name": "Sundqvist et al. (1989) cloud fraction from rh_of_means",
            "units": "1",
        },
        "lwp_mean": {
            "standard_name": "atmosphere_mass_content_of_cloud_liquid_water",
            "long_name": "block mean of liquid water path",
            "units": "kg m-2",
            "cell_methods": "area: mean",
        },
        "lwp_var": {
            "long_name": "sub-grid variance of liquid water path",
            "units": "kg2 m-4",
            "cell_methods": "area: variance",
        },
        "cloud_cover": {
            "standard_name": "cloud_area_fraction",
            "long_name": "fraction of fine columns with any cloudy cell",
            "units": "1",
            "cell_methods": "area: mean",
        },
        "p_mean": {
            "standard_name": "air_pressure",
            "long_name": "block mean of air pressure",
            "units": "Pa",
            "cell_methods": "area: mean",
        },
    }
    table.update(LAYER_FRACTION_ATTRS)
    if name in table:
        return dict(table[name])
    var = _entry(base, canon) if kind in ("mean", "var", "skew", "patch") else None
    if var is not None and kind == "mean":
        a = {"standard_name": var.standard_name} if var.standard_name else {}
        a.update(long_name=f"block mean of {var.label}", units=var.units)
        a["cell_methods"] = "area: mean"
        a.update(catalogue.temperature_metadata(var.units, difference=False))
        return a
    if var is not None and kind == "var":
        a = {
            "long_name": f"sub-grid (population) variance of {var.label}",
            "units": var.variance_units,
            "cell_methods": "area: variance",
        }
        a.update(catalogue.temperature_metadata(var.variance_units, difference=True))
        return a
    if var is not None and kind == "skew":
        return {
            "long_name": f"sub-grid skewness of {var.label} (g1 = m3 / m2**1.5; 0 "
            "where the block is constant)",
            "units": "1",
        }
    if var is not None and kind == "patch":
        return {
            "long_name": f"fine-grid {var.label} under the coarse cell "
            f"({s.factor} x {s.factor} fine cells)",
            "units": var.units,
            **catalogue.temperature_metadata(var.units, difference=False),
        }
    raise KeyError(f"no attributes for output {name!r}")


def output_dims(name: str, arr: Any) -> tuple[str, ...]:
    if name.endswith("_patch"):
        return ("time", "z", "y", "x", "py", "px")
    return {3: ("time", "z", "y", "x"), 2: ("time", "y", "x")}[arr.ndim]


def scale_layout(
    canon: xr.Dataset,
    s: Scale,
    sample: Mapping[str, Any],
    settings: CoarsenSettings,
    threshold: float,
    slab: int,
) -> dict[str, ArraySpec]:
    nt = canon.sizes["time"]
    dtype = np.dtype(settings.dtype)
    out: dict[str, ArraySpec] = {}
    for name, arr in sample.items():
        dims = output_dims(name, arr)
        shape = (nt, *arr.shape)
        if arr.ndim >= 3:
            zc = z_chunk_levels(arr.shape, dtype.itemsize, settings.chunk_mib, slab)
            chunks = (1, zc, *arr.shape[1:])
        else:
            chunks = (1, *arr.shape)
        zero_fill = name.startswith("qc_") or name in ("cloud_fraction", "lwp_mean", "lwp_var")
        out[name] = ArraySpec(
            dims=dims,
            shape=shape,
            chunks=chunks,
            dtype=dtype,
            attrs=output_attrs(
                name,
                s,
                threshold,
                threshold_units=str(canon.attrs.get("cloud_threshold_units", "kg kg-1")),
                canon=canon,
                pairs=[*settings.covariances, GAUSSIAN_INPUTS],
            ),
            fill_value=0.0 if zero_fill else None,
        )
    ny, nx = canon.sizes["y"] // s.factor, canon.sizes["x"] // s.factor
    L = s.length_m
    x0 = float(canon.x.values[0]) - s.dx / 2
    y0 = float(canon.y.values[0]) - s.dx / 2
    xb = x0 + L * np.stack([np.arange(nx), np.arange(1, nx + 1)], axis=1)
    yb = y0 + L * np.stack([np.arange(ny), np.arange(1, ny + 1)], axis=1)

    def coord(dims: tuple[str, ...], values: np.ndarray, attrs: Mapping[str, Any]) -> ArraySpec:
        values = np.asarray(values, dtype=np.float64)
        return ArraySpec(
            dims=dims,
            shape=values.shape,
            chunks=values.shape,
            dtype="float64",
            data=values,
            attrs=dict(attrs),
        )

    out["time"] = coord(("time",), canon.time.values, canon.time.attrs)
    out["z"] = coord(("z",), canon.z.values, canon.z.attrs)
    out["z_bounds"] = coord(("z", "nv"), canon.z_bounds.values, canon.z_bounds.attrs)
    for axis, bounds in (("y", yb), ("x", xb)):
        attrs = {
            **horizontal_attrs(axis, f"{axis} of coarse-cell centres"),
            "bounds": f"{axis}_bounds",
        }
        out[axis] = coord((axis,), bounds.mean(axis=1), attrs)
        out[f"{axis}_bounds"] = coord((axis, "nv"), bounds, {"units": "m"})
    return out


WEIGHTING_TEXT = {
    "mass": "weighted by dry-air mass",
    "thickness": "weighted by layer-overlap thickness",
}
"""How a layer store's vertical statistics are weighted, as cell_methods comments."""


def layer_attrs(name: str, attrs: Mapping[str, str], weighting: str, target: str) -> dict[str, str]:
    """Attributes of a 3-D layer-store output from its per-level attributes: the cell
    methods say the horizontal and the weighted vertical statistic (CF 7.3: ``area: z:
    mean``, the weighting as non-standardized information in parentheses, CF 7.3.3)."""
    how = WEIGHTING_TEXT[weighting]
    a = dict(attrs)
    if name == "cloud_fraction":
        copy = "cloud_volume_fraction" if target == "volume" else "cloud_area_fraction"
        a = layer_attrs(copy, LAYER_FRACTION_ATTRS[copy], weighting, target)
        a["comment"] = f"the training target: a copy of {copy} (coarsen.layers target)"
        if "standard_name" not in a:
            a["long_name"] = a["long_name"].replace("cloud volume fraction", "cloud fraction")
        return a
    if name == "cloud_area_fraction":
        return a  # a projected cover: an area mean of column flags, no vertical weights
    methods = a.get("cell_methods", "")
    if methods == "area: mean":
        a["cell_methods"] = f"area: z: mean ({how})"
    elif methods == "area: variance":
        a["cell_methods"] = f"area: z: variance ({how}; population)"
    if "long_name" in a:
        a["long_name"] = a["long_name"].replace("block mean", "block-and-layer mean")
    if "comment" not in a:
        a["comment"] = f"statistic over the whole 3-D cell (block x layer), {how}"
    return a


LAYER_FRACTION_ATTRS: dict[str, dict[str, str]] = {
    "cloud_volume_fraction": {
        "long_name": "cloud volume fraction: cloudy fine cells' share of the weight of the "
        "block and layer",
        "units": "1",
        "cell_methods": "area: mean",
        "comment": "no standard_name: the CF standard name table (v93) has none for a "
        "volume fraction of cloud (cloud_area_fraction_in_atmosphere_layer is the projected "
        "cover, stored as cloud_area_fraction)",
    },
    "cloud_area_fraction": {
        "standard_name": "cloud_area_fraction_in_atmosphere_layer",
        "long_name": "projected cloud cover of the layer: fraction of fine columns of the "
        "block with a cloudy cell at any fine level overlapping the layer",
        "units": "1",
        "cell_methods": "area: mean",
    },
}
"""Attributes of the two cloud fractions of a layer store (before :func:`layer_attrs`)."""


def layer_layout(
    canon: xr.Dataset,
    s: Scale,
    grid: LayerGrid,
    sample: Mapping[str, Any],
    settings: CoarsenSettings,
    threshold: float,
) -> dict[str, ArraySpec]:
    """Layout of a layer store: the scale store's layout on the layers of ``grid``, whose
    ``z`` is the layer centres with CF bounds at the interfaces."""
    spec = grid.spec
    out = scale_layout(canon, s, sample, settings, threshold, 1)
    for name, a in list(out.items()):
        if name in sample and "z" in a.dims:  # column quantities keep their attributes
            attrs = layer_attrs(name, a.attrs, spec.weighting, spec.target)
            out[name] = replace(a, attrs=attrs)
    zattrs = dict(canon.z.attrs)
    zattrs["long_name"] = f"height of the centres of target layers {spec.name!r}"
    zattrs["comment"] = "midpoint of each layer's interfaces (z_bounds)"
    for name, values, attrs in (
        ("z", grid.centres, zattrs),
        ("z_bounds", grid.bounds, {"units": "m"}),
    ):
        dims = ("z",) if values.ndim == 1 else ("z", "nv")
        out[name] = ArraySpec(
            dims=dims,
            shape=values.shape,
            chunks=values.shape,
            dtype="float64",
            data=values,
            attrs=attrs,
        )
    return out

"""Edits that turn a copied demo archive (flavour alpha) into a richer one: winds on x and y
faces, cloud ice given as a mass fraction, rain water in g/kg and a 2-D surface field, with
the variable map that reads them. Invented values, for tests only."""

from __future__ import annotations

import glob
from pathlib import Path

import netCDF4
import numpy as np
import yaml

from workflow_project import REPO

ALPHA = yaml.safe_load((REPO / "config/varmaps/flavour-alpha.yaml").read_text())


def add_rich_fields(raw: Path, rng: np.random.Generator) -> None:
    """Add ``uf`` (x faces, low side, with an ``xf`` coordinate), ``vf`` (y faces, high
    side, no coordinate), ``ice`` (mass fraction), ``rain`` (g/kg) and ``shf`` (2-D)."""
    for f in sorted(glob.glob(str(raw / "*.nc"))):
        with netCDF4.Dataset(f, "a") as nc:
            x, y = nc["x"][:], nc["y"][:]
            nc.createDimension("xf", x.size)
            nc.createDimension("yf", y.size)
            xf = nc.createVariable("xf", "f8", ("xf",))
            xf.units = "m"
            xf[:] = x - 0.5 * (x[1] - x[0])  # face i on the low side of cell i
            shape = nc["liq"].shape
            for name, dims, units, lo, hi in (
                ("uf", ("time", "zc", "y", "xf"), "m s-1", 2.0, 8.0),
                ("vf", ("time", "zc", "yf", "x"), "m s-1", -3.0, 3.0),
                ("ice", ("time", "zc", "y", "x"), "kg kg-1", 0.0, 1e-4),
                ("rain", ("time", "zc", "y", "x"), "g kg-1", 0.0, 0.05),
            ):
                v = nc.createVariable(name, "f4", dims)
                v.units = units
                v[:] = rng.uniform(lo, hi, shape)
            s = nc.createVariable("shf", "f4", ("time", "y", "x"))
            s.units = "W m-2"
            s[:] = rng.normal(20.0, 5.0, (1, *shape[2:]))


def rich_varmap() -> dict:
    """The alpha variable map plus the fields :func:`add_rich_fields` writes."""
    vm = {**ALPHA}
    vm["dims"] = {**ALPHA["dims"], "xf": "x_face", "yf": "y_face"}
    vm["coords"] = {**ALPHA["coords"], "x_face": {"raw": "xf"}}
    vm["variables"] = {
        **ALPHA["variables"],
        "u": {"raw": "uf", "dims": ["time", "zc", "y", "xf"]},
        "v": {"raw": "vf", "dims": ["time", "zc", "yf", "x"], "faces": {"y": "high"}},
        "qi": {"raw": "ice", "dims": ["time", "zc", "y", "x"], "quantity": "mass_fraction"},
        "qr": {"raw": "rain", "dims": ["time", "zc", "y", "x"]},
        "shf": {
            "raw": "shf",
            "dims": ["time", "y", "x"],
            "standard_name": "surface_upward_sensible_heat_flux",
            "long_name": "surface sensible heat flux",
        },
    }
    return vm

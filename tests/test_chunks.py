"""Threaded reading of deflate-compressed NetCDF4 variables, against netCDF4's own reads."""

from __future__ import annotations

import netCDF4
import numpy as np
import pytest

from conftest import REPO
from lesprep.canonical.ingest import ingest_case
from lesprep.demo import demo_case, write_demo_case
from lesprep.raw.chunks import chunk_layout, read_chunked
from lesprep.store import open_store
from settings_helpers import ingest_settings


def _netcdf4(path, name, lead=None):
    with netCDF4.Dataset(path) as nc:
        v = nc[name]
        v.set_auto_maskandscale(False)
        return np.asarray(v[...] if lead is None else v[lead])


@pytest.mark.parametrize("endian", ["native", "big"])
@pytest.mark.parametrize("shuffle", [True, False])
def test_reads_equal_netcdf4(tmp_path, endian, shuffle):
    # edge chunks (7 and 10 are not multiples of the chunk sizes), a chunk never written
    # (it holds the fill value) and both byte orders
    f = tmp_path / "a.nc"
    rng = np.random.default_rng(1)
    with netCDF4.Dataset(f, "w") as nc:
        for name, size in (("t", 4), ("z", 7), ("y", 10), ("x", 9)):
            nc.createDimension(name, size)
        v = nc.createVariable(
            "f",
            ">f4" if endian == "big" else "f4",
            ("t", "z", "y", "x"),
            zlib=True,
            shuffle=shuffle,
            endian=endian,
            chunksizes=(1, 3, 4, 5),
            fill_value=-999.0,
        )
        v[:3] = rng.normal(size=(3, 7, 10, 9)).astype("f4")  # time 3 never written
        w = nc.createVariable("d", "f8", ("z", "y"), zlib=True, chunksizes=(2, 3))
        w[:] = rng.normal(size=(7, 10))
    layout = chunk_layout(f, "f")
    assert layout is not None
    for lead in (0, 2, 3):
        np.testing.assert_array_equal(read_chunked(f, layout, lead=lead), _netcdf4(f, "f", lead))
    np.testing.assert_array_equal(read_chunked(f, layout), _netcdf4(f, "f"))
    np.testing.assert_array_equal(read_chunked(f, chunk_layout(f, "d")), _netcdf4(f, "d"))
    assert read_chunked(f, layout, lead=3).dtype.isnative


def test_other_pipelines_are_left_to_netcdf4(tmp_path):
    f = tmp_path / "b.nc"
    with netCDF4.Dataset(f, "w") as nc:
        nc.createDimension("x", 10)
        nc.createVariable("plain", "f4", ("x",))[:] = np.arange(10)
        nc.createVariable("check", "f4", ("x",), zlib=True, fletcher32=True)[:] = np.arange(10)
    assert chunk_layout(f, "plain") is None and chunk_layout(f, "check") is None


def test_compressed_archive_ingests_like_the_plain_one(tmp_path):
    spec = demo_case("sc-ostra-01").with_size(nx=24, ny=24, nz=16, ntimes=3)
    plain = write_demo_case(spec, tmp_path / "plain")
    packed = write_demo_case(spec, tmp_path / "packed", compress=True)
    with netCDF4.Dataset(sorted(packed.glob("*.nc"))[0]) as nc:
        assert nc["liq"].filters()["zlib"]
    varmap = REPO / "config/varmaps/flavour-alpha.yaml"
    stores = [
        ingest_case(
            case="c",
            raw=str(folder / "*.nc"),
            varmap=varmap,
            settings=ingest_settings(spinup="0 s"),
            out=tmp_path / f"{folder.parent.name}.zarr",
        )
        for folder in (plain, packed)
    ]
    a, b = (open_store(s) for s in stores)
    for name in ("qc", "qv", "T", "w", "p", "rh", "cloud_mask", "lwp"):
        np.testing.assert_array_equal(a[name].values, b[name].values)

"""Inspect proposes the optional qi, qr, u and v; staggered u and v get their face side.

Constructed NetCDF files (netCDF4 directly) with invented names; the face sides checked
here follow from the coordinates the test writes (face i at x_i -/+ dx/2).
"""

from __future__ import annotations

from pathlib import Path

import netCDF4
import numpy as np
import yaml

from lesprep.raw.archive import index_archive, read_field
from lesprep.raw.grid import destagger_horizontal, face_side
from lesprep.raw.survey import draft_varmap, inspect_files
from lesprep.raw.varmap import parse_varmap
from settings_helpers import ingest_settings

NT, NZ, N = 2, 6, 8
DX = 50.0


def write_staggered(
    path: Path,
    *,
    x_side: str = "low",
    y_side: str = "high",
    standard_names: bool = False,
    x_closed: bool = False,
) -> Path:
    """The required five at centres, cloud ice ``qice``, rain ``qrain``, ``uvel`` on x
    faces, ``vvel`` on y faces (no names telling what they are beyond the short name)
    and a surface friction velocity ``u_star`` (time, y, x) as a distractor. The face
    dimensions have n points (periodic faces), or with ``x_closed`` n + 1 x faces from
    0 to the domain length (the end face repeated)."""
    rng = np.random.default_rng(3)
    zc = (np.arange(NZ) + 0.5) * 40.0
    xc = (np.arange(N) + 0.5) * DX
    faces = {"low": xc - DX / 2, "high": xc + DX / 2}
    nxf = N + 1 if x_closed else N
    xf = np.arange(N + 1) * DX if x_closed else faces[x_side]
    with netCDF4.Dataset(path, "w") as nc:
        for name, size in (("time", NT), ("z", NZ), ("y", N), ("x", N), ("yf", N), ("xf", nxf)):
            nc.createDimension(name, size)

        def var(name, dims, values, dtype="f4", **attrs):
            v = nc.createVariable(name, dtype, dims)
            v.setncatts(attrs)
            v[:] = values

        var("time", ("time",), 60.0 * np.arange(NT), "f8", units="s", axis="T")
        var("z", ("z",), zc, "f8", units="m", axis="Z")
        var("y", ("y",), xc, "f8", units="m", axis="Y")
        var("x", ("x",), xc, "f8", units="m", axis="X")
        var("yf", ("yf",), faces[y_side], "f8", units="m", axis="Y")
        var("xf", ("xf",), xf, "f8", units="m", axis="X")
        shape = (NT, NZ, N, N)
        c4 = ("time", "z", "y", "x")
        var("qc", c4, np.clip(rng.normal(0, 2e-4, shape), 0, None), units="kg kg-1")
        var("qv", c4, 0.008 + rng.normal(0, 1e-4, shape), units="kg kg-1")
        var("tabs", c4, 290.0 + rng.normal(0, 0.1, shape), units="K")
        var("p", c4, np.full(shape, 95000.0), units="Pa")
        var("w", c4, rng.normal(0, 0.5, shape), units="m s-1")
        std = (
            {
                "qice": {"standard_name": "cloud_ice_mixing_ratio"},
                "qrain": {"standard_name": "mass_fraction_of_rain_in_air"},
                "uvel": {"standard_name": "x_wind"},
                "vvel": {"standard_name": "y_wind"},
            }
            if standard_names
            else {}
        )
        var("qice", c4, np.full(shape, 1e-5), units="kg kg-1", **std.get("qice", {}))
        var("qrain", c4, np.full(shape, 2e-5), units="kg kg-1", **std.get("qrain", {}))
        uvel = rng.normal(5.0, 1.0, (NT, NZ, N, nxf))
        uvel[..., N:] = uvel[..., :1]  # with n + 1 faces, face n repeats face 0
        var("uvel", ("time", "z", "y", "xf"), uvel, units="m s-1", **std.get("uvel", {}))
        vvel = rng.normal(-1.0, 1.0, shape)
        var("vvel", ("time", "z", "yf", "x"), vvel, units="m s-1", **std.get("vvel", {}))
        var(
            "u_star",
            ("time", "y", "x"),
            np.full((NT, N, N), 0.3),
            units="m s-1",
            long_name="surface friction velocity",
        )
    return path


def test_optional_variables_by_short_name(tmp_path):
    report = inspect_files([write_staggered(tmp_path / "a.nc")])
    roles = {d.name: d.role for d in report.dims.values()}
    assert roles["xf"] == "x_face" and roles["yf"] == "y_face"
    got = {c: (p.raw, p.dims) for c, p in report.proposals.items()}
    assert got["qi"] == ("qice", ("time", "z", "y", "x"))
    assert got["qr"] == ("qrain", ("time", "z", "y", "x"))
    assert got["u"] == ("uvel", ("time", "z", "y", "xf"))
    assert got["v"] == ("vvel", ("time", "z", "yf", "x"))
    # the required five are unchanged, and u_star is nobody's
    assert [got[c][0] for c in ("qc", "qv", "T", "p", "w")] == ["qc", "qv", "tabs", "p", "w"]
    assert "u_star" not in {p.raw for p in report.proposals.values()}
    # written with face i at x_i - dx/2 (low) and y_j + dy/2 (high)
    assert report.proposals["u"].faces == {"x": "low"}
    assert report.proposals["v"].faces == {"y": "high"}
    assert "x faces on the low side" in report.summary()


def test_optional_variables_by_standard_name_and_quantity(tmp_path):
    report = inspect_files([write_staggered(tmp_path / "a.nc", standard_names=True)])
    p = report.proposals
    assert (p["qi"].raw, p["qi"].quantity) == ("qice", "direct")
    assert (p["qr"].raw, p["qr"].quantity) == ("qrain", "mass_fraction")
    assert any("standard_name x_wind" in r for r in p["u"].reasons)
    assert any("standard_name y_wind" in r for r in p["v"].reasons)


def test_velocity_on_x_faces_without_a_telling_name(tmp_path):
    f = write_staggered(tmp_path / "a.nc", x_side="high")
    with netCDF4.Dataset(f, "a") as nc:
        nc.renameVariable("uvel", "fld1")
        nc.renameVariable("vvel", "fld2")
    report = inspect_files([f])
    u, v = report.proposals["u"], report.proposals["v"]
    assert (u.raw, u.faces) == ("fld1", {"x": "high"})
    assert (v.raw, v.faces) == ("fld2", {"y": "high"})
    assert any("staggered x dimension" in r for r in u.reasons)
    # the same name at cell centres is no wind component
    with netCDF4.Dataset(f, "a") as nc:
        nc.createVariable("fld3", "f4", ("time", "z", "y", "x")).units = "m s-1"
    assert "fld3" not in {p.raw for p in inspect_files([f]).proposals.values()}


def test_weak_evidence_is_not_proposed(tmp_path):
    f = write_staggered(tmp_path / "a.nc")
    with netCDF4.Dataset(f, "a") as nc:
        nc.renameVariable("qice", "ice_frac")  # a fraction, not a mixing ratio
        nc.renameVariable("qrain", "precip_rain")  # precipitation (a flux or amount)
    report = inspect_files([f])
    assert "qi" not in report.proposals and "qr" not in report.proposals
    assert not any("qi" in n or "qr" in n for n in report.notes)  # optional: no nagging


def test_draft_maps_optional_variables_with_faces(tmp_path):
    f = write_staggered(tmp_path / "a.nc")
    text = draft_varmap(inspect_files([f]))
    vm = parse_varmap(text)
    draft = yaml.safe_load(text)
    assert draft["coords"]["x_face"] == {"raw": "xf"}
    assert draft["coords"]["y_face"] == {"raw": "yf"}
    assert draft["variables"]["u"] == {
        "raw": "uvel",
        "dims": ["time", "z", "y", "xf"],
        "faces": {"x": "low"},
    }
    assert draft["variables"]["v"]["faces"] == {"y": "high"}
    assert draft["variables"]["qi"] == {"raw": "qice", "dims": ["time", "z", "y", "x"]}
    # read through the archive index with the drafted map: the face coordinate agrees with
    # the stated side, and u at centres is the mean of faces i and i + 1 (x faces on the
    # low side: face i at x_i - dx/2), the last cell wrapping to face 0
    st = ingest_settings(spinup="0 s")
    cat = index_archive(
        [f],
        vm,
        case="c",
        time_gaps=st.time_gaps,
        duplicate_times=st.duplicate_times,
        restart_order=st.restart_order,
    )
    try:
        raw, file, _, _ = read_field(cat, "u", 1)
        side = face_side(
            stated=vm.variables["u"].faces.get("x"),
            face_coord=cat.grid.x_face,
            centre_coord=cat.grid.x,
            axis_name="x",
            variable="uvel",
            file=file,
        )
        assert side == "low"
        got = destagger_horizontal(raw, axis=2, faces=side, n_centres=N)
    finally:
        cat.close()
    with netCDF4.Dataset(f) as nc:
        a = np.asarray(nc["uvel"][1], dtype=np.float64)
    want = 0.5 * (a + np.concatenate([a[..., 1:], a[..., :1]], axis=-1))
    np.testing.assert_allclose(got, want, rtol=0, atol=0)


def test_closed_faces_are_low(tmp_path):
    report = inspect_files([write_staggered(tmp_path / "a.nc", x_closed=True)])
    assert report.dims["xf"].role == "x_face" and "one more point" in report.dims["xf"].reason
    assert report.proposals["u"].faces == {"x": "low"}  # faces 0, 50, ..., 400 m


def test_draft_flags_faces_it_cannot_place(tmp_path):
    f = write_staggered(tmp_path / "a.nc", x_closed=True)
    with netCDF4.Dataset(f, "a") as nc:
        nc["xf"][:] = nc["xf"][:] + DX / 4  # a quarter cell off: no side
    report = inspect_files([f])
    assert report.proposals["u"].faces == {}
    assert any("'xf'" in n and "half a cell" in n for n in report.notes)
    line = next(ln for ln in draft_varmap(report).splitlines() if ln.startswith("  u:"))
    assert "# CHECK: add faces: {x: low|high}" in line

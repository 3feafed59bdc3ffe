"""Layer-profile figure: profile means against xarray, steps against z_bnds, skips, errors.

The two stores are written here with xarray (random fields on a uniform LES grid and on
stretched layers, in the layout the coarsening step writes); every checked mean is
recomputed by xarray's own ``mean`` over ``("time", "y", "x")`` of the store as opened
with ``xr.open_zarr``.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from lesprep.errors import InputError
from lesprep.layout import ResultsLayout
from lesprep.report import layer_figures as lf

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2
NT, NY, NX = 3, 4, 5
LEVEL_Z = 25.0 + 50.0 * np.arange(24)  # LES cell centres, 0 to 1200 m
LAYER_EDGES = np.array([0.0, 40.0, 100.0, 190.0, 320.0, 500.0, 760.0, 1200.0])  # stretched
FRACTIONS = ("cloud_fraction", "cloud_volume_fraction", "cloud_area_fraction")
UNITS = {"qc_mean": "kg kg-1", "qt_mean": "kg kg-1", "theta_l_mean": "K"}
SCALES = {"qc_mean": 1e-3, "qt_mean": 1e-2, "theta_l_mean": 300.0}


def _field(rng: np.random.Generator, name: str, nz: int) -> np.ndarray:
    values = rng.random((NT, nz, NY, NX))
    if name == "theta_l_mean":
        values = 290.0 + 20.0 * values
    elif name in SCALES:
        values = SCALES[name] * values
    return values.astype(np.float32)


def _write(ds: xr.Dataset, path: Path) -> Path:
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata.*")
        warnings.filterwarnings("ignore", message=".*not part of the Zarr format 3.*")
        ds.to_zarr(path, zarr_format=3, consolidated=True, mode="w")
    return path


def _store(
    path: Path,
    z: np.ndarray,
    bounds: np.ndarray,
    bounds_name: str,
    names: tuple[str, ...],
    attrs: dict[str, str],
    seed: int,
) -> Path:
    rng = np.random.default_rng(seed)
    dims = ("time", "z", "y", "x")
    data = {}
    for name in names:
        values = _field(rng, name, z.size)
        data[name] = xr.Variable(dims, values, {"units": UNITS.get(name, "1")})
    ds = xr.Dataset(
        data,
        coords={
            "time": ("time", 3600.0 * np.arange(1, NT + 1), {"units": "s"}),
            "z": (
                "z",
                z,
                {
                    "standard_name": "height",
                    "units": "m",
                    "positive": "up",
                    "bounds": bounds_name,
                },
            ),
            bounds_name: (("z", "nv"), bounds),
            "y": ("y", 250.0 + 500.0 * np.arange(NY), {"units": "m"}),
            "x": ("x", 250.0 + 500.0 * np.arange(NX), {"units": "m"}),
        },
        attrs=attrs,
    )
    return _write(ds, path)


def make_stores(
    root: Path,
    *,
    level_names: tuple[str, ...] = ("cloud_fraction", "qc_mean", "qt_mean", "theta_l_mean"),
    layer_names: tuple[str, ...] = (
        "cloud_fraction",
        "cloud_volume_fraction",
        "cloud_area_fraction",
        "qc_mean",
        "qt_mean",
        "theta_l_mean",
    ),
    level_attrs: dict[str, str] | None = None,
    layer_attrs: dict[str, str] | None = None,
    layer_edges: np.ndarray = LAYER_EDGES,
) -> tuple[Path, Path]:
    """A level store and a layer store of case c-1 at scale 500m in ``root``."""
    case = root / "cases" / "c-1"
    level_bounds = np.stack([LEVEL_Z - 25.0, LEVEL_Z + 25.0], axis=1)
    level = _store(
        case / "scale-500m.zarr",
        LEVEL_Z,
        level_bounds,
        "z_bounds",
        level_names,
        {"case": "c-1", "scale": "500m"} if level_attrs is None else level_attrs,
        seed=1,
    )
    bounds = np.stack([layer_edges[:-1], layer_edges[1:]], axis=1)
    attrs = {"case": "c-1", "scale": "500m", "layers": "l7", "vertical_weighting": "mass"}
    layer = _store(
        case / "scale-500m_layers-l7.zarr",
        bounds.mean(axis=1),
        bounds,
        "z_bnds",
        layer_names,
        attrs if layer_attrs is None else layer_attrs,
        seed=2,
    )
    return level, layer


def xarray_mean(path: Path, name: str) -> np.ndarray:
    """The reference: xarray's mean over time, y and x (NaN skipped)."""
    with xr.open_zarr(path, consolidated=True, zarr_format=3) as ds:
        return ds[name].mean(("time", "y", "x")).values.astype(np.float64)


@pytest.fixture
def stores(tmp_path) -> tuple[Path, Path]:
    return make_stores(tmp_path)


def lines_by_label(ax) -> dict[str, np.ndarray]:
    """x and y data of each labelled line of an axis, as a (2, n) array."""
    return {
        line.get_label(): np.vstack([line.get_xdata(), line.get_ydata()]).astype(np.float64)
        for line in ax.get_lines()
        if not line.get_label().startswith("_")
    }


# --------------------------------------------------------------------------- computation


def test_profile_means_match_xarray(stores):
    level, layer = stores
    prof = lf.read_layer_profiles(level, layer)
    assert sorted(prof.level) == ["cloud_fraction", "qc_mean", "qt_mean", "theta_l_mean"]
    assert sorted(prof.layer) == [
        "cloud_area_fraction",
        "cloud_volume_fraction",
        "qc_mean",
        "qt_mean",
        "theta_l_mean",
    ]
    for name, values in prof.level.items():
        assert values.shape == (LEVEL_Z.size,)
        np.testing.assert_allclose(values, xarray_mean(level, name), rtol=1e-6, err_msg=name)
    for name, values in prof.layer.items():
        assert values.shape == (LAYER_EDGES.size - 1,)
        np.testing.assert_allclose(values, xarray_mean(layer, name), rtol=1e-6, err_msg=name)
    # the level and layer profiles differ (two independent random stores): a mix-up fails
    assert not np.allclose(
        prof.layer["qc_mean"], prof.level["qc_mean"][: prof.layer["qc_mean"].size]
    )
    np.testing.assert_array_equal(prof.level_z, LEVEL_Z)
    assert (prof.case, prof.scale, prof.layers, prof.weighting) == ("c-1", "500m", "l7", "mass")
    assert prof.n_times == (NT, NT)


def test_mean_profile_skips_nan_and_any_dimension_order():
    rng = np.random.default_rng(5)
    values = rng.random((NT, 6, NY, NX))
    values[0, 1, 2, 3] = np.nan
    values[:, 4] = np.nan  # a level with no finite value
    ds = xr.Dataset({"a": (("time", "z", "y", "x"), values)})
    ds = ds.transpose("x", "time", "y", "z")
    got = lf.mean_profile(ds, "a")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # mean of the all-NaN level
        want = ds["a"].mean(("time", "y", "x")).values
    np.testing.assert_allclose(got, want, rtol=1e-12)
    assert np.isnan(got[4]) and np.isfinite(got[1])


def test_mean_profile_rejects_other_dimensions(tmp_path):
    ds = xr.Dataset({"a": (("time", "z", "cell"), np.zeros((2, 3, 4)))})
    with pytest.raises(InputError) as err:
        lf.mean_profile(ds, "a", tmp_path / "s.zarr")
    text = str(err.value)
    assert "s.zarr" in text and "'a'" in text and "('time', 'z', 'cell')" in text
    with pytest.raises(InputError, match=r"'qc_mean'.*is missing"):
        lf.mean_profile(ds, "qc_mean", tmp_path / "s.zarr")


def test_steps_follow_z_bnds(stores):
    level, layer = stores
    prof = lf.read_layer_profiles(level, layer)
    with xr.open_zarr(layer, consolidated=True, zarr_format=3) as ds:
        z_bnds = ds["z_bnds"].values.astype(np.float64)
    np.testing.assert_array_equal(prof.bounds, z_bnds)
    values = prof.layer["cloud_area_fraction"]
    x, z = lf.step_profile(values, prof.bounds)
    # contiguous layers: (value_k, lower_k), (value_k, upper_k), no break between them
    np.testing.assert_array_equal(z, z_bnds.ravel())
    np.testing.assert_array_equal(x, np.repeat(values, 2))
    thickness = z[1::2] - z[0::2]
    np.testing.assert_allclose(thickness, np.diff(LAYER_EDGES))
    assert np.unique(np.round(thickness)).size == thickness.size  # stretched: all differ


def test_steps_break_at_gaps_and_sort_layers():
    values = [0.3, 0.1, 0.2]
    bounds = [[100.0, 250.0], [0.0, 100.0], [300.0, 400.0]]  # unsorted, gap 250-300 m
    x, z = lf.step_profile(values, bounds)
    np.testing.assert_array_equal(x[:4], [0.1, 0.1, 0.3, 0.3])
    np.testing.assert_array_equal(z[:4], [0.0, 100.0, 100.0, 250.0])
    assert np.isnan(x[4]) and np.isnan(z[4])
    np.testing.assert_array_equal(z[5:], [300.0, 400.0])
    np.testing.assert_array_equal(x[5:], [0.2, 0.2])


@pytest.mark.parametrize(
    ("values", "bounds", "match"),
    [
        ([0.1, 0.2], [[0.0, 1.0]], r"values \(2,\) and bounds \(1, 2\)"),
        ([0.1], [[5.0, 5.0]], r"layer 0 has bounds \[5.0, 5.0\]; expected lower < upper"),
    ],
)
def test_steps_reject_bad_bounds(values, bounds, match):
    with pytest.raises(ValueError, match=match):
        lf.step_profile(values, bounds)


def test_layer_bounds_errors(tmp_path):
    path = tmp_path / "scale-500m_layers-l2.zarr"
    ds = xr.Dataset(coords={"z": ("z", [50.0, 200.0], {"bounds": "z_bnds"})})
    with pytest.raises(InputError) as err:
        lf.layer_bounds(ds, path)
    assert "z_bnds" in str(err.value) and path.name in str(err.value)
    ds["z_bnds"] = (("z", "nv"), [[0.0, 100.0], [300.0, 400.0]])  # centre 200 m outside
    with pytest.raises(InputError, match=r"layer 1 has centre z = 200.0 outside"):
        lf.layer_bounds(ds, path)
    ds["z_bnds"] = (("z", "nv"), [[0.0, 100.0], [300.0, 100.0]])
    with pytest.raises(InputError, match=r"layer 1 has bounds \[300.0, 100.0\]"):
        lf.layer_bounds(ds, path)


def test_plan_panels_skips_fields_absent_from_either_store():
    panels = lf.plan_panels(
        ["cloud_fraction", "qc_mean", "qt_mean"], ["cloud_volume_fraction", "qc_mean"]
    )
    assert panels.level_cloud and panels.layer_cloud == ("cloud_volume_fraction",)
    assert panels.fields == ("qc_mean",)
    assert panels.skipped == {"qt_mean": "the layers store", "theta_l_mean": "both stores"}


# --------------------------------------------------------------------------- figure


def test_figure_draws_the_profiles_and_writes_a_png(stores, tmp_path):
    level, layer = stores
    out = ResultsLayout(tmp_path / "results").layer_figure("c-1", "500m", "l7")
    fig = lf.case_layer_profiles(level, layer, out)
    data = out.read_bytes()
    assert data[:8] == PNG_SIGNATURE and len(data) > 10_000
    assert not list(out.parent.glob(".*tmp*"))  # the temporary sibling was renamed
    assert len(fig.axes) == 4
    cloud, qc, qt, theta = fig.axes
    z_km = LEVEL_Z / 1000.0
    step_z_km = np.stack([LAYER_EDGES[:-1], LAYER_EDGES[1:]], axis=1).ravel() / 1000.0

    lines = lines_by_label(cloud)
    assert len(lines) == 3
    level_line = lines["LES levels"]
    np.testing.assert_allclose(level_line[0], xarray_mean(level, "cloud_fraction"), rtol=1e-6)
    np.testing.assert_allclose(level_line[1], z_km)
    volume = next(v for k, v in lines.items() if "volume" in k)
    area = next(v for k, v in lines.items() if "area" in k)
    for name, line in (("cloud_volume_fraction", volume), ("cloud_area_fraction", area)):
        np.testing.assert_allclose(line[0], np.repeat(xarray_mean(layer, name), 2), rtol=1e-6)
        np.testing.assert_allclose(line[1], step_z_km)

    for ax, name, factor in (
        (qc, "qc_mean", 1e3),
        (qt, "qt_mean", 1e3),
        (theta, "theta_l_mean", 1),
    ):
        lines = lines_by_label(ax)
        assert len(lines) == 2, name
        level_line = lines["LES levels"]
        layer_line = next(v for k, v in lines.items() if k != "LES levels")
        np.testing.assert_allclose(level_line[0], factor * xarray_mean(level, name), rtol=1e-6)
        np.testing.assert_allclose(
            layer_line[0], factor * np.repeat(xarray_mean(layer, name), 2), rtol=1e-6
        )
        np.testing.assert_allclose(layer_line[1], step_z_km)
    assert "g kg$^{-1}$" in qc.get_xlabel() and "(K)" in theta.get_xlabel()
    assert cloud.get_ylabel() == "height (km)"
    title = fig.get_suptitle()
    for word in ("c-1", "500m", "l7", "mass", "means over time", "y and x"):
        assert word in title, word
    assert fig.legends and fig.legends[0].get_title().get_text() == ""


def test_figure_skips_fields_absent_from_either_store(tmp_path):
    level, layer = make_stores(
        tmp_path,
        level_names=("cloud_fraction", "qc_mean", "qt_mean"),
        layer_names=("cloud_area_fraction", "qc_mean", "theta_l_mean"),
    )
    fig = lf.case_layer_profiles(level, layer, tmp_path / "f.png")
    assert len(fig.axes) == 2
    assert "qc" in fig.axes[1].get_xlabel()
    labels = list(lines_by_label(fig.axes[0]))
    assert "LES levels" in labels and not any("volume" in k for k in labels)
    skipped = fig.legends[0].get_title().get_text()
    assert "qt_mean (absent from the layers store)" in skipped
    assert "theta_l_mean (absent from the LES levels store)" in skipped


def test_figure_without_any_cloud_fraction_is_refused(tmp_path):
    level, layer = make_stores(
        tmp_path, level_names=("qc_mean",), layer_names=("cloud_fraction", "qc_mean")
    )
    out = tmp_path / "f.png"
    with pytest.raises(InputError) as err:
        lf.case_layer_profiles(level, layer, out)
    text = str(err.value)
    assert str(level) in text and str(layer) in text
    assert "'cloud_fraction'" in text and "cloud_volume_fraction" in text
    assert "cloud_area_fraction" in text and "scale-<L>_layers-<name>.zarr" in text
    assert not out.exists()


def test_layer_cloud_alone_is_enough(tmp_path):
    level, layer = make_stores(
        tmp_path, level_names=("qc_mean",), layer_names=("cloud_volume_fraction", "qc_mean")
    )
    fig = lf.case_layer_profiles(level, layer, tmp_path / "f.png")
    labels = list(lines_by_label(fig.axes[0]))
    assert len(labels) == 1 and "volume" in labels[0]


def test_stores_of_different_cases_are_refused(tmp_path):
    level, layer = make_stores(tmp_path, level_attrs={"case": "c-2", "scale": "500m"})
    with pytest.raises(InputError) as err:
        lf.read_layer_profiles(level, layer)
    text = str(err.value)
    assert "'case'" in text and "'c-2'" in text and "'c-1'" in text and str(level) in text


def test_layer_figure_path():
    layout = ResultsLayout("results")
    path = layout.layer_figure("c-1", "500m", "l7")
    assert path == Path("results/figures/cases/c-1/layers-l7_scale-500m.png")
    assert path != layout.layer_figure("c-1", "500m", "l30")
    assert path != layout.layer_figure("c-1", "1000m", "l7")

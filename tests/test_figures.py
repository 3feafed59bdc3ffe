"""Report figures and tables: what is drawn, checked against numpy, xarray, scipy, netCDF4.

The stores come from the package's own pipeline (ingest, coarsen, assemble) on the small
synthetic demo cases of ``conftest.py``; every checked number is recomputed here from the
stores or the raw files with the reference libraries named beside it.
"""

from __future__ import annotations

import math
import struct
from pathlib import Path

import netCDF4
import numpy as np
import pandas as pd
import pytest
import scipy.stats
from docutils.core import publish_doctree
from docutils.nodes import row as rst_row
from docutils.nodes import system_message
from matplotlib.collections import QuadMesh
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle, StepPatch

from lesprep.canonical.ingest import ingest_case
from lesprep.errors import InputError
from lesprep.report import figures, scene_tables, skill, tables
from lesprep.scales.coarsen import coarsen_case
from lesprep.scales.spec import parse_scales
from lesprep.sets.assemble import build_set
from lesprep.sets.splits import Assignment, write_assignment_tsv
from lesprep.store import open_store
from settings_helpers import coarsen_settings, ingest_settings, set_settings

REPO = Path(__file__).resolve().parents[1]
FLAVOUR = {
    "sc-ostra-01": "alpha",
    "sc-ostra-02": "beta",
    "cu-marro-01": "alpha",
    "cu-marro-02": "beta",
}
REGIME = {c: ("cumulus" if c.startswith("cu") else "stratocumulus") for c in FLAVOUR}
SPLIT = {"sc-ostra-01": "test", "sc-ostra-02": "train", "cu-marro-01": "train"}
SPLIT["cu-marro-02"] = "test"
SPINUP_S = 3600.0
RH_CRITICAL = 0.7  # not the 0.8 default, so the figure must read it from provenance
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


@pytest.fixture(scope="module")
def tree(tmp_path_factory, demo_root):
    """Canonical, scale and set stores plus splits.tsv of four demo cases."""
    out = tmp_path_factory.mktemp("tree")
    ingest = ingest_settings(
        spinup="1 h",
        cloud_threshold="1e-5 kg/kg",
    )
    coarsen = coarsen_settings(
        scales=tuple(parse_scales(["300 m"])), patch_scales=(), rh_critical=RH_CRITICAL
    )
    canon, scale = {}, {}
    for case, flavour in FLAVOUR.items():
        canon[case] = ingest_case(
            case=case,
            raw=str(demo_root / case / "*.nc"),
            varmap=REPO / f"config/varmaps/flavour-{flavour}.yaml",
            settings=ingest,
            out=out / "cases" / case / "canonical.zarr",
            regime=REGIME[case],
        )
        scale[case] = coarsen_case(
            canon[case], {"300m": out / "cases" / case / "scale-300m.zarr"}, coarsen
        )["300m"]
    sets = {}
    for split in ("train", "test"):
        members = sorted(c for c, s in SPLIT.items() if s == split)
        sets[split] = build_set(
            {c: scale[c] for c in members},
            REGIME,
            out / "sets" / split / "scale-300m.zarr",
            set_settings(shuffle=True, shuffle_seed=3, chunk_mib=0.05),
            split=split,
            scale="300m",
        )
    splits = out / "splits.tsv"
    write_assignment_tsv(
        [
            Assignment(case=c, regime=REGIME[c], split=SPLIT[c], reason="pinned", u=0.5)
            for c in FLAVOUR
        ],
        splits,
    )
    return {"root": out, "canon": canon, "sets": sets, "splits": splits, "raw": demo_root}


def check_png(path: Path, fig: Figure) -> None:
    """A complete PNG of the figure's pixel size (IHDR: width, height at bytes 16-24)."""
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR" and data.endswith(b"IEND\xaeB`\x82")
    width, height = struct.unpack(">II", data[16:24])
    w_in, h_in = fig.get_size_inches()
    assert (width, height) == (round(w_in * fig.dpi), round(h_in * fig.dpi))
    assert 400 <= width <= 2000 and 300 <= height <= 2000
    assert len(data) > 10_000  # an empty canvas of this size compresses to a few kB


def first_raw_time_s(case_dir: Path) -> float:
    """Earliest output time of a raw archive, decoded with netCDF4.num2date."""
    first = math.inf
    origin = None
    for f in sorted(case_dir.glob("*.nc")):
        with netCDF4.Dataset(f) as nc:
            if "time" not in nc.variables or "time" not in nc.variables["time"].dimensions:
                continue
            t = nc.variables["time"]
            if " since " in t.units:
                dates = netCDF4.num2date(t[:], t.units, only_use_cftime_datetimes=False)
                origin = netCDF4.num2date(0.0, t.units, only_use_cftime_datetimes=False)
                secs = [(d - origin).total_seconds() for d in dates]
            else:  # plain seconds since the start of the run
                assert t.units == "s"
                secs = list(np.asarray(t[:], dtype=np.float64))
            first = min(first, *secs)
    return first


# --------------------------------------------------------------------------- per case


@pytest.mark.parametrize("case", ["sc-ostra-01", "sc-ostra-02"])
def test_timeseries_shades_spinup_and_plots_domain_means(tree, tmp_path, case):
    out = tmp_path / "ts.png"
    fig = figures.case_timeseries(tree["canon"][case], None, None, out)
    check_png(out, fig)
    ax_cover, ax_lwp = fig.axes
    assert "(1)" in ax_cover.get_ylabel() and "kg m$^{-2}$" in ax_lwp.get_ylabel()
    assert ax_lwp.get_xlabel().endswith("(h)")
    t0 = first_raw_time_s(tree["raw"] / case)  # alpha: 0 s, beta: 900 s after the origin
    for ax in (ax_cover, ax_lwp):
        spans = [p for p in ax.patches if p.get_label() == "spin-up (dropped)"]
        assert len(spans) == 1 and isinstance(spans[0], Rectangle)
        x0, width = spans[0].get_x(), spans[0].get_width()
        assert x0 == pytest.approx(t0 / 3600.0) and width == pytest.approx(SPINUP_S / 3600.0)
    ds = open_store(tree["canon"][case])
    # domain means recomputed with xarray
    cover = (ds["cloud_mask"] > 0).any("z").mean(("y", "x")).values
    lwp = ds["lwp"].astype("float64").mean(("y", "x")).values
    (line_cover,) = ax_cover.get_lines()
    (line_lwp,) = ax_lwp.get_lines()
    np.testing.assert_allclose(line_cover.get_xdata(), ds["time"].values / 3600.0)
    np.testing.assert_allclose(line_cover.get_ydata(), cover, rtol=1e-12)
    np.testing.assert_allclose(line_lwp.get_ydata(), lwp, rtol=1e-6)
    # every kept time lies after the shaded window (ingest keeps t >= t0 + spin-up)
    assert line_cover.get_xdata().min() >= (t0 + SPINUP_S) / 3600.0 - 1e-9
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "spin-up (dropped)" in legend


def test_timeseries_explicit_times_and_no_spinup(tree, tmp_path):
    canon = tree["canon"]["sc-ostra-02"]
    fig = figures.case_timeseries(canon, [0.0, 1800.0], 1800.0, tmp_path / "a.png")
    (span,) = [p for p in fig.axes[0].patches if p.get_label() == "spin-up (dropped)"]
    assert (span.get_x(), span.get_width()) == pytest.approx((0.0, 0.5))
    fig = figures.case_timeseries(canon, None, 0.0, tmp_path / "b.png")
    assert not [p for ax in fig.axes for p in ax.patches if p.get_label().startswith("spin")]


def test_raw_output_times_from_provenance(tree):
    # the demo spec's times, independently: cu-marro-02 is flavour beta, 900 s + i * 1800 s
    times, spinup = figures.raw_output_times(tree["canon"]["cu-marro-02"])
    with netCDF4.Dataset(tree["raw"] / "cu-marro-02" / "wc.nc") as nc:
        t = nc.variables["time"]
        dates = netCDF4.num2date(t[:], t.units, only_use_cftime_datetimes=False)
        ref = netCDF4.num2date(0.0, t.units, only_use_cftime_datetimes=False)
    np.testing.assert_allclose(times, [(d - ref).total_seconds() for d in dates], atol=1e-3)
    assert spinup == SPINUP_S


def test_profiles_against_xarray(tree, tmp_path):
    canon = tree["canon"]["cu-marro-01"]
    out = tmp_path / "p.png"
    fig = figures.case_profiles(canon, out)
    check_png(out, fig)
    ax_cf, ax_qc, ax_w = fig.axes
    assert ax_cf.get_ylabel() == "height (km)"
    assert "(1)" in ax_cf.get_xlabel()
    assert "g kg$^{-1}$" in ax_qc.get_xlabel()
    assert "m$^{2}$ s$^{-2}$" in ax_w.get_xlabel()
    ds = open_store(canon).astype("float64")
    cf = (ds["cloud_mask"] > 0).mean(("y", "x")).mean("time").values
    qc = ds["qc"].mean(("y", "x")).mean("time").values * 1000.0
    w_var = ds["w"].var(("y", "x")).mean("time").values  # xarray: ddof=0 by default
    for ax, expected in ((ax_cf, cf), (ax_qc, qc), (ax_w, w_var)):
        (line,) = ax.get_lines()
        np.testing.assert_allclose(line.get_xdata(), expected, rtol=1e-9, atol=1e-15)
        np.testing.assert_allclose(line.get_ydata(), ds["z"].values / 1000.0)
    assert cf.max() > 0 and w_var.max() > 0  # the case has cloud and turbulence


def test_lwp_map(tree, tmp_path):
    canon = tree["canon"]["sc-ostra-01"]
    out = tmp_path / "m.png"
    fig = figures.case_lwp_map(canon, out, time_index=0)
    check_png(out, fig)
    ax, cax = fig.axes
    assert ax.get_xlabel() == "x (km)" and ax.get_ylabel() == "y (km)"
    assert "kg m$^{-2}$" in cax.get_ylabel()
    (mesh,) = [c for c in ax.collections if isinstance(c, QuadMesh)]
    ds = open_store(canon)
    np.testing.assert_allclose(
        np.asarray(mesh.get_array()).reshape(ds.sizes["y"], ds.sizes["x"]),
        ds["lwp"].isel(time=0).values,
        rtol=1e-6,
    )
    extent = ds.sizes["x"] * float(ds.attrs["dx"]) / 1000.0  # the domain is 0..nx*dx
    coords = mesh.get_coordinates()
    assert coords[0, 0, 0] == pytest.approx(0.0, abs=1e-9)
    assert coords[-1, -1, 0] == pytest.approx(extent)
    with pytest.raises(InputError, match="time_index 99 is out of range"):
        figures.case_lwp_map(canon, tmp_path / "x.png", time_index=99)
    assert not (tmp_path / "x.png").exists()


# --------------------------------------------------------------------------- per scale


def test_target_distribution_densities(tree, tmp_path):
    out = tmp_path / "d.png"
    fig = figures.scale_target_distribution(tree["sets"]["train"], tree["sets"]["test"], out)
    check_png(out, fig)
    (ax,) = fig.axes
    assert "(1)" in ax.get_xlabel() and "density" in ax.get_ylabel()
    texts = [t.get_text() for t in ax.get_legend().get_texts()]
    assert texts[0].startswith("train:") and texts[1].startswith("test:")
    steps = [p for p in ax.patches if isinstance(p, StepPatch)]
    assert len(steps) == 2
    edges = np.linspace(0.0, 1.0, 21)
    for step, split in zip(steps, ("train", "test"), strict=True):
        values = open_store(tree["sets"][split])["cloud_fraction"].values.astype(np.float64)
        expected = np.histogram(values, bins=edges, density=True)[0]  # numpy's density
        np.testing.assert_allclose(step.get_data().values, expected, rtol=1e-12)
        clear = 100.0 * np.mean(values == 0.0)
        assert f"{values.size:,} samples, {clear:.0f} % clear" in texts[steps.index(step)]
    assert ax.get_yscale() == "log"


def test_target_distribution_chunked_equals_whole(tree, tmp_path):
    a = figures.scale_target_distribution(
        tree["sets"]["train"], tree["sets"]["test"], tmp_path / "a.png", chunk=37
    )
    b = figures.scale_target_distribution(
        tree["sets"]["train"], tree["sets"]["test"], tmp_path / "b.png"
    )
    for pa, pb in zip(a.axes[0].patches, b.axes[0].patches, strict=True):
        np.testing.assert_allclose(pa.get_data().values, pb.get_data().values, rtol=1e-12)


def test_cf_vs_rh_histogram_and_sundqvist_curve(tree, tmp_path):
    out = tmp_path / "r.png"
    fig = figures.scale_cf_vs_rh(tree["sets"]["train"], out, chunk=101)
    check_png(out, fig)
    ax = fig.axes[0]
    assert "(1)" in ax.get_xlabel() and "(1)" in ax.get_ylabel()
    lines = {ln.get_label(): ln for ln in ax.get_lines()}
    curve = lines[f"Sundqvist et al. (1989), RH$_c$ = {RH_CRITICAL:g}"]
    rh = np.asarray(curve.get_xdata())
    # Sundqvist et al. (1989): C = 1 - sqrt((1 - RH) / (1 - RHc)) above RHc, 0 below, 1 at
    # saturation and beyond -- the published formula, written out here
    expected = np.where(
        rh <= RH_CRITICAL,
        0.0,
        1.0 - np.sqrt(np.clip(1.0 - rh, 0.0, None) / (1.0 - RH_CRITICAL)),
    )
    np.testing.assert_allclose(curve.get_ydata(), expected, atol=1e-12)
    ds = open_store(tree["sets"]["train"])
    rh_s = ds["rh_of_means"].values.astype(np.float64)
    cf_s = ds["cloud_fraction"].values.astype(np.float64)
    (mesh,) = [c for c in ax.collections if isinstance(c, QuadMesh)]
    coords = mesh.get_coordinates()
    rh_edges, cf_edges = coords[0, :, 0], coords[:, 0, 1]
    ref = np.histogram2d(rh_s, cf_s, bins=(rh_edges, cf_edges))[0]  # numpy's 2-D histogram
    counts = np.ma.filled(mesh.get_array(), 0.0).reshape(cf_edges.size - 1, rh_edges.size - 1)
    np.testing.assert_array_equal(counts, ref.T)
    assert counts.sum() == rh_s.size
    means = lines["mean cloud fraction per RH bin"]
    which = np.digitize(rh_s, rh_edges) - 1
    which[rh_s == rh_edges[-1]] = rh_edges.size - 2
    bins_used = np.unique(which)
    expected_means = [cf_s[which == b].mean() for b in bins_used]  # numpy, per bin
    np.testing.assert_allclose(means.get_ydata(), expected_means, rtol=1e-9)


def test_baseline_skill_against_numpy(tree):
    for split in ("train", "test"):
        ds = open_store(tree["sets"][split])
        p = ds["cf_sundqvist"].values.astype(np.float64)
        t = ds["cloud_fraction"].values.astype(np.float64)
        d = p - t
        whole = skill.baseline_skill(tree["sets"][split])
        chunked = skill.baseline_skill(tree["sets"][split], chunk=53)
        for got in (whole, chunked):
            assert got["n"] == d.size
            assert got["rmse"] == pytest.approx(math.sqrt(np.mean(d**2)), rel=1e-12)
            assert got["bias"] == pytest.approx(np.mean(d), rel=1e-12, abs=1e-15)
            assert got["mae"] == pytest.approx(np.mean(np.abs(d)), rel=1e-12)


def test_empty_split(tree, tmp_path):
    """A split whose every case skipped the scale: drawn as "no samples", skill n = 0."""
    case = "sc-ostra-01"
    skipped = coarsen_case(
        tree["canon"][case],
        {"7000m": tmp_path / "scale-7000m.zarr"},
        coarsen_settings(scales=tuple(parse_scales(["7 km"])), on_misfit="skip"),
    )["7000m"]
    empty = build_set(
        {case: skipped},
        REGIME,
        tmp_path / "empty.zarr",
        set_settings(),
        split="test",
        scale="7000m",
    )
    fig = figures.scale_target_distribution(tree["sets"]["train"], empty, tmp_path / "e.png")
    texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert texts[1] == "test: no samples"
    assert len([p for p in fig.axes[0].patches if isinstance(p, StepPatch)]) == 1
    result = skill.baseline_skill(empty)
    assert result["n"] == 0 and math.isnan(result["rmse"]) and math.isnan(result["bias"])
    with pytest.raises(InputError, match="rh_of_means"):
        figures.scale_cf_vs_rh(empty, tmp_path / "x.png")


def test_rh_critical_default_when_unrecorded():
    import xarray as xr

    assert figures.rh_critical_of(xr.Dataset()) == figures.DEFAULT_RH_CRITICAL == 0.8


# --------------------------------------------------------------------------- scenes


def test_scenes_for_case_against_numpy_and_scipy(tree):
    canon = tree["canon"]["cu-marro-01"]
    frame = scene_tables.scenes_for_case(canon)
    ds = open_store(canon)
    assert list(frame["time"]) == list(ds["time"].values)
    lwp = ds["lwp"].values.astype(np.float64)
    cloudy = (ds["cloud_mask"].values > 0).any(axis=1)
    np.testing.assert_allclose(frame["lwp_mean"], lwp.mean(axis=(1, 2)), rtol=1e-12)
    np.testing.assert_allclose(frame["lwp_std"], lwp.std(axis=(1, 2)), rtol=1e-12)
    skew = scipy.stats.skew(lwp.reshape(lwp.shape[0], -1), axis=1, bias=True)
    np.testing.assert_allclose(frame["lwp_skew"], skew, rtol=1e-9)
    np.testing.assert_allclose(frame["cloud_cover"], cloudy.mean(axis=(1, 2)), rtol=1e-12)
    # the domain size is the shorter side: points times the spacing recorded in the store
    side = min(ds.sizes["y"], ds.sizes["x"]) * float(ds.attrs["dx"])
    assert frame["domain_m"].tolist() == [side] * ds.sizes["time"]


def test_scene_table_rst(tree, tmp_path):
    tsv = scene_tables.write_scenes_tsv(tree["canon"], tmp_path / "scenes.tsv")
    table = pd.read_csv(tsv, sep="\t")
    assert list(table.columns[:2]) == ["case", "time_s"]
    assert list(dict.fromkeys(table["case"])) == list(FLAVOUR)
    out = tmp_path / "scenes.rst"
    text = tables.scene_table_rst(tsv, tree["splits"], out)
    assert out.read_text() == text
    # docutils (the reST reference parser) reads it as one table without complaint
    doctree = publish_doctree(text, settings_overrides={"report_level": 5, "halt_level": 5})
    assert not list(doctree.findall(system_message))
    rows = list(doctree.findall(rst_row))
    assert len(rows) == 1 + len(FLAVOUR)
    cells = {r.astext().split("\n\n")[0]: r.astext().split("\n\n") for r in rows[1:]}
    for case in FLAVOUR:
        row = cells[case]
        assert row[2] == f"{SPLIT[case]} (pinned)"
        sub = table[table["case"] == case]
        assert row[3] == str(len(sub))
        assert row[4] == f"{1000.0 * sub['lwp_mean'].mean():.1f}"  # pandas mean, g m-2
        assert row[6] == f"{sub['cloud_cover'].mean():.2f}"


# --------------------------------------------------------------------------- captions


@pytest.mark.parametrize(
    "name",
    [
        "workflow",
        "case_timeseries",
        "case_profiles",
        "case_lwp_map",
        "scale_target_distribution",
        "scale_cf_vs_rh",
        "scene_table",
    ],
)
def test_report_captions_are_valid_rst(name):
    path = REPO / "workflow" / "report" / f"{name}.rst"
    text = path.read_text(encoding="utf-8")
    doctree = publish_doctree(text, settings_overrides={"report_level": 5, "halt_level": 5})
    assert not list(doctree.findall(system_message)), name
    if name != "workflow":
        assert "synthetic" in text  # every figure caption carries the demo-data caveat


def test_per_case_scene_tables_gather_to_the_whole_table(tree, tmp_path):
    whole = pd.read_csv(
        scene_tables.write_scenes_tsv(tree["canon"], tmp_path / "all.tsv"), sep="\t"
    )
    parts = [
        scene_tables.write_case_scenes_tsv(path, case, tmp_path / case / "scenes.tsv")
        for case, path in tree["canon"].items()
    ]
    gathered = scene_tables.gather_scenes_tsv(parts, tmp_path / "gathered.tsv")
    pd.testing.assert_frame_equal(pd.read_csv(gathered, sep="\t"), whole)  # pandas' own check
    assert list(whole.columns) == list(scene_tables.SCENE_COLUMNS)
    bad = tmp_path / "bad.tsv"
    pd.read_csv(parts[0], sep="\t").drop(columns="domain_m").to_csv(bad, sep="\t", index=False)
    with pytest.raises(InputError, match=r"bad\.tsv.*domain_m"):
        scene_tables.gather_scenes_tsv([bad], tmp_path / "x.tsv")

"""Vertical coarsening to target layers, checked against direct weighted numpy
computations, xarray's own coarsen, the hypsometric equation and conservation."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from lesprep import thermo
from lesprep.errors import ConfigError, GridError
from lesprep.scales.layers import (
    LayerSetSpec,
    overlap_matrix,
    parse_layer_sets,
    pressure_interfaces_to_heights,
    resolve_layers,
)
from lesprep.scales.spec import Scale
from lesprep.scales.step import coarse_fields
from lesprep.scales.vertical import dry_density_means
from settings_helpers import coarsen_settings, workflow_settings

SETTINGS = coarsen_settings(
    scales=(), moments=("qc", "w", "qv", "T", "qt"), covariances=(("w", "qt"),)
)
DX = 50.0
DEMO_LAYERS = Path(__file__).resolve().parents[1] / "resources/layers/lowtrop13.txt"


def scale(f: int) -> Scale:
    return Scale(label=f"f{f}", factor=f, length_m=f * DX, dx=DX, text=str(f))


def stretched_faces(nz: int) -> np.ndarray:
    """Faces of a grid stretched from 20 m to 60 m thickness."""
    return np.concatenate([[0.0], np.cumsum(np.linspace(20.0, 60.0, nz))])


def random_fine(rng: np.random.Generator, faces: np.ndarray, n: int = 12) -> dict:
    nz = faces.size - 1
    z = 0.5 * (faces[1:] + faces[:-1])
    t = 290.0 - 0.0065 * z[:, None, None] + rng.normal(0.0, 0.8, (nz, n, n))
    p = 1.0e5 * np.exp(-z / 8000.0)
    qv = 0.9 * thermo.saturation_mixing_ratio(p[:, None, None], t) * rng.uniform(0.8, 1.1, t.shape)
    qc = np.maximum(rng.normal(-1e-4, 3e-4, t.shape), 0.0)
    return {
        "qc": qc,
        "qv": qv,
        "T": t,
        "w": rng.normal(0.0, 1.0, t.shape) ** 3,  # skewed
        "rh": thermo.relative_humidity(p[:, None, None], t, qv),
        "cloud_mask": (qc > 1e-5).astype(np.int8),
        "lwp": qc.sum(axis=0),
        "p": p,
    }


def direct(fine, faces, layer_faces, f, weighting):
    """Weighted statistics of every (layer, block) by direct numpy sums over its fine cells.

    Weights (the documented ones): a fine cell of level k in block b weighs
    overlap(k, layer) * rho_d(k, b) / (f*f) with rho_d(k, b) the block mean of the dry-air
    density (mass), or overlap(k, layer) / (f*f) (thickness).
    """
    nz, ny, nx = fine["qc"].shape
    ov = overlap_matrix(faces, layer_faces)
    p3 = np.broadcast_to(np.asarray(fine["p"])[:, None, None], (nz, ny, nx))
    rho = thermo.dry_air_density(p3, fine["T"], fine["qv"])
    rho_b = rho.reshape(nz, ny // f, f, nx // f, f).mean(axis=(2, 4))
    qt = fine["qv"] + fine["qc"]
    fields = {"qc": fine["qc"], "w": fine["w"], "qt": qt, "T": fine["T"]}
    nl = layer_faces.size - 1
    out = {k: np.zeros((nl, ny // f, nx // f)) for k in ("W", "qc_m", "qc_v", "qc_s", "cov")}
    out.update({k: np.zeros((nl, ny // f, nx // f)) for k in ("w_m", "w_v", "w_s", "qt_m")})
    for lay in range(nl):
        for by in range(ny // f):
            for bx in range(nx // f):
                rows = slice(by * f, by * f + f), slice(bx * f, bx * f + f)
                lev = np.flatnonzero(ov[:, lay] > 0)
                wk = ov[lev, lay] * (rho_b[lev, by, bx] if weighting == "mass" else 1.0)
                wcell = np.repeat(wk / (f * f), f * f)
                vals = {v: a[lev][:, rows[0], rows[1]].reshape(-1) for v, a in fields.items()}
                out["W"][lay, by, bx] = wcell.sum()
                for v in ("qc", "w"):
                    m = np.average(vals[v], weights=wcell)
                    var = np.average((vals[v] - m) ** 2, weights=wcell)
                    m3 = np.average((vals[v] - m) ** 3, weights=wcell)
                    out[f"{v}_m"][lay, by, bx] = m
                    out[f"{v}_v"][lay, by, bx] = var
                    out[f"{v}_s"][lay, by, bx] = m3 / var**1.5 if var > 0 else 0.0
                mq = np.average(vals["qt"], weights=wcell)
                mw = np.average(vals["w"], weights=wcell)
                out["qt_m"][lay, by, bx] = mq
                out["cov"][lay, by, bx] = np.average(
                    (vals["w"] - mw) * (vals["qt"] - mq), weights=wcell
                )
    return out


def layer_set(interfaces, **kw) -> LayerSetSpec:
    return LayerSetSpec(
        name="t", kind="height", interfaces=tuple(interfaces), source="config", **kw
    )


@pytest.mark.parametrize("weighting", ["mass", "thickness"])
@pytest.mark.parametrize("engine", ["numba", "numpy"])
def test_layers_match_direct_weighted_sums(weighting, engine, monkeypatch):
    """Interfaces between fine levels (split levels), stretched levels, layers spanning
    several slabs: mean, variance, skewness and covariance equal direct weighted sums."""
    import lesprep.scales.vertical as vertical

    rng = np.random.default_rng(3)
    faces = stretched_faces(14)  # top at 560 m
    fine = random_fine(rng, faces)
    interfaces = [0.0, 35.0, 101.0, 250.0, 333.3, 560.0]  # none on a fine face
    grid = resolve_layers(layer_set(interfaces, weighting=weighting), faces)
    real_init = vertical.LayerStatistics.__init__

    def init(self, *a, **k):
        real_init(self, *a, **k)
        self.engine = engine

    monkeypatch.setattr(vertical.LayerStatistics, "__init__", init)
    z = 0.5 * (faces[1:] + faces[:-1])
    out = coarse_fields(fine, z, [scale(4)], SETTINGS, layers=[grid], slab_levels=3)
    d = out["f4_layers-t"]
    ref = direct(fine, faces, np.asarray(interfaces), 4, weighting)
    np.testing.assert_allclose(d["qc_mean"], ref["qc_m"], rtol=1e-10, atol=1e-18)
    np.testing.assert_allclose(d["qc_var"], ref["qc_v"], rtol=1e-9, atol=1e-24)
    np.testing.assert_allclose(d["w_mean"], ref["w_m"], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(d["w_var"], ref["w_v"], rtol=1e-9)
    np.testing.assert_allclose(d["w_skew"], ref["w_s"], rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(d["qt_mean"], ref["qt_m"], rtol=1e-10)
    np.testing.assert_allclose(d["cov_w_qt"], ref["cov"], rtol=1e-8, atol=1e-16)
    assert d["qc_mean"].shape == (5, 3, 3)


def test_interfaces_on_fine_faces_match_xarray_coarsen():
    """Uniform levels, thickness weighting, interfaces on every third face: each layer is
    a plain 3-D block, so xarray's coarsen over (z, y, x) gives the same mean and
    (population) variance."""
    rng = np.random.default_rng(5)
    faces = np.arange(13.0) * 25.0
    fine = random_fine(rng, faces)
    grid = resolve_layers(layer_set(faces[::3], weighting="thickness"), faces)
    z = 0.5 * (faces[1:] + faces[:-1])
    d = coarse_fields(fine, z, [scale(3)], SETTINGS, layers=[grid])["f3_layers-t"]
    da = xr.DataArray(fine["w"], dims=("z", "y", "x"))
    blocks = da.coarsen(z=3, y=3, x=3)
    np.testing.assert_allclose(d["w_mean"], blocks.mean().values, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(d["w_var"], blocks.var().values, rtol=1e-10)


def test_mass_conserved_over_layers():
    """sum over layers of W x layer mean of qc == sum over fine levels of dz x rho_d x qc
    (per block), with interfaces between fine levels."""
    from lesprep.scales.moments import block_mean
    from lesprep.scales.vertical import LayerStatistics

    rng = np.random.default_rng(11)
    faces = stretched_faces(10)
    fine = random_fine(rng, faces)
    grid = resolve_layers(layer_set([0.0, 47.0, 190.0, 271.0, 400.0]), faces)
    f = 4
    rho = dry_density_means(fine["p"], fine["T"], fine["qv"], f)
    qc_b = block_mean(fine["qc"], f)
    acc = LayerStatistics(grid, qc_b.shape[1:], f * f)
    from lesprep.scales.moments import hierarchical_moments

    bm = hierarchical_moments(fine["qc"], [f])[f]
    acc.add_moments("qc", 0, bm, rho)
    layers = (acc.weight("qc") * acc.moments("qc").mean).sum(axis=0)
    dz = np.diff(faces)
    inside = overlap_matrix(faces, grid.faces).sum(axis=1)  # == dz below 400 m
    levels = (inside[:, None, None] * rho * qc_b).sum(axis=0)
    np.testing.assert_allclose(layers, levels, rtol=1e-12)
    assert inside[:6] == pytest.approx(dz[:6])


def test_field_uniform_in_each_layer_has_zero_variance():
    rng = np.random.default_rng(2)
    faces = stretched_faces(12)
    fine = random_fine(rng, faces)
    iface = faces[[0, 2, 5, 9, 12]]
    values = np.array([0.3, -1.2, 2.5, 7.0])
    which = np.searchsorted(iface, 0.5 * (faces[1:] + faces[:-1])) - 1
    fine["w"] = np.broadcast_to(values[which][:, None, None], fine["qc"].shape).copy()
    grid = resolve_layers(layer_set(iface), faces)
    z = 0.5 * (faces[1:] + faces[:-1])
    d = coarse_fields(fine, z, [scale(6)], SETTINGS, layers=[grid], slab_levels=4)["f6_layers-t"]
    want = np.broadcast_to(values[:, None, None], d["w_mean"].shape)
    np.testing.assert_allclose(d["w_mean"], want)
    np.testing.assert_allclose(d["w_var"], 0.0, atol=1e-24)
    assert np.all(d["w_skew"] == 0.0)


def test_projected_cover_at_least_volume_fraction():
    rng = np.random.default_rng(8)
    faces = stretched_faces(16)
    fine = random_fine(rng, faces, n=16)
    grid = resolve_layers(layer_set([0.0, 90.0, 300.0, 500.0, 640.0]), faces)
    z = 0.5 * (faces[1:] + faces[:-1])
    out = coarse_fields(fine, z, [scale(4), scale(8)], SETTINGS, layers=[grid], slab_levels=5)
    for lab in ("f4_layers-t", "f8_layers-t"):
        d = out[lab]
        assert np.all(d["cloud_area_fraction"] >= d["cloud_volume_fraction"] - 1e-12)
        assert np.any(d["cloud_area_fraction"] > d["cloud_volume_fraction"] + 0.01)
        np.testing.assert_array_equal(d["cloud_fraction"], d["cloud_volume_fraction"])
    # the projected cover by hand: a fine column is cloudy if any overlapping level is
    mask = fine["cloud_mask"].astype(bool)
    ov = overlap_matrix(faces, grid.faces)
    by_hand = np.stack([mask[ov[:, k] > 0].any(axis=0) for k in range(grid.nl)])
    blocks = by_hand.reshape(grid.nl, 2, 8, 2, 8).mean(axis=(2, 4))
    np.testing.assert_allclose(out["f8_layers-t"]["cloud_area_fraction"], blocks)


def test_projected_target_and_gcm_view_inputs():
    rng = np.random.default_rng(9)
    faces = stretched_faces(12)
    fine = random_fine(rng, faces)
    grid = resolve_layers(layer_set([0.0, 60.0, 200.0, 420.0], target="projected"), faces)
    z = 0.5 * (faces[1:] + faces[:-1])
    d = coarse_fields(fine, z, [scale(4)], SETTINGS, layers=[grid])["f4_layers-t"]
    np.testing.assert_array_equal(d["cloud_fraction"], d["cloud_area_fraction"])
    rh = thermo.relative_humidity(d["p_mean"], d["T_mean"], d["qv_mean"])
    np.testing.assert_allclose(d["rh_of_means"], rh, rtol=1e-10)
    centres = np.array([30.0, 130.0, 310.0])
    np.testing.assert_allclose(
        d["drh_dz"], np.gradient(rh, centres, axis=0, edge_order=2), rtol=1e-8, atol=1e-14
    )


def test_dry_density_engines_agree_with_thermo():
    rng = np.random.default_rng(1)
    t = 280 + rng.normal(0, 1, (3, 8, 8))
    r = rng.uniform(0.001, 0.01, t.shape)
    p = np.array([1e5, 9.5e4, 9e4])
    ref = thermo.dry_air_density(p[:, None, None], t, r).reshape(3, 2, 4, 2, 4).mean(axis=(2, 4))
    np.testing.assert_allclose(dry_density_means(p, t, r, 4, engine="numba"), ref, rtol=1e-13)
    np.testing.assert_allclose(dry_density_means(p, t, r, 4, engine="numpy"), ref, rtol=1e-13)
    p3 = np.broadcast_to(p[:, None, None], t.shape).copy()
    np.testing.assert_allclose(dry_density_means(p3, t, r, 4), ref, rtol=1e-13)


# -------------------------------------------------------------------------------------
# layer definitions
# -------------------------------------------------------------------------------------


def test_overlap_splits_straddling_level():
    ov = overlap_matrix([0.0, 10.0, 30.0, 60.0], [0.0, 20.0, 60.0])
    np.testing.assert_allclose(ov, [[10, 0], [10, 10], [0, 30]])
    np.testing.assert_allclose(ov.sum(axis=1), [10, 20, 30])  # each level fully shared out


def test_pressure_interfaces_follow_hypsometric_equation():
    """Isothermal hydrostatic air: z = (Rd T / g) ln(p0 / p) (hypsometric equation)."""
    t, g = 280.0, 9.80665
    h = thermo.RD * t / g
    z = np.linspace(10.0, 2990.0, 150)
    p = 101325.0 * np.exp(-z / h)
    want = np.array([0.0, 500.0, 1234.5, 3000.0])
    got = pressure_interfaces_to_heights(101325.0 * np.exp(-want / h), z, p)
    np.testing.assert_allclose(got, want, atol=1e-6)


def test_clipping_is_named_and_dropped_layers_listed(caplog):
    faces = stretched_faces(6)  # top at 240 m
    with caplog.at_level(logging.WARNING):
        g = resolve_layers(layer_set([0.0, 100.0, 200.0, 300.0, 400.0]), faces, case="c1")
    np.testing.assert_allclose(g.faces, [0.0, 100.0, 200.0, 240.0])
    assert "layer 2 [200 m, 300 m]" in caplog.text and "clipped to [200 m, 240 m]" in caplog.text
    assert "layer 3 [300 m, 400 m]" in caplog.text and "dropped" in caplog.text
    with pytest.raises(GridError, match="no layer of set 't'"):
        resolve_layers(layer_set([500.0, 600.0]), faces)


def parse(entries, scales=("1 km",)):
    """Layer sets parsed the way the workflow parses them (schema defaults filled)."""
    return workflow_settings(
        coarsen={"scales": list(scales), "layers": entries}
    ).coarsen.base.layers


def test_layer_set_validation(tmp_path):
    with pytest.raises(ConfigError, match="not monotonic at 1-2"):
        layer_set([0.0, 100.0, 50.0])
    with pytest.raises(ConfigError, match="mixes heights and pressures"):
        parse([{"name": "a", "interfaces": ["0 m", "900 hPa"]}])
    with pytest.raises(ConfigError, match="has no units"):
        parse_layer_sets([{"name": "a", "interfaces": [0, 100]}], [], base=tmp_path)
    with pytest.raises(ConfigError, match=r"not in coarsen\.scales"):
        parse([{"name": "a", "interfaces": ["0 m", "1 km"], "scales": ["2 km"]}])
    with pytest.raises(ConfigError, match="either `interfaces` or `file`"):
        parse([{"name": "a"}])
    with pytest.raises(ConfigError, match="weighting"):
        parse([{"name": "a", "interfaces": ["0 m", "1 km"], "weighting": "volume"}])
    f = tmp_path / "low.txt"
    f.write_text("# interfaces\n1000 hPa\n950 hPa  # cloud base\n\n850 hPa\n")
    (spec,) = parse([{"name": "low", "file": str(f)}])
    assert spec.kind == "pressure" and spec.interfaces == (1.0e5, 9.5e4, 8.5e4)
    assert (spec.weighting, spec.target, spec.scales) == ("mass", "volume", ())  # defaults
    with pytest.raises(ConfigError, match="cannot read the layer file"):
        parse([{"name": "b", "file": str(tmp_path / "missing.txt")}])
    demo = workflow_settings(
        coarsen={"scales": ["1 km"], "layers": [{"name": "d", "file": str(DEMO_LAYERS)}]}
    ).coarsen
    assert demo.store_labels == ("1000m", "1000m_layers-d")

"""Size of the block-mean density approximation of mass-weighted layer statistics.

Layer stores weight every fine cell of a level in a block with the block's mean dry-air
density (docs/layers.md). This script recomputes the layer statistics of the demo cases
with each fine cell's own density as its weight (a direct numpy computation over the
canonical fine fields, float64) and prints the largest and median differences from what
lesprep computes (also float64, before rounding to the stored dtype).

    .venv/bin/python benchmarks/layer_density.py                  # after the demo has run
    .venv/bin/python benchmarks/layer_density.py --cases sc-ostra-01 --scale "1 km"
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import xarray as xr

from lesprep import thermo
from lesprep.jobs.settings import WorkflowSettings
from lesprep.scales.coarsen import case_layers
from lesprep.scales.layers import layer_store_label
from lesprep.scales.spec import parse_scale
from lesprep.scales.step import coarse_fields
from lesprep.store import open_store

VARIABLES = ("qc", "qt", "theta_l", "w")


def exact(fine: dict, grid, f: int) -> dict[str, np.ndarray]:
    """Per-cell dry-density weighted mean and population variance of VARIABLES per layer
    and block (weights: overlap thickness x the fine cell's own dry-air density)."""
    p = np.asarray(fine["p"], np.float64)
    t = np.asarray(fine["T"], np.float64)
    p3 = p[:, None, None] if p.ndim == 1 else p
    rho = thermo.dry_air_density(p3, t, fine["qv"])
    nz, ny, nx = t.shape

    def bsum(a: np.ndarray) -> np.ndarray:  # (nz, ny, nx) -> block sums (nz, by, bx)
        return a.reshape(nz, ny // f, f, nx // f, f).sum(axis=(2, 4))

    ov = grid.overlap  # (nz, nl)
    W = np.einsum("kl,kyx->lyx", ov, bsum(rho))
    out: dict[str, np.ndarray] = {}
    for v in VARIABLES:
        x = np.asarray(fine[v], np.float64)
        mean = np.einsum("kl,kyx->lyx", ov, bsum(rho * x)) / W
        var = np.empty_like(mean)
        for lay in range(grid.nl):
            m = np.repeat(np.repeat(mean[lay], f, axis=0), f, axis=1)
            var[lay] = np.einsum("k,kyx->yx", ov[:, lay], bsum(rho * (x - m) ** 2)) / W[lay]
        out[f"{v}_mean"], out[f"{v}_var"] = mean, var
    mask = np.asarray(fine["cloud_mask"], np.float64)
    out["cloud_volume_fraction"] = np.einsum("kl,kyx->lyx", ov, bsum(rho * mask)) / W
    return out


def fine_fields(canon: xr.Dataset, j: int) -> dict[str, np.ndarray]:
    """The canonical fields of time index ``j`` plus the per-cell conserved variables."""
    names = ["qc", "qv", "T", "w", "rh", "cloud_mask", "lwp", "p"]
    out = {}
    for n in names:
        da = canon[n]
        out[n] = np.asarray((da.isel(time=j) if "time" in da.dims else da).values)
    p = out["p"] if out["p"].ndim == 3 else out["p"][:, None, None]
    out["qt"] = out["qv"].astype(np.float64) + out["qc"]
    out["theta_l"] = thermo.liquid_water_potential_temperature(p, out["T"], out["qc"])
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default="config/config.yaml")
    ap.add_argument("--cases", nargs="*", default=None)
    ap.add_argument(
        "--scale",
        default=None,
        help="a configured scale (default: the first scale with a layer set)",
    )
    args = ap.parse_args()
    import yaml

    settings = WorkflowSettings.from_config(yaml.safe_load(Path(args.config).read_text()))
    plan = settings.coarsen
    co = plan.base
    if not co.layers:
        raise SystemExit(f"{args.config} configures no coarsen.layers")
    spec = co.layers[0]
    label = (
        parse_scale(args.scale).label
        if args.scale
        else next(s.label for s in plan.scales if spec.applies_to(s.label))
    )
    scale_spec = next(s for s in plan.scales if s.label == label)
    cases = args.cases or [r.case for r in settings.case_sheet()]
    rows = []
    for case in cases:
        path = settings.results.canonical(case)
        if not path.exists():
            print(f"{case}: no canonical store at {path} (run the demo first)")
            continue
        canon = open_store(path)
        grids = case_layers(co, canon, case)
        grid = grids[spec.name]
        s = scale_spec.resolve(
            float(canon.attrs["dx"]), canon.sizes["x"], canon.sizes["y"], case=case
        )
        j = canon.sizes["time"] // 2
        fine = fine_fields(canon, j)
        z = canon.z.values.astype(np.float64)
        ours = coarse_fields(fine, z, [s], co, layers=[grid])[layer_store_label(label, spec.name)]
        ref = exact(fine, grid, s.factor)
        for name, want in ref.items():
            got = np.asarray(ours[name], np.float64)
            if name.endswith("_var") or name in ("qc_mean",):
                scale = np.maximum(np.abs(want), 1e-12 * np.abs(want).max() + 1e-300)
                d = np.abs(got - want) / scale
                kind = "relative"
            elif name == "cloud_volume_fraction" or name.startswith("w_"):
                d = np.abs(got - want)
                kind = "absolute"
            else:
                d = np.abs(got - want) / np.abs(want)
                kind = "relative"
            rows.append((case, name, kind, float(np.max(d)), float(np.median(d))))
        canon.close()
    print(f"layer set {spec.name!r} ({spec.weighting}), scale {label}, middle output time\n")
    print("| case | statistic | difference | max | median |")
    print("| --- | --- | --- | --- | --- |")
    for r in rows:
        print(f"| {r[0]} | {r[1]} | {r[2]} | {r[3]:.2e} | {r[4]:.2e} |")


if __name__ == "__main__":
    main()

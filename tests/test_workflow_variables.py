"""End to end through Snakemake with the open variable set: cloud ice as a mass fraction,
rain, winds on x and y faces and a 2-D surface field, covariances, conserved variables and
the Gaussian baseline, from raw archives to the training sets and the baseline table."""

from __future__ import annotations

import shutil

import numpy as np
import pytest
import yaml

from archive_edits import add_rich_fields, rich_varmap
from lesprep.sets.assemble import open_set
from lesprep.store import open_store
from workflow_project import Project

pytestmark = pytest.mark.workflow


def test_open_variable_set_flows_to_the_sets(tmp_path):
    p = Project(tmp_path)
    for c in ("sc-ostra-01", "cu-marro-01"):
        p.add_demo_case(c)
    p.snakemake("--until", "demo_archive")
    vm = tmp_path / "config/rich.yaml"
    vm.parent.mkdir(parents=True, exist_ok=True)
    vm.write_text(yaml.safe_dump(rich_varmap()))
    p.rows.clear()
    rng = np.random.default_rng(11)
    for c, regime in (("sc-ostra-01", "stratocumulus"), ("cu-marro-01", "cumulus")):
        own = tmp_path / "archive" / c
        shutil.copytree(tmp_path / "resources/demo" / c, own)
        add_rich_fields(own, rng)
        split = "train" if regime == "stratocumulus" else "test"
        p.add_case(f"own-{c}", f"archive/{c}/*.nc", "alpha", regime, split=split)
        p.rows[-1]["varmap"] = str(vm)
    p.config["coarsen"] = {
        "scales": ["600 m"],
        "moments": ["qc", "w", "qv", "T", "rh", "qi", "qr", "u", "v", "shf", "qt", "theta_l"],
        "covariances": [["w", "qt"], ["u", "w"], ["v", "w"]],
        "patches": {"variables": ["qc", "qi", "theta_l"], "scales": ["600 m"], "size": 6},
    }
    p.snakemake()
    r = tmp_path / "results"
    canon = open_store(r / "cases/own-sc-ostra-01/canonical.zarr")
    assert {"qi", "qr", "u", "v", "shf"} <= set(canon.data_vars)
    assert canon["shf"].dims == ("time", "y", "x")
    scale = open_store(r / "cases/own-sc-ostra-01/scale-600m.zarr")
    for name in (
        "qi_mean",
        "qr_var",
        "shf_mean",
        "theta_l_skew",
        "cov_w_qt",
        "cov_u_w",
        "cov_v_w",
        "cov_qt_theta_l",
        "tke_sgs",
        "cf_gaussian",
        "cloud_fraction_zero",
        "qi_patch",
        "theta_l_patch",
    ):
        assert name in scale, name
    for split in ("train", "test"):
        with open_set(r / f"sets/{split}/scale-600m.zarr") as ds:
            assert {"cov_u_w", "tke_sgs", "shf_mean", "qi_patch", "cf_gaussian"} <= set(
                ds.data_vars
            )
    rows = (r / "baseline.tsv").read_text().splitlines()
    assert any("\tgaussian\tcloud_fraction_zero\t" in line for line in rows)

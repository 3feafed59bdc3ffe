"""The bad-input catalogue (docs/bad-inputs.md): rows not covered in test_ingest.py.

Each bad input must fail early with a one-line message naming what was found and what
was expected, and leave no output; merely unusual archives warn and go on.
"""

from __future__ import annotations

import logging
import subprocess
import sys
from pathlib import Path

import netCDF4
import pytest
import yaml

from lesprep.canonical.ingest import ingest_case
from lesprep.config import prepare_config, read_case_sheet
from lesprep.errors import ConfigError, GridError, TimeAxisError
from lesprep.jobs.settings import WorkflowSettings
from lesprep.provenance import load
from lesprep.store import open_store, stale_temporaries
from settings_helpers import ingest_settings

REPO = Path(__file__).resolve().parents[1]
VARMAP = {f: REPO / f"config/varmaps/flavour-{f}.yaml" for f in ("alpha", "beta")}
SETTINGS = ingest_settings(
    spinup="1 h",
    cloud_threshold="1e-5 kg/kg",
)
HEADER = "case\tregime\tvarmap\traw\tsplit\tspinup\tdemo\n"


def ingest(raw: Path, flavour: str, out: Path):
    return ingest_case(
        case="c1", raw=str(raw / "*.nc"), varmap=VARMAP[flavour], settings=SETTINGS, out=out
    )


def one_line(msg: str) -> str:
    assert "\n" not in msg
    return msg


def test_non_monotonic_time_within_file(tmp_path, case_copy):
    raw = case_copy("sc-ostra-02")
    for f in raw.glob("*.nc"):
        with netCDF4.Dataset(f, "a") as nc:
            if "time" in nc.variables:
                t = nc["time"][:]
                t[1], t[2] = t[2], t[1]
                nc["time"][:] = t
    out = tmp_path / "o.zarr"
    with pytest.raises(TimeAxisError, match="not strictly increasing") as err:
        ingest(raw, "beta", out)
    one_line(str(err.value))
    assert not out.exists() and not stale_temporaries(out)


def test_unequal_dx_dy(tmp_path, case_copy):
    raw = case_copy("sc-ostra-01")
    for f in raw.glob("*.nc"):
        with netCDF4.Dataset(f, "a") as nc:
            nc["y"][:] = nc["y"][:] * 2.0
    with pytest.raises(GridError, match="dx = 50 m but dy = 100 m"):
        ingest(raw, "alpha", tmp_path / "o.zarr")


def test_duplicate_case_ids(tmp_path):
    sheet = tmp_path / "cases.tsv"
    sheet.write_text(HEADER + "a1\tsc\tm.yaml\tx/*.nc\t\t\t\n" + "a1\tsc\tm.yaml\ty/*.nc\t\t\t\n")
    with pytest.raises(ConfigError, match="'a1' appears on rows 2 and 3"):
        read_case_sheet(sheet)


@pytest.mark.parametrize("bad", ["../x", "a/b", "with space", ".hidden", "a..b", "x;rm", ""])
def test_unsafe_case_ids(tmp_path, bad):
    sheet = tmp_path / "cases.tsv"
    sheet.write_text(HEADER + f"{bad}\tsc\tm.yaml\tx/*.nc\t\t\t\n")
    with pytest.raises(ConfigError, match="case"):
        read_case_sheet(sheet)


@pytest.mark.parametrize(
    "key, value", [("spinup", "2"), ("cloud_threshold", "1e-5"), ("spinup", "2 m")]
)
def test_quantities_without_units(key, value):
    cfg = yaml.safe_load((REPO / "config/config.yaml").read_text())
    cfg["ingest"][key] = value
    with pytest.raises(ConfigError, match=key):
        WorkflowSettings.from_config(cfg)


def test_unknown_config_key():
    cfg = yaml.safe_load((REPO / "config/config.yaml").read_text())
    cfg["ingest"]["cloud_treshold"] = "1e-5 kg/kg"  # typo
    with pytest.raises(ConfigError, match="cloud_treshold"):
        prepare_config(cfg)


def test_unknown_case_sheet_column(tmp_path):
    sheet = tmp_path / "cases.tsv"
    sheet.write_text("case\tregime\tvarmap\traw\tsplitt\n" + "a1\tsc\tm.yaml\tx/*.nc\ttest\n")
    with pytest.raises(ConfigError, match=r"unknown column.*splitt"):
        read_case_sheet(sheet)


def test_unusual_archive_warns_and_goes_on(tmp_path, case_copy, caplog):
    raw = case_copy("sc-ostra-01")
    for f in raw.glob("*.nc"):
        with netCDF4.Dataset(f, "a") as nc:
            v = nc.createVariable("tracer", "f4", ("time", "zc", "y", "x"))
            v[:] = 1.0
            nc.renameVariable("zf", "zf_old")  # the optional face coordinate is gone
    caplog.set_level(logging.WARNING)
    out = ingest(raw, "alpha", tmp_path / "o.zarr")
    text = caplog.text
    assert "tracer" in text and "optional coordinate 'zf'" in text
    assert len(load(open_store(out).attrs)["steps"][0]["warnings"]) == 2


def test_workflow_step_exits_non_zero_with_one_line(tmp_path, case_copy):
    # the command-line path: a bad input ends the process with status 1 and one line
    raw = case_copy("sc-ostra-01")
    with netCDF4.Dataset(raw / "snap_0002.nc", "a") as nc:
        nc["tempc"].setncattr("units", "m s-1")
    code = (
        "import sys\n"
        "from lesprep.errors import LesprepError\n"
        "from lesprep.canonical.ingest import ingest_case\n"
        "from lesprep.canonical.settings import IngestSettings\n"
        "try:\n"
        f"    ingest_case(case='c1', raw={str(raw / '*.nc')!r}, varmap={str(VARMAP['alpha'])!r},"
        f" settings=IngestSettings.from_dict({SETTINGS.to_dict()!r}),"
        f" out={str(tmp_path / 'o.zarr')!r})\n"
        "except LesprepError as e:\n"
        "    print(e, file=sys.stderr); sys.exit(1)\n"
    )
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert res.returncode == 1
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "snap_0002.nc" in lines[0] and "tempc" in lines[0]

"""`lesprep verify`: a real results tree passes; each kind of damage is caught and named.

The tree is built once per module by the real workflow (Snakemake, four demo cases at the
tiny test size, two scales, set filters on) and copied for every test, which damages the
copy in one way and checks that verification reports it under the right check.

Outside references: sha256 from Python's hashlib (FIPS 180-4) for the recorded raw-file
digests; numpy.mean / numpy.std(ddof=0) in float64 for the normalization statistics;
xarray's own label selection (``sel``/``isel``) for the cells a set keeps under its
filters; numpy.isnan for what counts as NaN.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import warnings
from pathlib import Path

import numpy as np
import pytest
import zarr

from lesprep import provenance
from lesprep.errors import InputError
from lesprep.sets.assemble import open_set
from lesprep.sets.splits import read_assignment_tsv
from lesprep.store import consolidate, open_store
from lesprep.verify import CHECKS, Finding, VerifyReport, verify_results
from workflow_project import Project

pytestmark = pytest.mark.workflow

CASES = ("sc-ostra-01", "sc-ostra-02", "cu-marro-01", "cu-marro-02")
LAYERS = {"name": "l3", "interfaces": ["0 m", "400 m", "900 m", "1500 m"], "scales": ["600 m"]}
"""A layer set at 600 m: its per-case stores and sets are checked like the others."""
LABELS = ("200m", "600m", "600m_layers-l3")
Z_MAX = 1800.0  # the sets' z_range upper bound in metres
STRIDE = 2  # the sets' time_stride
LAG = 1  # the sets' lag of qc_mean and lwp_mean, in output times


@pytest.fixture(scope="module")
def built(tmp_path_factory) -> Path:
    """A finished project folder (config, demo archives, results); read-only for tests."""
    p = Project(tmp_path_factory.mktemp("verify-project"))
    p.config["coarsen"]["scales"] = ["200 m", "600 m"]
    p.config["coarsen"]["layers"] = [LAYERS]
    p.config["sets"].update(
        {
            "z_range": ["0 m", f"{Z_MAX:g} m"],
            "time_stride": STRIDE,
            "lags": {"features": ["qc_mean", "lwp_mean"], "steps": [LAG]},
        }
    )
    for c in CASES:
        p.add_demo_case(c)
    p.snakemake()
    return p.root


@pytest.fixture
def tree(built, tmp_path) -> Path:
    """A private copy of the project; returns its results folder."""
    dst = tmp_path / "project"
    shutil.copytree(built, dst, ignore=shutil.ignore_patterns(".snakemake", "logs"))
    return dst / "results"


def splits_of(results: Path) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for a in read_assignment_tsv(results / "splits.tsv"):
        out.setdefault(a.split, []).append(a.case)
    return out


def set_attrs(store: Path, **changes) -> None:
    """Change root attributes of a store and re-consolidate (as lesprep itself does)."""
    with warnings.catch_warnings():  # Snakemake's timestamp file is not a zarr node
        warnings.filterwarnings("ignore", message=".*not recognized as a component.*")
        root = zarr.open_group(str(store), mode="r+")
        for k, v in changes.items():
            if v is None:
                del root.attrs[k]
            else:
                root.attrs[k] = v
        consolidate(store)


def raw_files_of(results: Path, case: str) -> list[str]:
    """Raw-file paths (relative to the project) the ingest step of ``case`` recorded."""
    ds = open_store(results / "cases" / case / "canonical.zarr")
    (step,) = [s for s in provenance.load(ds.attrs)["steps"] if s["step"] == "ingest"]
    return [rec["path"] for rec in step["raw_files"]]


def checks_of(report: VerifyReport) -> set[str]:
    return {f.check for f in report.findings}


def test_clean_tree_passes(tree):
    report = verify_results(tree)
    assert report.ok, report.summary()
    assert report.findings == []
    n_sets = len(list((tree / "sets").glob("*/scale-*.zarr")))
    assert n_sets == 2 * len(LABELS)  # train and test at each scale
    assert report.checked["open"] == len(CASES) * (1 + len(LABELS)) + n_sets
    raw = sorted((tree.parent / "resources/demo").glob("*/*.nc"))
    assert report.checked["raw_files"] == len(raw) > 0
    assert report.checked["samples"] > 0
    assert report.checked["nan"] > 0
    assert "OK, 0 findings" in report.summary().splitlines()[0]
    for check in CHECKS:
        assert f"  {check}: " in report.summary()


def test_recorded_digests_are_sha256_of_the_raw_files(tree):
    """The premise of the drift check: provenance holds hashlib's sha256 of each file."""
    for case in CASES:
        ds = open_store(tree / "cases" / case / "canonical.zarr")
        (step,) = [s for s in provenance.load(ds.attrs)["steps"] if s["step"] == "ingest"]
        for rec in step["raw_files"]:
            data = (tree.parent / rec["path"]).read_bytes()
            assert rec["sha256"] == hashlib.sha256(data).hexdigest()  # FIPS 180-4
            assert rec["size"] == len(data)


def test_sample_counts_match_xarray_selection(tree):
    """Cells kept by the filters, counted with xarray's own sel/isel, are the set sizes
    verification expects (and finds)."""
    for split, cases in splits_of(tree).items():
        for lab in LABELS:
            want, sampled = 0, set()
            for c in cases:
                ds = open_store(tree / "cases" / c / f"scale-{lab}.zarr")
                # every STRIDE-th time, less those whose lag precedes the case
                kept = ds.isel(time=slice(None, None, STRIDE)).sel(z=slice(0.0, Z_MAX))
                kept = kept.sel(time=kept.time >= ds.time.values[LAG])
                n = kept.sizes["time"] * kept.sizes["z"] * kept.sizes["y"] * kept.sizes["x"]
                want += n
                sampled |= {c} if n else set()
            ds = open_set(tree / "sets" / split / f"scale-{lab}.zarr")
            assert ds.sizes["sample"] == want
            # a case with too few output times for the stride and the lag has no sample
            assert set(ds["case"].values.tolist()) == sampled
            assert set(ds.attrs["cases"]) == set(cases)


def test_changed_raw_file_is_drift(tree):
    name = raw_files_of(tree, "sc-ostra-01")[2]
    raw = tree.parent / name
    data = bytearray(raw.read_bytes())
    data[-1] ^= 0xFF  # same size, different content
    raw.write_bytes(bytes(data))
    report = verify_results(tree)
    assert checks_of(report) == {"raw_files"}
    (f,) = report.findings  # one finding per file, though several stores record it
    assert f.message.startswith(f"changed: {name} ")
    assert hashlib.sha256(bytes(data)).hexdigest()[:16] in f.message


def test_missing_raw_file_is_drift(tree):
    gone = raw_files_of(tree, "cu-marro-02")[0]
    (tree.parent / gone).unlink()
    report = verify_results(tree)
    assert checks_of(report) == {"raw_files"}
    (f,) = report.findings
    assert f.message.startswith(f"missing: {gone} ")


@pytest.mark.parametrize("damage", ["delete", "garble"])
def test_store_that_does_not_open(tree, damage):
    store = tree / "cases" / "cu-marro-01" / "scale-600m.zarr"
    meta = store / "zarr.json"
    if damage == "delete":
        meta.unlink()
    else:
        meta.write_text('{"zarr_format": 3, "node_type": ')
    report = verify_results(tree)
    opened = report.by_check("open")
    assert [f.store for f in opened] == ["cases/cu-marro-01/scale-600m.zarr"]
    assert "does not open" in opened[0].message
    # the set holding that case cannot be compared with it, and says so
    split = next(s for s, cs in splits_of(tree).items() if "cu-marro-01" in cs)
    assert any(
        f.store == f"sets/{split}/scale-600m.zarr" and "cu-marro-01" in f.message
        for f in report.by_check("consistency")
    )


def test_layer_store_z_comes_from_its_recorded_interfaces(tree):
    # a layer store's z are the midpoints of its layer interfaces, not the LES levels
    store = tree / "cases" / "sc-ostra-01" / "scale-600m_layers-l3.zarr"
    ds = open_store(store)
    faces = [0.0, 400.0, 900.0, 1500.0]  # LAYERS["interfaces"]
    np.testing.assert_allclose(ds["z"].values, [200.0, 650.0, 1200.0], rtol=1e-12)
    np.testing.assert_allclose(ds["z_bounds"].values, np.c_[faces[:-1], faces[1:]], rtol=1e-12)
    ds.close()
    arr = zarr.open_array(str(store / "z"), mode="r+")
    arr[1] = arr[1] + 10.0
    report = verify_results(tree, sample_checks=0)
    assert checks_of(report) == {"consistency"}
    (f,) = report.findings
    assert f.store == "cases/sc-ostra-01/scale-600m_layers-l3.zarr"
    assert f.message == "z differs from the midpoints and bounds of its recorded layers"


def test_layer_store_recording_another_layer_set(tree):
    store = tree / "cases" / "cu-marro-01" / "scale-600m_layers-l3.zarr"
    prov = provenance.load(open_store(store).attrs)
    own = [s for s in prov["steps"] if s["step"] == "coarsen"][-1]
    own["layers"]["name"] = "l9"
    set_attrs(store, **{provenance.ATTR: json.dumps(prov)})
    report = verify_results(tree, sample_checks=0)
    assert checks_of(report) == {"provenance"}
    (f,) = report.findings
    assert f.store == "cases/cu-marro-01/scale-600m_layers-l3.zarr"
    assert "records {'layers': 'l9'}, expected {'layers': 'l3'}" in f.message


def test_missing_provenance(tree):
    store = tree / "cases" / "sc-ostra-02" / "canonical.zarr"
    set_attrs(store, **{provenance.ATTR: None})
    report = verify_results(tree)
    assert checks_of(report) == {"provenance"}
    (f,) = report.findings
    assert f.store == "cases/sc-ostra-02/canonical.zarr"
    assert provenance.ATTR in f.message


def test_test_case_in_train_cases_attr_overlaps(tree):
    splits = splits_of(tree)
    intruder = splits["test"][0]
    store = tree / "sets" / "train" / "scale-200m.zarr"
    cases = open_store(store).attrs["cases"]
    set_attrs(store, cases=[*cases, intruder])
    report = verify_results(tree)
    msgs = [f.message for f in report.by_check("splits")]
    assert any(f"case {intruder} is in both train and test" in m for m in msgs), msgs
    assert any(f"holds case {intruder}, which splits.tsv assigns to test" in m for m in msgs)


def test_edited_splits_tsv_disagrees_with_sets(tree):
    tsv = tree / "splits.tsv"
    moved = splits_of(tree)["train"][0]
    lines = tsv.read_text().splitlines()
    lines = [
        ln.replace("\ttrain\t", "\ttest\t") if ln.startswith(moved + "\t") else ln for ln in lines
    ]
    tsv.write_text("\n".join(lines) + "\n")
    report = verify_results(tree)
    assert "splits" in checks_of(report)
    assert any(
        f"holds case {moved}, which splits.tsv assigns to test" in f.message
        for f in report.by_check("splits")
    )
    assert any("lacks cases" in f.message for f in report.by_check("splits"))


def test_changed_normalization_json(tree):
    path = tree / "sets" / "normalization-600m.json"
    doc = json.loads(path.read_text())
    doc["statistics"]["T_mean"]["mean"] *= 1 + 1e-6  # far above the 1e-9 tolerance
    path.write_text(json.dumps(doc))
    report = verify_results(tree)
    assert checks_of(report) == {"normalization"}
    msgs = [f.message for f in report.findings]
    assert any("differs from the train store's attr" in m and "T_mean.mean" in m for m in msgs)
    assert any(m.startswith("file statistics do not match") and "T_mean.mean" in m for m in msgs)
    assert all(f.store == "sets/normalization-600m.json" for f in report.findings)


def test_normalization_agrees_with_numpy(tree):
    """Statistics replaced by numpy's own float64 mean and population std (ddof=0) in both
    the attr and the JSON still verify: they agree with lesprep's streamed merge to 1e-9."""
    store = tree / "sets" / "train" / "scale-600m.zarr"
    root = zarr.open_group(str(store), mode="r")
    doc = json.loads(root.attrs["normalization"])
    for name, st in doc["statistics"].items():
        a = np.asarray(root[name][...], dtype=np.float64).reshape(-1)
        st.update(mean=float(np.mean(a)), std=float(np.std(a, ddof=0)), count=a.size)
    set_attrs(store, normalization=json.dumps(doc, sort_keys=True))
    (tree / "sets" / "normalization-600m.json").write_text(json.dumps(doc))
    report = verify_results(tree)
    assert report.ok, report.summary()


def test_nan_in_canonical_chunk(tree):
    arr = zarr.open_array(str(tree / "cases" / "cu-marro-02" / "canonical.zarr" / "qc"), mode="r+")
    arr[1, 2, 3, 4] = np.nan
    report = verify_results(tree)
    assert checks_of(report) == {"nan"}
    (f,) = report.findings
    assert f.store == "cases/cu-marro-02/canonical.zarr"
    assert f.message == "qc: 1 NaN, 0 inf (first at time=1, z=2, y=3, x=4)"


def test_nan_skewness_is_forbidden(tree):
    """Skewness is 0, not NaN, where the block variance is 0; a NaN there is reported."""
    path = tree / "cases" / "sc-ostra-01" / "scale-200m.zarr" / "qc_skew"
    arr = zarr.open_array(str(path), mode="r+")
    arr[0, 0, 0, 0] = np.nan
    report = verify_results(tree, sample_checks=0)
    assert [(f.store, f.message.split(":")[0]) for f in report.by_check("nan")] == [
        ("cases/sc-ostra-01/scale-200m.zarr", "qc_skew")
    ]


def test_changed_set_value_differs_from_case_store(tree):
    store = tree / "sets" / "test" / "scale-600m.zarr"
    arr = zarr.open_array(str(store / "qv_mean"), mode="r+")
    arr[5] = arr[5] * np.float32(1.01)
    report = verify_results(tree, sample_checks=10**9)  # compare every sample
    assert checks_of(report) == {"consistency"}
    (f,) = report.findings
    assert f.store == "sets/test/scale-600m.zarr"
    assert f.message.startswith("qv_mean: 1 of ")
    assert "first: sample 5," in f.message


def test_changed_lagged_value_differs_from_case_store(tree):
    store = tree / "sets" / "test" / "scale-600m.zarr"  # test: the normalization stays
    arr = zarr.open_array(str(store / "qc_mean_lag1"), mode="r+")
    arr[3] = arr[3] + np.float32(1e-3)
    report = verify_results(tree, sample_checks=10**9)
    assert checks_of(report) == {"consistency"}
    (f,) = report.findings
    assert f.message.startswith("qc_mean_lag1: 1 of ")
    assert "qc_mean 1 output time(s) earlier" in f.message


def test_changed_set_patch_differs_from_case_store(tree):
    store = tree / "sets" / "test" / "scale-600m.zarr"
    arr = zarr.open_array(str(store / "w_patch"), mode="r+")
    arr[7, 2, 3] = arr[7, 2, 3] + np.float32(0.5)
    report = verify_results(tree, sample_checks=10**9)
    assert checks_of(report) == {"consistency"}
    assert report.findings[0].message.startswith("w_patch: 1 of ")


def test_recorded_filters_decide_the_sample_count(tree):
    store = tree / "sets" / "test" / "scale-200m.zarr"
    prov = provenance.load(open_store(store).attrs)
    prov["steps"][-1]["settings"]["time_stride"] = 1  # not the stride the set was built with
    set_attrs(store, **{provenance.ATTR: json.dumps(prov, sort_keys=True)})
    report = verify_results(tree)
    assert checks_of(report) == {"consistency"}
    assert any("expected" in f.message and "time_stride 1" in f.message for f in report.findings)


def test_every_failure_is_reported_at_once(tree):
    (tree.parent / raw_files_of(tree, "sc-ostra-02")[-1]).unlink()
    arr = zarr.open_array(str(tree / "cases" / "sc-ostra-01" / "canonical.zarr" / "T"), mode="r+")
    arr[0, 0, 0, 0] = np.nan
    set_attrs(tree / "sets" / "test" / "scale-600m.zarr", **{provenance.ATTR: None})
    report = verify_results(tree)
    assert {"raw_files", "nan", "provenance"} <= checks_of(report)
    text = report.summary()
    assert text.splitlines()[0].endswith(f"FAILED, {len(report.findings)} findings")
    for f in report.findings:
        assert str(f) in text.splitlines()
    assert "  nan: " in text and "1 failed" in text


def test_summary_format():
    report = VerifyReport(
        findings=[Finding("nan", "cases/a/canonical.zarr", "qc: 1 NaN, 0 inf")],
        checked={"nan": 3, "open": 2},
        results="results",
    )
    assert not report.ok
    assert report.summary().splitlines() == [
        "verify results: FAILED, 1 finding",
        "[nan] cases/a/canonical.zarr: qc: 1 NaN, 0 inf",
        "checks:",
        "  open: 2 stores checked, 0 failed",
        "  nan: 3 arrays checked, 1 failed",
    ]


def test_missing_results_folder_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="is not a folder"):
        verify_results(tmp_path / "no-such-results")


def test_command_exit_codes(tree):
    import subprocess
    import sys

    exe = str(Path(sys.executable).parent / "lesprep")
    res = subprocess.run([exe, "verify", str(tree)], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stdout + res.stderr
    raw = raw_files_of(tree, "sc-ostra-01")[0]
    path = Path(raw) if Path(raw).is_absolute() else tree.parent / raw
    path.unlink()
    res = subprocess.run([exe, "verify", str(tree)], capture_output=True, text=True, timeout=300)
    assert res.returncode == 1 and "missing:" in res.stdout

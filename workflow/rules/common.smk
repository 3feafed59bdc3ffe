# Helpers only, no rules: config validation, the case sheet, wildcard constraints and
# small functions named for what they return.
from pathlib import Path

from snakemake.utils import validate

from lesprep.config import prepare_config, read_case_sheet
from lesprep.provenance import code_version
from lesprep.resources import job_resources


validate(config, "../schemas/config.schema.yaml")
config.update(prepare_config(config, what="config"))

RESULTS = config["results"]
DEMO_ROOT = config["demo"]["root"]
CASES = {row.case: row for row in read_case_sheet(config["cases"])}
CODE_VERSION = code_version()


wildcard_constraints:
    case="|".join(CASES),


def case_ids():
    """Every case id of the case sheet."""
    return list(CASES)


def raw_inputs(wildcards):
    """The raw files of a case (the generated archive folder for demo cases)."""
    row = CASES[wildcards.case]
    if row.demo:
        return [f"{DEMO_ROOT}/{row.case}"]
    return sorted(glob_wildcards_free(row.raw))


def glob_wildcards_free(pattern):
    """Files matching a plain shell glob, relative to the working directory."""
    import glob as _glob

    return [p for p in _glob.glob(pattern, recursive=True) if Path(p).is_file()]


def varmap_of(wildcards):
    """Variable map of a case."""
    return CASES[wildcards.case].varmap


def ingest_params(wildcards):
    """Everything the ingest result depends on besides its input files."""
    row = CASES[wildcards.case]
    return {
        "case": row.case,
        "regime": row.regime,
        "raw": row.raw,
        "spinup": row.spinup or config["ingest"]["spinup"],
        "ingest": config["ingest"],
        "store": config["store"],
        "code": CODE_VERSION,
    }


def mem_mb(step):
    """Resource function: memory (MB) of a job of `step`, from its real input size."""

    def _mem(wildcards, input, attempt):
        return job_resources(step, list(input), attempt, config)["mem_mb"]

    return _mem


def runtime(step):
    """Resource function: runtime (minutes) of a job of `step`."""

    def _runtime(wildcards, input, attempt):
        return job_resources(step, list(input), attempt, config)["runtime"]

    return _runtime


def canonical_stores():
    """Canonical store of every case."""
    return [f"{RESULTS}/cases/{c}/canonical.zarr" for c in CASES]


def final_outputs():
    """Everything `rule all` asks for."""
    return canonical_stores()

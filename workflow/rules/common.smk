# Helpers only, no rules: config validation, the case sheet, wildcard constraints and
# small functions named for what they return.
from pathlib import Path

from lesprep.config import prepare_config, read_case_sheet
from lesprep.provenance import code_version
from lesprep.jobs.resources import job_resources, job_threads


config.update(prepare_config(config, what="config"))

RESULTS = config["results"]
DEMO_ROOT = config["demo"]["root"]
CASES = {row.case: row for row in read_case_sheet(config["cases"])}
CODE_VERSION = code_version()




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


def threads_for(step):
    """Thread function: one thread for small inputs, `resources.threads` for big ones."""

    def _threads(wildcards, input):
        return job_threads(step, list(input), config)

    return _threads


def canonical_stores():
    """Canonical store of every case."""
    return [f"{RESULTS}/cases/{c}/canonical.zarr" for c in CASES]




# --- coarsening -----------------------------------------------------------------------
from lesprep.scales.spec import parse_scales, scale_groups as _scale_groups

SCALE_LABELS = [s.label for s in parse_scales(config["coarsen"]["scales"])]
SCALE_GROUPS = _scale_groups(config["coarsen"])


def scale_store(case, label):
    """Path of one case's store at one scale."""
    return f"{RESULTS}/cases/{case}/scale-{label}.zarr"


def coarsen_params(group):
    """Params of a coarsening group's jobs: what their results depend on besides input.

    Only this group's scales (and the patches of those scales) enter, so changing
    another group's scale does not re-run this group.
    """
    labels = SCALE_GROUPS[group]
    patches = dict(config["coarsen"]["patches"])
    patches["scales"] = [
        s.label for s in parse_scales(patches.get("scales", [])) if s.label in labels
    ]
    coarsen = {k: v for k, v in config["coarsen"].items() if k not in ("scales", "groups")}
    coarsen["patches"] = patches
    return {
        "labels": labels,
        "scales": [s.text for s in parse_scales(config["coarsen"]["scales"]) if s.label in labels],
        "coarsen": coarsen,
        "ingest": {k: config["ingest"][k] for k in ("dtype", "chunk_mib")},
        "store": config["store"],
        "code": CODE_VERSION,
    }


def scale_stores():
    """Every case's store at every scale."""
    return [scale_store(c, lab) for c in CASES for lab in SCALE_LABELS]


# --- splits and sets ------------------------------------------------------------------
from lesprep.sets.splits import CaseInfo, SplitRule, assign_splits

SPLIT_RULE = SplitRule(fractions=config["splits"]["fractions"], seed=config["splits"]["seed"])
ASSIGNMENT, SPLIT_MESSAGES = assign_splits(
    [CaseInfo(case=r.case, regime=r.regime, pinned=r.split or None) for r in CASES.values()],
    SPLIT_RULE,
)
for _msg in SPLIT_MESSAGES:
    logger.warning(f"lesprep splits: {_msg}")
SPLITS = [s for s in ("train", "validation", "test") if any(a.split == s for a in ASSIGNMENT)]


def cases_of(split):
    """Cases assigned to a split (sorted)."""
    return sorted(a.case for a in ASSIGNMENT if a.split == split)


def set_inputs(wildcards):
    """Per-case stores a training store is assembled from."""
    return [scale_store(c, wildcards.scale) for c in cases_of(wildcards.split)]


def train_set_inputs(wildcards):
    """Per-case stores of the train split at one scale."""
    return [scale_store(c, wildcards.scale) for c in cases_of("train")]


def train_set_params(wildcards):
    """Params of the train store (the train split of :func:`set_params`)."""
    return _set_params("train", wildcards.scale)


def set_params(wildcards):
    """Everything a training store depends on besides its inputs."""
    return _set_params(wildcards.split, wildcards.scale)


def _set_params(split, scale):
    return {
        "split": split,
        "scale": scale,
        "cases": cases_of(split),
        "regimes": {c: CASES[c].regime for c in cases_of(split)},
        "sets": config["sets"],
        "dtype": config["ingest"]["dtype"],
        "store": config["store"],
        "rule": SPLIT_RULE.to_dict(),
        # this split's own cases only, so a case joining another split changes nothing here
        "assignment": [
            {"case": a.case, "regime": a.regime, "split": a.split, "reason": a.reason}
            for a in ASSIGNMENT
            if a.split == split
        ],
        "code": CODE_VERSION,
    }


def split_params(wildcards):
    """The split rule and the case list (the assignment depends on nothing else)."""
    return {
        "rule": SPLIT_RULE.to_dict(),
        "cases": [[r.case, r.regime, r.split] for r in CASES.values()],
        "code": CODE_VERSION,
    }


def set_stores_only():
    """Every training store (no statistics files)."""
    return [f"{RESULTS}/sets/{s}/scale-{lab}.zarr" for s in SPLITS for lab in SCALE_LABELS]


def report_scales():
    """Scales that get the train/test figures (both splits must exist)."""
    return SCALE_LABELS if {"train", "test"} <= set(SPLITS) else []


def report_outputs():
    """Figures and tables of the report."""
    return [f"{RESULTS}/scenes.tsv", f"{RESULTS}/baseline.tsv", f"{RESULTS}/report/splits.tsv"] + [
        f"{RESULTS}/figures/cases/{c}/{k}.png"
        for c in CASES
        for k in ("timeseries", "profiles", "lwp_map")
    ]


def set_stores():
    """Every training store and the train normalization statistics."""
    out = [f"{RESULTS}/sets/{s}/scale-{lab}.zarr" for s in SPLITS for lab in SCALE_LABELS]
    if "train" in SPLITS:
        out += [f"{RESULTS}/sets/normalization-{lab}.json" for lab in SCALE_LABELS]
    return out


def final_outputs():
    """Everything `rule all` asks for."""
    return [
        *canonical_stores(),
        *scale_stores(),
        f"{RESULTS}/splits.tsv",
        *set_stores(),
        *report_outputs(),
    ]


wildcard_constraints:
    case="|".join(CASES),
    scale="|".join(SCALE_LABELS),
    split="train|validation|test",

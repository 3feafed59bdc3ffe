# Helpers only, no rules: the settings parsed once, the case sheet, the split assignment,
# wildcard constraints and small functions named for what they return.
import glob as _glob
from pathlib import Path

from lesprep.jobs.resources import job_resources, job_threads
from lesprep.jobs.settings import WorkflowSettings
from lesprep.jobs.steps import stage_code_versions
from lesprep.layout import CASE_FIGURES, REGIME_FIGURES, SCALE_FIGURES, SPLITS
from lesprep.sets.splits import CaseInfo, assign_splits

SETTINGS = WorkflowSettings.from_config(config)
LAYOUT = SETTINGS.results
CASES = {row.case: row for row in SETTINGS.case_sheet()}
CODE = stage_code_versions()
# Store labels: every scale's store and its layer stores (scale-<label>_layers-<name>);
# the sets, normalization and figures treat each the same way.
SCALE_LABELS = list(SETTINGS.coarsen.store_labels)
SCALE_GROUPS = {g: SETTINGS.coarsen.for_group(g).store_labels for g in SETTINGS.coarsen.groups}

# The split is computed once, here; the splits job writes this assignment and its notes.
ASSIGNMENT, SPLIT_MESSAGES = assign_splits(
    [
        CaseInfo(
            case=r.case,
            regime=r.regime,
            pinned=r.split or None,
            group=r.group,
            attributes=r.attributes,
        )
        for r in CASES.values()
    ],
    SETTINGS.split_rule,
)
ACTIVE_SPLITS = [s for s in SPLITS if any(a.split == s for a in ASSIGNMENT)]


def case_ids():
    """Every case id of the case sheet."""
    return list(CASES)


def demo_archive(case):
    """Folder of a demo case's generated archive."""
    return str(SETTINGS.demo.root / case)


def raw_inputs(wildcards):
    """The raw files of a case (the generated archive folder for demo cases)."""
    row = CASES[wildcards.case]
    if row.demo:
        return [demo_archive(row.case)]
    return sorted(p for p in _glob.glob(row.raw, recursive=True) if Path(p).is_file())


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
        "results": str(LAYOUT.root),
        "ingest": SETTINGS.ingest_for(row).to_dict(),
        "code": CODE["ingest"],
    }


def mem_mb(step):
    """Resource function: memory (MB) of a job of `step`, from its real input size."""

    def _mem(wildcards, input, attempt):
        return job_resources(step, list(input), attempt, SETTINGS.resources)["mem_mb"]

    return _mem


def runtime(step):
    """Resource function: runtime (minutes) of a job of `step`."""

    def _runtime(wildcards, input, attempt):
        return job_resources(step, list(input), attempt, SETTINGS.resources)["runtime"]

    return _runtime


def threads_for(step):
    """Thread function: one thread for small inputs, `resources.threads` for big ones."""

    def _threads(wildcards, input):
        return job_threads(step, list(input), SETTINGS.resources)

    return _threads


def canonical_store(case):
    """Canonical store of one case."""
    return str(LAYOUT.canonical(case))


def canonical_stores():
    """Canonical store of every case."""
    return [canonical_store(c) for c in CASES]


def case_scenes(case):
    """Scene table of one case."""
    return str(LAYOUT.case_scenes(case))


def case_scenes_params(wildcards):
    """Params of a case's scene table: the case id and the scene code version."""
    return {"case": wildcards.case, "code": CODE["scenes"]}


def scale_store(case, label):
    """Path of one case's store at one scale."""
    return str(LAYOUT.scale_store(case, label))


def coarsen_params(group):
    """Params of a coarsening group's jobs: only this group's scales (and their patches)
    enter, so changing another group's scale does not re-run this group."""
    return {
        "results": str(LAYOUT.root),
        "coarsen": SETTINGS.coarsen.for_group(group).to_dict(),
        "code": CODE["coarsen"],
    }


def scale_stores():
    """Every case's store at every scale."""
    return [scale_store(c, lab) for c in CASES for lab in SCALE_LABELS]


def cases_of(split):
    """Cases assigned to a split (sorted)."""
    return sorted(a.case for a in ASSIGNMENT if a.split == split)


def set_store(split, label):
    """Training store of a split at one scale."""
    return str(LAYOUT.set_store(split, label))


def set_inputs_of(split):
    """Input function: the per-case stores a split's training store is assembled from."""

    def _inputs(wildcards):
        return [scale_store(c, wildcards.scale) for c in cases_of(split or wildcards.split)]

    return _inputs


def case_attributes(cases):
    """Case -> its case-sheet attributes as strings: per-sample coordinates of the sets."""
    return {c: {k: str(v) for k, v in CASES[c].attributes.items()} for c in cases}


def set_params_of(split):
    """Params function: everything a split's training store depends on besides inputs.

    Only this split's own cases enter, so a case joining another split changes nothing here.
    """

    def _params(wildcards):
        name = split or wildcards.split
        cases = cases_of(name)
        return {
            "split": name,
            "scale": wildcards.scale,
            "cases": cases,
            "regimes": {c: CASES[c].regime for c in cases},
            "attributes": case_attributes(cases),
            "sets": SETTINGS.sets.to_dict(),
            "rule": SETTINGS.split_rule.to_dict(),
            "assignment": [a.to_dict() for a in ASSIGNMENT if a.split == name],
            "code": CODE["assemble"],
        }

    return _params


def split_params(wildcards):
    """The assignment computed when the workflow was planned, and its notes."""
    return {
        "assignment": [a.to_dict() for a in ASSIGNMENT],
        "messages": list(SPLIT_MESSAGES),
        "code": CODE["splits"],
    }


def set_stores_only():
    """Every training store (no statistics files)."""
    return [set_store(s, lab) for s in ACTIVE_SPLITS for lab in SCALE_LABELS]


def report_scales():
    """Scales that get the train/test figures (both splits must exist)."""
    return SCALE_LABELS if {"train", "test"} <= set(ACTIVE_SPLITS) else []


def case_figures():
    """Every per-case figure."""
    return [str(LAYOUT.case_figure(c, k)) for c in CASES for k in CASE_FIGURES]


def regime_outputs():
    """The regime labels, their fit and figures (when there is a train split to fit on)."""
    if "train" not in ACTIVE_SPLITS:
        return []
    return [
        str(LAYOUT.regimes_tsv()),
        str(LAYOUT.regimes_json()),
        *(str(LAYOUT.regime_figure(kind)) for kind in REGIME_FIGURES),
    ]


def report_outputs():
    """Figures and tables of the report."""
    return [
        str(LAYOUT.scenes_tsv()),
        str(LAYOUT.baseline_tsv()),
        str(LAYOUT.report_splits_tsv()),
        *case_figures(),
        *regime_outputs(),
    ]


def set_stores():
    """Every training store and the train normalization statistics."""
    out = set_stores_only()
    if "train" in ACTIVE_SPLITS:
        out += [str(LAYOUT.normalization(lab)) for lab in SCALE_LABELS]
    return out


def final_outputs():
    """Everything `rule all` asks for."""
    return [
        *canonical_stores(),
        *scale_stores(),
        str(LAYOUT.splits_tsv()),
        *set_stores(),
        *report_outputs(),
    ]


wildcard_constraints:
    case="|".join(CASES),
    scale="|".join(SCALE_LABELS),
    split="|".join(SPLITS),

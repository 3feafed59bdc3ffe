"""Entry points of the workflow's scripts: one function per rule.

Each ``workflow/scripts/<step>.py`` calls :func:`run` with the Snakemake object; ``run``
sends logging to the rule's log file, calls the step function with plain arguments
taken from the job, and turns a :class:`lesprep.errors.LesprepError` into a one-line
message on stderr and in the log, with a non-zero exit.
"""

from __future__ import annotations

import logging
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from lesprep.errors import LesprepError

log = logging.getLogger("lesprep")


def _demo(smk: Any) -> None:
    from lesprep.demo.physics import demo_case, write_demo_case

    out = Path(smk.output[0])
    spec = demo_case(smk.wildcards.case)
    size = dict(smk.params.size or {})
    if size:
        spec = spec.with_size(**size)
    write_demo_case(spec, out.parent)


def _ingest(smk: Any) -> None:
    from lesprep.canonical.ingest import ingest_case, settings_from_config

    p = smk.params.settings
    ingest_case(
        case=p["case"],
        raw=p["raw"],  # the case sheet's glob; for demo cases the rule's input is its folder
        varmap=smk.input.varmap,
        settings=settings_from_config(smk.config, p["spinup"]),
        out=smk.output.store,
        regime=p["regime"],
        config_record=smk.config,
    )


def _coarsen(smk: Any) -> None:
    from lesprep.scales.coarsen import coarsen_case, settings_from_config

    p = smk.params.settings
    cfg = {
        "coarsen": {**p["coarsen"], "scales": p["scales"]},
        "ingest": p["ingest"],
        "store": p["store"],
    }
    settings = settings_from_config(cfg, p["labels"])
    outputs = dict(zip(p["labels"], list(smk.output.stores), strict=True))
    coarsen_case(smk.input.canonical, outputs, settings, config_record=smk.config)


def _splits(smk: Any) -> None:
    from lesprep.sets.splits import CaseInfo, SplitRule, assign_splits, write_assignment_tsv

    p = smk.params.settings
    rule = SplitRule.from_dict(p["rule"])
    cases = [CaseInfo(case=c, regime=r, pinned=s or None) for c, r, s in p["cases"]]
    assignments, messages = assign_splits(cases, rule)
    for m in messages:
        log.warning("%s", m)
    write_assignment_tsv(assignments, smk.output[0])


def _assemble(smk: Any) -> None:
    from lesprep.sets.assemble import build_set, settings_from_config, write_normalization

    p = smk.params.settings
    cfg = {"sets": p["sets"], "ingest": {"dtype": p["dtype"]}, "store": p["store"]}
    inputs = dict(zip(p["cases"], list(smk.input.stores), strict=True))
    assignment = p["assignment"]
    build_set(
        inputs,
        p["regimes"],
        smk.output.store,
        settings_from_config(cfg),
        split=p["split"],
        scale=p["scale"],
        extra_provenance={"split_rule": p["rule"], "assignment": assignment},
    )
    if "stats" in smk.output.keys():  # the train split also yields the normalization
        write_normalization(smk.output.store, smk.output.stats, scale=p["scale"])


def _figures(smk: Any) -> None:
    from lesprep.report import figures

    results = Path(smk.params.results)
    for case in smk.params.cases:
        canon = results / "cases" / case / "canonical.zarr"
        out = results / "figures" / "cases" / case
        figures.case_timeseries(canon, None, None, out / "timeseries.png")
        figures.case_profiles(canon, out / "profiles.png")
        figures.case_lwp_map(canon, out / "lwp_map.png")
    for label in smk.params.scales:
        sets = results / "sets"
        out = results / "figures" / "scales" / label
        train, test = sets / "train" / f"scale-{label}.zarr", sets / "test" / f"scale-{label}.zarr"
        figures.scale_target_distribution(train, test, out / "target_distribution.png")
        figures.scale_cf_vs_rh(train, out / "cf_vs_rh.png")


def _tables(smk: Any) -> None:
    import shutil

    from lesprep.report import figures

    cases = {c: p for c, p in zip(smk.params.cases, smk.input.canonical, strict=True)}
    figures.write_scenes_tsv(cases, smk.output.scenes)
    figures.write_baseline_table(smk.params.sets, smk.output.baseline)
    shutil.copyfile(smk.input.splits, smk.output.splits)


STEPS: dict[str, Callable[[Any], None]] = {
    "demo": _demo,
    "ingest": _ingest,
    "coarsen": _coarsen,
    "splits": _splits,
    "assemble": _assemble,
    "figures": _figures,
    "tables": _tables,
}


def _use_job_threads(threads: int) -> None:
    """Keep the compiled kernels to the job's threads (not every CPU of the node)."""
    try:
        import numba

        numba.set_num_threads(max(1, min(threads, numba.config.NUMBA_NUM_THREADS)))
    except ImportError:  # the numpy engine is used then
        pass


def run(step: str, smk: Any) -> None:
    """Run one workflow step for a Snakemake job (``smk`` is the ``snakemake`` object)."""
    log_file = smk.log[0] if len(smk.log) else None
    handlers: list[logging.Handler] = [logging.StreamHandler(sys.stderr)]
    if log_file:
        Path(log_file).parent.mkdir(parents=True, exist_ok=True)
        handlers.append(logging.FileHandler(log_file, mode="w"))
    logging.basicConfig(
        level=logging.INFO,
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
        handlers=handlers,
        force=True,
    )
    logging.getLogger("pint").setLevel(logging.ERROR)  # unit redefinitions by cf-xarray
    _use_job_threads(int(getattr(smk, "threads", 1) or 1))
    try:
        STEPS[step](smk)
    except LesprepError as exc:
        log.error("%s", exc)
        print(f"lesprep {step} failed: {exc}", file=sys.stderr)
        sys.exit(1)

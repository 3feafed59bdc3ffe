"""Entry points of the workflow's scripts: one function per rule.

Each ``workflow/scripts/<step>.py`` calls :func:`run` with the Snakemake object; ``run``
sends logging to the rule's log file, calls the step function with plain arguments
taken from the job (its params, ``smk.input`` and ``smk.output``; never the config),
and turns a :class:`lesprep.errors.LesprepError` into a one-line message on stderr and
in the log, with a non-zero exit.
"""

from __future__ import annotations

import logging
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from lesprep.codeversion import code_version
from lesprep.errors import LesprepError
from lesprep.layout import ResultsLayout

log = logging.getLogger("lesprep")


STAGE_MODULES: dict[str, tuple[str, ...]] = {
    "demo": ("lesprep.demo",),
    "ingest": ("lesprep.canonical.ingest",),
    "coarsen": ("lesprep.scales.coarsen",),
    "gather": ("lesprep.segments.gather",),
    "splits": ("lesprep.sets.splits",),
    "assemble": ("lesprep.sets.assemble",),
    "report": ("lesprep.report.figures", "lesprep.report.tables"),
    "scenes": ("lesprep.report.scene_tables",),
    "regimes": ("lesprep.report.regime_figures",),
}
"""Entry modules of each stage; a stage's code version covers them and what they import
(:mod:`lesprep.codeversion`)."""


def stage_code_versions() -> dict[str, str]:
    """Code version of every stage (see :data:`STAGE_MODULES`)."""
    return {stage: code_version(mods) for stage, mods in STAGE_MODULES.items()}


def _demo(smk: Any) -> None:
    from lesprep.demo import demo_case, write_demo_case

    out = Path(smk.output[0])
    spec = demo_case(smk.wildcards.case)
    size = dict(smk.params.size)
    if size:
        spec = spec.with_size(**size)
    write_demo_case(spec, out.parent)


def _ingest(smk: Any) -> None:
    from lesprep.canonical.ingest import ingest_case
    from lesprep.canonical.settings import IngestSettings

    p = smk.params.settings
    segment = p["segment"]  # Segment.to_dict() of a time segment, or None
    ingest_case(
        # a segment's own files; else the case sheet's glob (for demo cases the rule's
        # input is its folder)
        case=p["case"],
        raw=list(segment["files"]) if segment is not None else p["raw"],
        varmap=smk.input.varmap,
        settings=IngestSettings.from_dict(p["ingest"]),
        out=smk.output.store,
        regime=p["regime"],
        config_record=p,
        segment=segment,
    )


def _coarsen(smk: Any) -> None:
    from lesprep.scales.coarsen import coarsen_case
    from lesprep.scales.settings import CoarsenSettings

    p = smk.params.settings
    settings = CoarsenSettings.from_dict(p["coarsen"])
    outputs = dict(zip(settings.store_labels, list(smk.output.stores), strict=True))
    ref = getattr(smk.input, "reference", None)  # a time segment's first segment, if any
    reference = ref if isinstance(ref, str) else (ref[0] if ref else None)
    coarsen_case(smk.input.canonical, outputs, settings, config_record=p, reference=reference)


def _gather(smk: Any) -> None:
    from lesprep.segments.gather import gather_stores

    p = smk.params.settings
    for out, segments in zip(list(smk.output.stores), p["segments"], strict=True):
        facts = gather_stores(segments, out)
        log.info(
            "gathered %s from %d segment(s): %d output times, %d chunk files linked, "
            "%d bytes written",
            out,
            len(segments),
            facts["times"],
            facts["linked"],
            facts["bytes_written"],
        )


def _splits(smk: Any) -> None:
    from lesprep.sets.splits import Assignment, write_assignment_tsv

    p = smk.params.settings
    for m in p["messages"]:
        log.warning("%s", m)
    write_assignment_tsv([Assignment.from_dict(a) for a in p["assignment"]], smk.output[0])


def _assemble(smk: Any) -> None:
    from lesprep.sets.assemble import build_set, write_normalization
    from lesprep.sets.settings import SetSettings

    p = smk.params.settings
    inputs = dict(zip(p["cases"], list(smk.input.stores), strict=True))
    train = "stats" in smk.output.keys()  # the train split also yields the normalization
    stats: dict[str, dict[str, float]] = {}
    build_set(
        inputs,
        p["regimes"],
        smk.output.store,
        SetSettings.from_dict(p["sets"]),
        split=p["split"],
        scale=p["scale"],
        attributes=p["attributes"],
        extra_provenance={"split_rule": p["rule"], "assignment": p["assignment"]},
        threads=int(getattr(smk, "threads", 1) or 1),
        statistics=stats if train else None,
    )
    if train:  # statistics collected while writing (an empty set has none)
        write_normalization(smk.output.store, smk.output.stats, scale=p["scale"], stats=stats)


def _figures(smk: Any) -> None:
    from lesprep.report.figures import draw_report_figures

    p = smk.params.settings
    draw_report_figures(
        ResultsLayout(p["results"]), p["cases"], p["scales"], layer_figures=p["layer_figures"]
    )


def _tables(smk: Any) -> None:
    from lesprep.report.tables import write_report_tables

    p = smk.params.settings
    write_report_tables(
        p["sets"],
        splits=smk.input.splits,
        baseline_out=smk.output.baseline,
        splits_out=smk.output.splits,
    )


def _case_scenes(smk: Any) -> None:
    from lesprep.report.scene_tables import write_case_scenes_tsv

    write_case_scenes_tsv(smk.input.canonical, smk.params.settings["case"], smk.output[0])


def _scene_table(smk: Any) -> None:
    from lesprep.report.scene_tables import gather_scenes_tsv

    gather_scenes_tsv(list(smk.input.cases), smk.output.scenes)


def _regimes(smk: Any) -> None:
    from lesprep.layout import REGIME_FIGURES
    from lesprep.report.regime_figures import write_regime_outputs
    from lesprep.report.settings import RegimeSettings

    p = smk.params.settings
    write_regime_outputs(
        smk.input.scenes,
        smk.input.splits,
        RegimeSettings.from_dict(p["regimes"]),
        table_out=smk.output.table,
        fit_out=smk.output.fit,
        figures={kind: getattr(smk.output, kind) for kind in REGIME_FIGURES},
    )


STEPS: dict[str, Callable[[Any], None]] = {
    "demo": _demo,
    "ingest": _ingest,
    "coarsen": _coarsen,
    "gather": _gather,
    "splits": _splits,
    "assemble": _assemble,
    "figures": _figures,
    "tables": _tables,
    "case_scenes": _case_scenes,
    "scene_table": _scene_table,
    "regimes": _regimes,
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

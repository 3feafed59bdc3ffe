"""Settings objects for tests, built the way the workflow builds them: from a config
validated against the schema, so every default comes from the schema."""

from __future__ import annotations

from dataclasses import replace
from typing import Any

from lesprep.canonical.settings import IngestSettings
from lesprep.jobs.settings import WorkflowSettings
from lesprep.scales.settings import CoarsenSettings
from lesprep.sets.settings import SetSettings


def workflow_settings(**sections: Any) -> WorkflowSettings:
    """Settings of a config holding only ``sections`` (plus a case sheet path and a scale)."""
    cfg: dict[str, Any] = {"cases": "cases.tsv", "coarsen": {"scales": ["1 km"]}}
    cfg.update(sections)
    return WorkflowSettings.from_config(cfg)


def ingest_settings(
    spinup: str = "1 h", cloud_threshold: str = "1e-5 kg/kg", ranges: Any = None, **ingest: Any
) -> IngestSettings:
    """Ingest settings from the schema's defaults and the given ``ingest`` keys."""
    s = workflow_settings(
        ingest={"spinup": spinup, "cloud_threshold": cloud_threshold, **ingest}
    ).ingest
    return s if ranges is None else replace(s, ranges=dict(ranges))


def coarsen_settings(scales: Any = (), **fields: Any) -> CoarsenSettings:
    """Coarsening settings from the schema's defaults with fields replaced."""
    base = workflow_settings().coarsen.base
    return replace(base, scales=tuple(scales), **fields)


def set_settings(**fields: Any) -> SetSettings:
    """Training-store settings from the schema's defaults with fields replaced."""
    return replace(workflow_settings().sets, **fields)

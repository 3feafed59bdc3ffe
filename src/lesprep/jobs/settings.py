"""The workflow's settings, parsed once: from a validated config to one value per stage.

:class:`WorkflowSettings` is built once when the workflow is planned (or by the command
line and the tests). Each job receives only its own stage's settings as plain
``to_dict()`` params and rebuilds them with ``from_dict()``, so a job never reads the
config, and a setting that a job does not use never re-runs it. Defaults live in the
config schema only (``lesprep/schemas/config.schema.yaml``).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any

from lesprep.canonical.settings import IngestSettings
from lesprep.config import CaseRow, prepare_config, read_case_sheet, read_config
from lesprep.errors import ConfigError
from lesprep.jobs.resources import ResourceSettings
from lesprep.layout import ResultsLayout
from lesprep.report.settings import RegimeSettings
from lesprep.scales.settings import CoarsenPlan
from lesprep.segments.plan import SegmentSettings
from lesprep.sets.settings import SetSettings
from lesprep.sets.splits import SplitRule
from lesprep.store import StoreSettings


@dataclass(frozen=True, kw_only=True)
class DemoSettings:
    """Where the synthetic demo archives go and an optional grid override."""

    root: Path
    size: Mapping[str, int]


@dataclass(frozen=True, kw_only=True)
class WorkflowSettings:
    """Every stage's settings, parsed from one validated config.

    Attributes
    ----------
    results
        The results tree.
    cases
        Path of the case sheet.
    case_attributes
        Extra case-sheet columns, name to the tuple of allowed values (empty: any value).
    demo
        Demo archive settings.
    ingest
        Ingest settings (a case's own spin-up: :meth:`ingest_for`).
    coarsen
        Scales, scale groups and the coarsening settings (per group:
        :meth:`CoarsenPlan.for_group`).
    split_rule
        Fractions and seed of the whole-case split.
    sets
        Training-store settings.
    regimes
        Scene-regime labelling (report).
    store
        Compressor settings of every store.
    resources
        Job sizing.
    segments
        Time segments of the cases with a raw archive (:mod:`lesprep.segments.plan`).
    """

    results: ResultsLayout
    cases: Path
    case_attributes: Mapping[str, tuple[str, ...]]
    demo: DemoSettings
    ingest: IngestSettings
    coarsen: CoarsenPlan
    split_rule: SplitRule
    sets: SetSettings
    regimes: RegimeSettings
    store: StoreSettings
    resources: ResourceSettings
    segments: SegmentSettings

    @classmethod
    def from_config(cls, cfg: Mapping[str, Any], *, what: str = "config") -> WorkflowSettings:
        """Validate ``cfg`` against the schema, fill its defaults and parse every stage.

        Raises
        ------
        lesprep.errors.ConfigError
            A schema violation or a value that does not parse (names the key).
        """
        c = prepare_config(dict(cfg), what=what)
        attributes = {name: tuple(values) for name, values in c["case_attributes"].items()}
        split_rule = SplitRule.from_dict(c["splits"])
        undeclared = [a for a in split_rule.stratify if a != "regime" and a not in attributes]
        if undeclared:
            raise ConfigError(
                f"{what}: splits.stratify lists {undeclared}, which case_attributes does not "
                f"declare (declared: {sorted(attributes)}); expected 'regime' or declared names",
                hint="declare the column under case_attributes or remove it from the list",
            )
        store = StoreSettings.from_dict(c["store"])
        ingest = IngestSettings.from_config(c["ingest"], store)
        dtype = ingest.dtype
        return cls(
            results=ResultsLayout(c["results"]),
            cases=Path(c["cases"]),
            case_attributes=MappingProxyType(attributes),
            demo=DemoSettings(root=Path(c["demo"]["root"]), size=dict(c["demo"]["size"])),
            ingest=ingest,
            coarsen=CoarsenPlan.from_config(c["coarsen"], dtype=dtype, store=store),
            split_rule=split_rule,
            sets=SetSettings.from_config(c["sets"], dtype=dtype, store=store),
            regimes=RegimeSettings.from_config(c["regimes"]),
            store=store,
            resources=ResourceSettings.from_config(c["resources"]),
            segments=SegmentSettings(
                times=int(c["segments"]["times"]), settle_s=float(c["segments"]["settle_s"])
            ),
        )

    @classmethod
    def load(cls, path: str | Path) -> WorkflowSettings:
        """Read a config file (YAML) and parse it."""
        return cls.from_config(read_config(path), what=str(path))

    def case_sheet(self) -> list[CaseRow]:
        """Read the case sheet with the declared attribute columns.

        Returns
        -------
        list of CaseRow
            See :func:`lesprep.config.read_case_sheet`.
        """
        return read_case_sheet(self.cases, attributes=self.case_attributes)

    def ingest_for(self, row: CaseRow) -> IngestSettings:
        """Ingest settings of one case (its own spin-up, if the case sheet gives one)."""
        return self.ingest.for_case(row.spinup_s)

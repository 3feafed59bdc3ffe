"""Configuration and case sheet: loading, schema validation and defaults.

The JSON schemas ship with the package (``lesprep/schemas``); the workflow, the command
line and the tests all validate through this module, which fills defaults the way
Snakemake's own validator does (a nested default fills only when its parent has
``default: {}``).
"""

from __future__ import annotations

import copy
import csv
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

import jsonschema
import yaml

from lesprep.errors import ConfigError
from lesprep.units import parse_quantity

SCHEMA_DIR = Path(__file__).resolve().parent / "schemas"
"""Folder of the JSON schemas (installed with the package)."""

CASE_COLUMNS = ("case", "group", "regime", "varmap", "raw", "split", "spinup", "demo")
"""The fixed columns of the case sheet; extra columns must be declared (``case_attributes``)."""


def _schema(name: str, schema_dir: Path | None = None) -> dict[str, Any]:
    path = (schema_dir or SCHEMA_DIR) / name
    with open(path, encoding="utf-8") as fh:
        return yaml.safe_load(fh)


def _fill_defaults(instance: Any, schema: Mapping[str, Any]) -> None:
    """Fill ``default`` values in place, recursing where the parent exists."""
    if isinstance(instance, list) and isinstance(schema.get("items"), Mapping):
        for item in instance:  # objects in a list (e.g. coarsen.layers) get theirs too
            _fill_defaults(item, schema["items"])
        return
    if not isinstance(instance, dict):
        return
    for key, sub in schema.get("properties", {}).items():
        if key not in instance and "default" in sub:
            instance[key] = copy.deepcopy(sub["default"])
        if key in instance:
            _fill_defaults(instance[key], sub)


def validate(instance: Any, schema: Mapping[str, Any], *, what: str) -> None:
    """Validate against a JSON schema and raise a ConfigError naming the bad key.

    Parameters
    ----------
    instance
        The loaded config (or one case-sheet row).
    schema
        JSON schema (draft 2020-12).
    what
        Where the instance comes from, for the message.
    """
    validator = jsonschema.Draft202012Validator(schema)
    errors = sorted(validator.iter_errors(instance), key=lambda e: list(e.absolute_path))
    if errors:
        err = errors[0]
        path = ".".join(str(p) for p in err.absolute_path) or "(top level)"
        raise ConfigError(
            f"{what}: at {path}: {err.message}",
            hint="see lesprep/schemas/ (shipped with the package) for the allowed keys",
        )


def read_config(path: str | Path) -> dict[str, Any]:
    """Read a config file (YAML, safe-loaded) without validating it."""
    with open(path, encoding="utf-8") as fh:
        return yaml.safe_load(fh) or {}


def load_config(path: str | Path, *, schema_dir: Path | None = None) -> dict[str, Any]:
    """Load, validate and default-fill a workflow config file.

    Parameters
    ----------
    path
        YAML file (safe-loaded).
    schema_dir
        Folder of the schemas; defaults to the package's own.

    Returns
    -------
    dict
        The config with defaults filled.
    """
    return prepare_config(read_config(path), what=str(path), schema_dir=schema_dir)


def prepare_config(
    cfg: dict[str, Any], *, what: str = "config", schema_dir: Path | None = None
) -> dict[str, Any]:
    """Validate an already-loaded config dict and fill its defaults (returns a copy).

    Quantities with units are parsed, once, when the settings objects are built from the
    result (:class:`lesprep.jobs.settings.WorkflowSettings`).
    """
    cfg = copy.deepcopy(cfg)
    schema = _schema("config.schema.yaml", schema_dir)
    validate(cfg, schema, what=what)
    _fill_defaults(cfg, schema)
    return cfg


@dataclass(frozen=True, kw_only=True)
class CaseRow:
    """One row of the case sheet.

    Attributes
    ----------
    group
        The case's site group, resolved: the case id when the sheet leaves it empty.
    attributes
        Declared extra columns, name to value (read-only; ``""`` for an empty cell).
    """

    case: str
    regime: str
    varmap: str
    raw: str
    split: str = ""
    spinup_s: float | None = None
    demo: bool = False
    group: str = ""
    attributes: Mapping[str, str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "group", self.group or self.case)
        object.__setattr__(self, "attributes", MappingProxyType(dict(self.attributes)))


def _check_header(
    path: Path, fieldnames: Sequence[str], attributes: Mapping[str, Sequence[str]]
) -> None:
    unknown = [c for c in fieldnames if c not in CASE_COLUMNS and c not in attributes]
    if unknown:
        raise ConfigError(
            f"case sheet {path}: unknown column(s) {unknown}; expected some of "
            f"{list(CASE_COLUMNS)} or a column declared in case_attributes "
            f"(declared: {sorted(attributes)})",
            hint="check the header row is tab-separated and spelled as documented, or "
            "declare the extra column under case_attributes in the config",
        )
    missing = [name for name in attributes if name not in fieldnames]
    if missing:
        raise ConfigError(
            f"case sheet {path}: the config declares the attribute column(s) {missing} under "
            f"case_attributes, but the header has only {list(fieldnames)}",
            hint="add the column to the case sheet (cells may be empty) or remove it from "
            "case_attributes",
        )


def _check_groups(path: Path, rows: Sequence[CaseRow], linenos: Mapping[str, int]) -> None:
    """Cases of one group must not be pinned to different splits."""
    pins: dict[str, CaseRow] = {}
    for row in rows:
        if not row.split:
            continue
        other = pins.setdefault(row.group, row)
        if other.split != row.split:
            raise ConfigError(
                f"case sheet {path}: rows {linenos[other.case]} (case {other.case!r}, split "
                f"{other.split!r}) and {linenos[row.case]} (case {row.case!r}, split "
                f"{row.split!r}) are both in group {row.group!r}; a group goes to one split",
                hint="pin the cases of one group to the same split, or pin only one of them",
            )


def read_case_sheet(
    path: str | Path,
    *,
    attributes: Mapping[str, Sequence[str]] | None = None,
    schema_dir: Path | None = None,
) -> list[CaseRow]:
    """Read and validate the case sheet (tab-separated, one header row).

    Parameters
    ----------
    path
        The sheet.
    attributes
        Declared extra columns (the config's ``case_attributes``): name to allowed
        values, an empty sequence allowing any value. None or empty: no extra column.
    schema_dir
        Folder of the schemas; defaults to the package's own.

    Returns
    -------
    list of CaseRow
        In sheet order.

    Raises
    ------
    ConfigError
        Unknown or missing columns, invalid rows, unsafe or duplicate case ids, a value
        not allowed for its column, or two cases of one group pinned to different splits.
    """
    path = Path(path)
    attributes = {} if attributes is None else attributes
    schema = _schema("cases.schema.yaml", schema_dir)
    rows: list[CaseRow] = []
    seen: dict[str, int] = {}
    with open(path, encoding="utf-8", newline="") as fh:
        lines = [ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")]
    reader = csv.DictReader(lines, delimiter="\t")
    _check_header(path, reader.fieldnames or [], attributes)
    for lineno, rec in enumerate(reader, start=2):
        rec = {k: (v or "").strip() for k, v in rec.items() if k is not None}
        if None in rec or any(v is None for v in rec.values()):
            raise ConfigError(f"case sheet {path}: row {lineno} has the wrong number of fields")
        extra = {name: rec.pop(name) for name in attributes}
        validate(rec, schema, what=f"case sheet {path} row {lineno}")
        cid = rec["case"]
        if cid in seen:
            raise ConfigError(
                f"case sheet {path}: case id {cid!r} appears on rows {seen[cid]} and {lineno}",
                hint="case ids must be unique",
            )
        seen[cid] = lineno
        for name, value in extra.items():
            allowed = list(attributes[name])
            if allowed and value not in allowed:
                raise ConfigError(
                    f"case sheet {path} row {lineno}: column {name!r} of case {cid!r} is "
                    f"{value!r}; expected one of {allowed}",
                    hint="fix the cell or add the value to case_attributes in the config",
                )
        spinup = rec.get("spinup", "")
        rows.append(
            CaseRow(
                case=cid,
                group=rec.get("group", ""),
                attributes=extra,
                regime=rec.get("regime", ""),
                varmap=rec["varmap"],
                raw=rec["raw"],
                split=rec.get("split", ""),
                spinup_s=parse_quantity(spinup, "s", name=f"spinup of case {cid!r}")
                if spinup
                else None,
                demo=rec.get("demo", "") == "yes",
            )
        )
    if not rows:
        raise ConfigError(f"case sheet {path} lists no case")
    _check_groups(path, rows, seen)
    return rows

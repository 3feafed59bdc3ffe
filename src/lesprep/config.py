"""Configuration and case sheet: loading, schema validation and defaults.

The JSON schemas ship with the package (``lesprep/schemas``); the workflow, the command
line and the tests all validate through this module, which fills defaults the way
Snakemake's own validator does (a nested default fills only when its parent has
``default: {}``).
"""

from __future__ import annotations

import copy
import csv
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import jsonschema
import yaml

from lesprep.errors import ConfigError
from lesprep.units import parse_quantity

SCHEMA_DIR = Path(__file__).resolve().parent / "schemas"
"""Folder of the JSON schemas (installed with the package)."""

CASE_COLUMNS = ("case", "regime", "varmap", "raw", "split", "spinup", "demo")


def _schema(name: str, schema_dir: Path | None = None) -> dict[str, Any]:
    path = (schema_dir or SCHEMA_DIR) / name
    with open(path, encoding="utf-8") as fh:
        return yaml.safe_load(fh)


def _fill_defaults(instance: Any, schema: Mapping[str, Any]) -> None:
    """Fill ``default`` values in place, recursing where the parent exists."""
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
    """One row of the case sheet."""

    case: str
    regime: str
    varmap: str
    raw: str
    split: str = ""
    spinup_s: float | None = None
    demo: bool = False


def read_case_sheet(path: str | Path, *, schema_dir: Path | None = None) -> list[CaseRow]:
    """Read and validate the case sheet (tab-separated, one header row).

    Raises
    ------
    ConfigError
        Unknown columns, invalid rows, unsafe or duplicate case ids.
    """
    path = Path(path)
    schema = _schema("cases.schema.yaml", schema_dir)
    rows: list[CaseRow] = []
    seen: dict[str, int] = {}
    with open(path, encoding="utf-8", newline="") as fh:
        lines = [ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")]
    reader = csv.DictReader(lines, delimiter="\t")
    unknown = [c for c in (reader.fieldnames or []) if c not in CASE_COLUMNS]
    if unknown:
        raise ConfigError(
            f"case sheet {path}: unknown column(s) {unknown}; "
            f"expected some of {list(CASE_COLUMNS)}",
            hint="check the header row is tab-separated and spelled as documented",
        )
    for lineno, rec in enumerate(reader, start=2):
        rec = {k: (v or "").strip() for k, v in rec.items() if k is not None}
        if None in rec or any(v is None for v in rec.values()):
            raise ConfigError(f"case sheet {path}: row {lineno} has the wrong number of fields")
        validate(rec, schema, what=f"case sheet {path} row {lineno}")
        cid = rec["case"]
        if cid in seen:
            raise ConfigError(
                f"case sheet {path}: case id {cid!r} appears on rows {seen[cid]} and {lineno}",
                hint="case ids must be unique",
            )
        seen[cid] = lineno
        spinup = rec.get("spinup", "")
        rows.append(
            CaseRow(
                case=cid,
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
    return rows

"""Settings are parsed once, from the schema's defaults only, and travel to jobs as
plain records that rebuild without parsing again."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest
import yaml

import lesprep.canonical.settings
import lesprep.scales.spec
import lesprep.sets.settings
import lesprep.units
from conftest import REPO
from lesprep.canonical.settings import IngestSettings
from lesprep.jobs.settings import WorkflowSettings
from lesprep.report.settings import RegimeSettings
from lesprep.scales.settings import CoarsenSettings
from lesprep.sets.settings import SetSettings

PACKAGE = REPO / "src" / "lesprep"
CONFIG_NAMES = {
    "cfg",
    "config",
    "settings",
    "params",
    "ingest",
    "coarsen",
    "sets",
    "patches",
    "store",
    "store_cfg",
    "resources",
    "demo",
    "splits",
    "p",
    "c",
    "s",
    "pt",
}


def _config_fallbacks(path: Path) -> list[str]:
    """``<name>.get(key, default)`` calls on a config-like name, and ``.get`` chains on
    ``...["section"]`` lookups: fallback defaults the schema should own."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if not (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)):
            continue
        if node.func.attr != "get":
            continue
        recv = node.func.value
        name = recv.id if isinstance(recv, ast.Name) else None
        section = (
            isinstance(recv, ast.Subscript)
            and isinstance(recv.value, ast.Name)
            and (recv.value.id in {"cfg", "config"})
        )
        if (name in {"cfg", "config", "store_cfg", "pt"} or section) or (
            name in CONFIG_NAMES and path.name.endswith("settings.py")
        ):
            found.append(f"{path.relative_to(REPO)}:{node.lineno}")
    return found


def test_no_configuration_fallback_defaults_in_the_package():
    hits = [h for f in sorted(PACKAGE.rglob("*.py")) for h in _config_fallbacks(f)]
    assert hits == [], f"config values read with a fallback default (the schema owns them): {hits}"


def test_the_scanner_finds_a_fallback(tmp_path):
    bad = REPO / "src" / "lesprep" / "_probe_settings.py"
    try:
        bad.write_text("def f(cfg):\n    return cfg.get('threads', 2)\n")
        assert _config_fallbacks(bad)
    finally:
        bad.unlink()


def test_settings_round_trip_through_job_params():
    ws = WorkflowSettings.load(REPO / "config/config.yaml")
    ing = ws.ingest
    assert IngestSettings.from_dict(ing.to_dict()) == ing
    for group in ws.coarsen.groups:
        c = ws.coarsen.for_group(group)
        assert CoarsenSettings.from_dict(c.to_dict()) == c
    assert SetSettings.from_dict(ws.sets.to_dict()) == ws.sets
    assert RegimeSettings.from_dict(ws.regimes.to_dict()) == ws.regimes
    # the records are plain data (Snakemake params, JSON provenance)
    yaml.safe_dump([ing.to_dict(), ws.sets.to_dict(), ws.coarsen.for_group("all").to_dict()])


def test_jobs_never_parse_again(monkeypatch):
    """Threshold, scales and fractions are parsed when the settings are built; rebuilding a
    job's settings from its params parses nothing (the parsers are made to fail)."""
    ws = WorkflowSettings.load(REPO / "config/config.yaml")
    records = (ws.ingest.to_dict(), ws.coarsen.for_group("all").to_dict(), ws.sets.to_dict())

    def refuse(*a, **k):
        raise AssertionError("a job parsed a configured quantity again")

    for mod in (
        lesprep.units,
        lesprep.canonical.settings,
        lesprep.scales.spec,
        lesprep.sets.settings,
    ):
        monkeypatch.setattr(mod, "parse_quantity", refuse)
    monkeypatch.setattr(lesprep.scales.spec, "parse_scale", refuse)
    IngestSettings.from_dict(records[0])
    CoarsenSettings.from_dict(records[1])
    SetSettings.from_dict(records[2])
    assert ws.ingest.threshold == pytest.approx(1e-5)
    assert [s.label for s in ws.coarsen.scales] == ["200m", "500m", "1000m", "3000m"]


def test_defaults_come_from_the_schema():
    schema = yaml.safe_load((PACKAGE / "schemas/config.schema.yaml").read_text())
    ing = schema["properties"]["ingest"]["properties"]
    ws = WorkflowSettings.from_config({"cases": "x.tsv", "coarsen": {"scales": ["1 km"]}})
    assert ws.ingest.chunk_mib == ing["chunk_mib"]["default"]
    assert ws.ingest.dtype == ing["dtype"]["default"]
    assert (
        ws.resources.threads
        == schema["properties"]["resources"]["properties"]["threads"]["default"]
    )
    assert ws.coarsen.groups == {"all": ("1000m",)}

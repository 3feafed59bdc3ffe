"""The package's shape: imports only point down the data flow, no cycles, each stage's
code version covers exactly the code it runs, no module over 800 lines."""

from __future__ import annotations

import shutil

import pytest

from conftest import REPO
from lesprep import codeversion
from lesprep.jobs.steps import STAGE_MODULES

PACKAGE = REPO / "src" / "lesprep"

LAYERS = {
    "base": 0,  # shared pieces: units, thermo, catalogue, stores, provenance, layout, ...
    "raw": 1,
    "demo": 1,
    "canonical": 2,
    "scales": 3,
    "sets": 4,
    "segments": 4,  # time segments: plans ingest, joins canonical and scale stores
    "report": 5,
    "verify": 5,
    "jobs": 6,
    "cli": 7,
}


def _modules() -> list[str]:
    out = []
    for f in sorted(PACKAGE.rglob("*.py")):
        parts = f.relative_to(PACKAGE.parent).with_suffix("").parts
        out.append(".".join(parts[:-1] if parts[-1] == "__init__" else parts))
    return out


def _layer(module: str) -> tuple[int, str]:
    parts = module.split(".")
    top = parts[1] if len(parts) > 1 else "base"
    if top in LAYERS:
        return LAYERS[top], top
    return 0, "base"


def test_imports_point_down_the_layers():
    up = []
    for m in _modules():
        lm, gm = _layer(m)
        for target in codeversion.imported_modules(m):
            lt, gt = _layer(target)
            if target == "lesprep" or gt == gm:
                continue
            if lt > lm or (lt == lm and gt != gm):
                up.append(f"{m} -> {target}")
    assert up == []


def test_no_import_cycle():
    graph = {m: codeversion.imported_modules(m) - {m, "lesprep"} for m in _modules()}
    # packages are entered when a submodule is imported: drop parent-package edges
    graph = {m: {t for t in ts if not m.startswith(t + ".")} for m, ts in graph.items()}
    state: dict[str, int] = {}
    cycle: list[str] = []

    def visit(m: str, path: list[str]) -> None:
        state[m] = 1
        for t in sorted(graph.get(m, ())):
            if state.get(t) == 1:
                cycle.extend([*path, m, t])
                return
            if t not in state:
                visit(t, [*path, m])
        state[m] = 2

    for m in graph:
        if m not in state:
            visit(m, [])
    assert cycle == []


def test_no_module_over_800_lines():
    long = {
        str(f.relative_to(REPO)): n
        for f in PACKAGE.rglob("*.py")
        if (n := len(f.read_text().splitlines())) > 800
    }
    assert long == {}


@pytest.fixture
def package_copy(tmp_path):
    dst = tmp_path / "lesprep"
    shutil.copytree(PACKAGE, dst, ignore=shutil.ignore_patterns("__pycache__"))
    return dst


def _versions(root):
    return {s: codeversion.code_version(m, root) for s, m in STAGE_MODULES.items()}


@pytest.mark.parametrize(
    "edited, changes",
    [
        ("scales/patches.py", {"coarsen"}),
        ("report/scenes.py", {"scenes"}),
        ("report/stores.py", {"report", "scenes"}),
        ("report/regimes.py", {"regimes"}),
        ("report/figures.py", {"report"}),
        ("canonical/derived.py", {"ingest", "coarsen"}),  # coarsening derives rh of means
        # the report imports schemes (Sundqvist baseline), whose Gaussian scheme uses thermo
        ("thermo.py", {"ingest", "coarsen", "demo", "report"}),
        ("sets/assemble.py", {"assemble"}),
    ],
)
def test_code_version_follows_the_code_a_stage_runs(package_copy, edited, changes):
    before = _versions(package_copy)
    f = package_copy / edited
    f.write_text(f.read_text() + "\n# an edit\n")
    after = _versions(package_copy)
    changed = {s for s in before if before[s] != after[s]}
    assert changed == changes
    assert "ingest" not in changed or edited.startswith(("canonical", "thermo"))


def test_code_version_of_the_dispatcher_changes_every_stage(package_copy):
    before = _versions(package_copy)
    f = package_copy / "jobs" / "steps.py"
    f.write_text(f.read_text() + "\n# an edit\n")
    after = _versions(package_copy)
    assert all(before[s] != after[s] for s in before)

"""A small lesprep project for the docstring examples of ``src/lesprep``.

Docstring examples are written as a user would type them in a project folder: they name
``results/...`` (the results tree of a run) or ``resources/demo/...`` (raw demo
archives). Such an example runs in a fresh scratch folder
holding links to one small project, built once per test session on first use with the
package's own functions: two synthetic demo cases at 16 x 16 x 16 points and 5 output
times, ingested, coarsened to 400 m, split (one case each to train and test), assembled
into set stores with their normalization, and described by a scene table. Whatever an
example writes (figures, tables) lands in its scratch folder.

Each case also has a store on the four layers of layer set ``l4`` at 400 m
(``scale-400m_layers-l4.zarr``), as a workflow run with that layer set writes it.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from _pytest.doctest import DoctestItem

REPO = Path(__file__).resolve().parent
DOCTEST_CASES = {"sc-ostra-01": "test", "cu-marro-01": "train"}
"""Demo cases of the doctest project and the split each is pinned to."""
DOCTEST_SIZE = {"nx": 16, "ny": 16, "nz": 16, "ntimes": 5}
DOCTEST_CONFIG = {
    "cases": "config/cases.tsv",
    "ingest": {"spinup": "1 h", "cloud_threshold": "1e-5 kg/kg"},
    "coarsen": {
        "scales": ["400 m"],
        "layers": [{"name": "l4", "interfaces": ["0 m", "500 m", "1000 m", "1500 m", "2500 m"]}],
    },
    "splits": {"seed": 3, "fractions": {"train": 0.5, "validation": 0.0, "test": 0.5}},
    "sets": {"shuffle": True, "shuffle_seed": 1, "chunk_mib": 1},
}
"""Workflow config of the doctest project (validated and default-filled by the schema)."""
_NAMES_PROJECT = re.compile(r"""["'](?:results|resources)[/"'_.]""")


def build_doctest_project(root: Path) -> Path:
    """Write the doctest project (see the module docstring) into ``root``.

    Parameters
    ----------
    root
        An empty folder.

    Returns
    -------
    pathlib.Path
        ``root``, holding ``resources/demo/<case>/`` and ``results/``.
    """
    from lesprep.canonical.ingest import ingest_case
    from lesprep.demo import demo_case, write_demo_case
    from lesprep.jobs.settings import WorkflowSettings
    from lesprep.report.scene_tables import write_scenes_tsv
    from lesprep.scales.coarsen import coarsen_case
    from lesprep.sets.assemble import build_set, write_normalization
    from lesprep.sets.splits import CaseInfo, assign_splits, write_assignment_tsv

    settings = WorkflowSettings.from_config({**DOCTEST_CONFIG, "results": str(root / "results")})
    tree, coarsen = settings.results, settings.coarsen.base
    specs = {case: demo_case(case).with_size(**DOCTEST_SIZE) for case in DOCTEST_CASES}
    regimes = {case: spec.regime for case, spec in specs.items()}
    scale_stores: dict[str, dict[str, Path]] = {}
    for case, spec in specs.items():
        write_demo_case(spec, root / "resources/demo")
        canonical = ingest_case(
            case=case,
            raw=str(root / "resources/demo" / case / "*.nc"),
            varmap=REPO / f"config/varmaps/flavour-{spec.flavour}.yaml",
            settings=settings.ingest,
            out=tree.canonical(case),
            regime=spec.regime,
        )
        outputs = {label: tree.scale_store(case, label) for label in coarsen.store_labels}
        scale_stores[case] = coarsen_case(canonical, outputs, coarsen)
    assignment, _ = assign_splits(
        [CaseInfo(case=c, regime=regimes[c], pinned=s) for c, s in DOCTEST_CASES.items()],
        settings.split_rule,
    )
    write_assignment_tsv(assignment, tree.splits_tsv())
    for split in ("train", "test"):
        label = coarsen.store_labels[0]
        members = {c: scale_stores[c][label] for c, s in DOCTEST_CASES.items() if s == split}
        stats: dict[str, dict[str, float]] = {}
        store = build_set(
            members,
            regimes,
            tree.set_store(split, label),
            settings.sets,
            split=split,
            scale=label,
            statistics=stats if split == "train" else None,
        )
        if split == "train":
            write_normalization(store, tree.normalization(label), scale=label, stats=stats)
    write_scenes_tsv({c: tree.canonical(c) for c in DOCTEST_CASES}, tree.scenes_tsv())
    return root


@pytest.fixture(scope="session")
def doctest_project(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The doctest project, built once per session (read-only for the examples)."""
    return build_doctest_project(tmp_path_factory.mktemp("doctest-project"))


def _names_project(item: DoctestItem) -> bool:
    """Whether an example quotes a path of the doctest project.

    A string literal starting with ``results`` or ``resources`` followed
    by ``/``, ``_``, ``.`` or the closing quote counts (``"results"`` itself does).
    """
    return item.dtest is not None and any(
        _NAMES_PROJECT.search(example.source) for example in item.dtest.examples
    )


@pytest.fixture(autouse=True)
def _doctest_project_folder(request: pytest.FixtureRequest) -> Iterator[None]:
    """Run a docstring example that names the project in a scratch folder linking to it."""
    item = request.node
    if not isinstance(item, DoctestItem) or not _names_project(item):
        yield
        return
    project: Path = request.getfixturevalue("doctest_project")
    scratch: Path = request.getfixturevalue("tmp_path")
    for entry in project.iterdir():
        (scratch / entry.name).symlink_to(entry, target_is_directory=entry.is_dir())
    with pytest.MonkeyPatch.context() as mp:
        mp.chdir(scratch)
        yield

"""The results tree: one owner for every path under ``results/`` and the labels in them.

Every stage, the workflow rules, the report and ``lesprep verify`` ask this module
where a result lives and read labels back from a path through it, so the layout is
written down once::

    <root>/cases/<case>/canonical.zarr           fine fields of one case
    <root>/cases/<case>/scale-<label>.zarr       one case at one scale
    <root>/cases/<case>/scenes.tsv               scene descriptors of one case
    <root>/cases/<case>/segments/<seg>/*.zarr    one time segment's stores (joined into the
                                                 case's stores by hard links)
    <root>/.plan/<case>.json                     cached archive index of a segmented case
    <root>/splits.tsv                            which case went to which split
    <root>/sets/<split>/scale-<label>.zarr       training store of a split and scale
    <root>/sets/normalization-<label>.json       train-only statistics of a scale
    <root>/scenes.tsv, baseline.tsv              report tables
    <root>/regimes.tsv, regimes.json             scene regime labels and their fit
    <root>/report/splits.tsv                     the split table as the report shows it
    <root>/figures/cases/<case>/<kind>.png       per-case figures
    <root>/figures/cases/<case>/layers-<name>_scale-<label>.png
                                                 a case on LES levels and layer set <name>
    <root>/figures/scales/<label>/<kind>.png     per-scale figures
    <root>/figures/regimes/<kind>.png            regime figures

Examples
--------
>>> tree = ResultsLayout("results")
>>> tree.scale_store("sc-01", "500m").as_posix()
'results/cases/sc-01/scale-500m.zarr'
>>> scale_label(tree.set_store("train", "1000m"))
'1000m'
>>> tree.layer_figure("sc-01", "500m", "l30").as_posix()
'results/figures/cases/sc-01/layers-l30_scale-500m.png'
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

SPLITS = ("train", "validation", "test")
"""Split names, in the order they are listed (and of the hash intervals of
:mod:`lesprep.sets.splits`)."""

CASE_FIGURES = ("timeseries", "profiles", "lwp_map")
"""Figures drawn for every case."""

SCALE_FIGURES = ("target_distribution", "cf_vs_rh")
"""Figures drawn for every scale (train and test splits)."""

REGIME_FIGURES = ("silhouette", "descriptors", "timeline")
"""Figures of the scene regimes (one each)."""

_SCALE_PREFIX, _STORE_SUFFIX = "scale-", ".zarr"


def scale_store_name(label: str) -> str:
    """File name of a store at one scale (``scale-<label>.zarr``)."""
    return f"{_SCALE_PREFIX}{label}{_STORE_SUFFIX}"


def scale_label(path: str | Path) -> str | None:
    """The scale label of a scale or set store path (None for any other path)."""
    name = Path(path).name
    if name.startswith(_SCALE_PREFIX) and name.endswith(_STORE_SUFFIX):
        return name[len(_SCALE_PREFIX) : -len(_STORE_SUFFIX)]
    return None


def normalization_label(path: str | Path) -> str | None:
    """The scale label of a normalization file path (None for any other path)."""
    name = Path(path).name
    if name.startswith("normalization-") and name.endswith(".json"):
        return name[len("normalization-") : -len(".json")]
    return None


@dataclass(frozen=True)
class ResultsLayout:
    """Paths of one results tree rooted at ``root``."""

    root: Path

    def __init__(self, root: str | Path) -> None:
        object.__setattr__(self, "root", Path(root))

    def case_dir(self, case: str) -> Path:
        """Folder of one case's stores."""
        return self.root / "cases" / case

    def canonical(self, case: str) -> Path:
        """Canonical (fine-grid) store of a case."""
        return self.case_dir(case) / "canonical.zarr"

    def scale_store(self, case: str, label: str) -> Path:
        """Store of one case at one scale."""
        return self.case_dir(case) / scale_store_name(label)

    def segment_store(self, case: str, segment: str, label: str | None = None) -> Path:
        """A time segment's canonical store (``label`` None) or scale store."""
        name = "canonical.zarr" if label is None else scale_store_name(label)
        return self.case_dir(case) / "segments" / segment / name

    def plan_cache(self, case: str) -> Path:
        """Cached archive index of a segmented case (:mod:`lesprep.segments.plan`)."""
        return self.root / ".plan" / f"{case}.json"

    def case_scenes(self, case: str) -> Path:
        """Scene descriptors of one case (gathered into :meth:`scenes_tsv`)."""
        return self.case_dir(case) / "scenes.tsv"

    def splits_tsv(self) -> Path:
        """The split assignment table."""
        return self.root / "splits.tsv"

    def sets_dir(self) -> Path:
        """Folder of the training stores."""
        return self.root / "sets"

    def set_store(self, split: str, label: str) -> Path:
        """Training store of a split at one scale."""
        return self.sets_dir() / split / scale_store_name(label)

    def normalization(self, label: str) -> Path:
        """Train-only normalization statistics of one scale."""
        return self.sets_dir() / f"normalization-{label}.json"

    def scenes_tsv(self) -> Path:
        """Scene descriptors per case and time."""
        return self.root / "scenes.tsv"

    def baseline_tsv(self) -> Path:
        """Baseline skill per split and scale."""
        return self.root / "baseline.tsv"

    def regimes_tsv(self) -> Path:
        """Scene regime label per case and time (descriptive; not in the set stores)."""
        return self.root / "regimes.tsv"

    def regimes_json(self) -> Path:
        """The regime fit: descriptors used and dropped, silhouette by k, centroids."""
        return self.root / "regimes.json"

    def regime_figure(self, kind: str) -> Path:
        """One regime figure (``kind`` from :data:`REGIME_FIGURES`)."""
        return self.root / "figures" / "regimes" / f"{kind}.png"

    def report_splits_tsv(self) -> Path:
        """The split table as the report shows it."""
        return self.root / "report" / "splits.tsv"

    def case_figure(self, case: str, kind: str) -> Path:
        """One per-case figure (``kind`` from :data:`CASE_FIGURES`)."""
        return self.root / "figures" / "cases" / case / f"{kind}.png"

    def layer_figure(self, case: str, label: str, layers: str) -> Path:
        """Profiles of a case at scale ``label`` on the LES levels and on layer set ``layers``.

        One figure per scale and layer set, so the name carries both (a scale may be
        averaged into several layer sets).
        """
        return self.root / "figures" / "cases" / case / f"layers-{layers}_scale-{label}.png"

    def scale_figure(self, label: str, kind: str) -> Path:
        """One per-scale figure (``kind`` from :data:`SCALE_FIGURES`)."""
        return self.root / "figures" / "scales" / label / f"{kind}.png"

"""Scene regimes learned from the scene descriptors, without hand tags.

Every scene (one case at one kept output time, a row of ``results/scenes.tsv``) is
placed in the space of the configured descriptors; k-means groups the train split's
scenes and the other splits' scenes are given the nearest group. The labels are
descriptive: they go to their own table (``results/regimes.tsv``), never into the set
stores, so a reader joins them on ``(case, time_s)`` when it wants them.

Conventions
-----------
* Rows are sorted by ``(case, time_s)`` before anything else, so every result is
  independent of the order of the input rows; a repeated ``(case, time_s)`` is refused.
* Descriptors (:data:`lesprep.report.settings.DESCRIPTORS`): the scene table's
  ``lwp_mean``, ``lwp_std``, ``lwp_skew`` and ``cloud_cover``; ``peak_wavelength_rel =
  peak_wavelength_m / domain_m`` (1 when the spectral peak is at the domain size); and
  ``peak_at_domain`` as 1.0 or 0.0. All arithmetic is float64.
* Clear scenes: a scene with ``cloud_cover == 0``, or with a configured descriptor that
  is not finite (the spectral peak of a uniform LWP field is undefined), gets
  :data:`CLEAR_LABEL` (-1). Clear scenes enter neither the standardization nor the fit.
* Standardization: ``z = (x - mean) / std`` with the mean and the population standard
  deviation (``ddof=0``) of the train split's cloudy scenes only. A descriptor whose
  train values are all equal (max == min) cannot be standardized: it is dropped, and the
  fit records its name and value.
* k-means (Lloyd's algorithm with k-means++ seeding, :class:`sklearn.cluster.KMeans`)
  with ``n_init`` restarts and ``random_state = seed``, run on one thread so the sums do
  not depend on the machine, for every k of the configured range that the data allow
  (k at most the number of distinct train points and at most ``n - 1``). Each k is scored
  by the mean silhouette width of Rousseeuw (1987), Euclidean in standardized units
  (:func:`sklearn.metrics.silhouette_score`). The largest mean silhouette wins; ties go
  to the smaller k.
* Labels ``0 .. k-1`` are numbered by their centroids in standardized units, sorted
  lexicographically over the kept descriptors in configured order (label 0 has the
  smallest centroid value of the first kept descriptor), never by k-means's internal
  numbering.
* Train scenes keep the label of their cluster in the winning fit. Scenes of the other
  splits are standardized with the train statistics and get the label of the nearest
  centroid (Euclidean; ties to the smaller label): no validation or test scene enters
  the statistics or the fit.
* When no k of the range is possible (too few distinct cloudy train scenes, or every
  descriptor dropped), every cloudy scene gets label 0, ``k = 1`` is recorded without a
  silhouette and a warning is logged. No cloudy train scene at all is an error.
"""

from __future__ import annotations

import json
import logging
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from lesprep.errors import InputError
from lesprep.report.settings import RegimeSettings
from lesprep.sets.splits import read_assignment_tsv

__all__ = [
    "CLEAR_LABEL",
    "KFit",
    "RegimeFit",
    "Standardization",
    "choose_k",
    "clear_scenes",
    "descriptor_frame",
    "fit_k_range",
    "label_scenes",
    "nearest_centroid",
    "read_regime_fit",
    "standardize",
    "write_regimes",
]

log = logging.getLogger(__name__)

CLEAR_LABEL = -1
"""Label of a clear scene (no cloud, or an undefined descriptor); never a k-means label."""

_BASE_COLUMNS = ("lwp_mean", "lwp_std", "lwp_skew", "cloud_cover")


# ------------------------------------------------------------------ descriptor table


def _bool_column(values: pd.Series) -> NDArray[np.float64]:
    if values.dtype == np.bool_:
        return values.to_numpy(dtype=np.float64)
    text = values.astype(str).str.strip().str.lower()
    return np.where(text == "true", 1.0, np.where(text == "false", 0.0, np.nan))


def descriptor_frame(
    scenes: pd.DataFrame, descriptors: Sequence[str], *, source: str = "scene table"
) -> pd.DataFrame:
    """The configured descriptors of every scene, sorted by ``(case, time_s)``.

    Parameters
    ----------
    scenes
        Scene table: ``case``, ``time_s``, the columns of
        :class:`lesprep.report.scenes.SceneDescriptors` and ``domain_m``, rows in any order.
    descriptors
        Names from :data:`lesprep.report.settings.DESCRIPTORS`.
    source
        Where the table came from, for error messages (e.g. its path).

    Returns
    -------
    pandas.DataFrame
        ``case``, ``time_s``, ``cloud_cover`` and the descriptors (float64), one row per
        scene, sorted by ``(case, time_s)`` with a fresh index.

    Raises
    ------
    InputError
        A needed column is missing or a ``(case, time_s)`` appears twice.

    Examples
    --------
    >>> t = pd.DataFrame({"case": ["b", "a"], "time_s": [0.0, 0.0], "cloud_cover": [0.5, 0.2],
    ...                   "peak_wavelength_m": [800.0, 400.0], "domain_m": [1600.0, 1600.0]})
    >>> descriptor_frame(t, ["peak_wavelength_rel"])["peak_wavelength_rel"].tolist()
    [0.25, 0.5]
    """
    needed = {"case", "time_s", "cloud_cover"}
    for name in descriptors:
        if name == "peak_wavelength_rel":
            needed |= {"peak_wavelength_m", "domain_m"}
        else:
            needed.add(name)
    missing = sorted(needed - set(scenes.columns))
    if missing:
        raise InputError(
            f"{source} has no column(s) {missing}; found {list(scenes.columns)}",
            file=source,
            hint="re-run the tables rule so scenes.tsv is written by this lesprep version",
        )
    key = scenes[["case", "time_s"]].astype({"case": str, "time_s": np.float64})
    repeated = key[key.duplicated(keep=False)]
    if len(repeated):
        first = repeated.iloc[0]
        raise InputError(
            f"{source} has {len(repeated)} rows for repeated (case, time_s), e.g. "
            f"({first['case']}, {first['time_s']:g}); expected one row per case and time",
            file=source,
            case=str(first["case"]),
        )
    out = key.copy()
    out["cloud_cover"] = scenes["cloud_cover"].to_numpy(dtype=np.float64)
    for name in descriptors:
        if name == "peak_wavelength_rel":
            wavelength = scenes["peak_wavelength_m"].to_numpy(dtype=np.float64)
            out[name] = wavelength / scenes["domain_m"].to_numpy(dtype=np.float64)
        elif name == "peak_at_domain":
            out[name] = _bool_column(scenes[name])
        elif name in _BASE_COLUMNS:
            out[name] = scenes[name].to_numpy(dtype=np.float64)
    return out.sort_values(["case", "time_s"], kind="stable").reset_index(drop=True)


def clear_scenes(frame: pd.DataFrame, descriptors: Sequence[str]) -> NDArray[np.bool_]:
    """Which scenes are clear: no cloud cover, or a descriptor that is not finite.

    Examples
    --------
    >>> f = pd.DataFrame({"cloud_cover": [0.0, 0.3, 0.4], "lwp_skew": [0.0, 1.0, np.nan]})
    >>> clear_scenes(f, ["lwp_skew"]).tolist()
    [True, False, True]
    """
    values = frame[list(descriptors)].to_numpy(dtype=np.float64)
    cover = frame["cloud_cover"].to_numpy(dtype=np.float64)
    return np.asarray((cover == 0.0) | ~np.all(np.isfinite(values), axis=1), dtype=np.bool_)


# ------------------------------------------------------------------ standardization


@dataclass(frozen=True)
class Standardization:
    """Train statistics of the kept descriptors and the dropped (constant) ones.

    Attributes
    ----------
    names
        Kept descriptors, in configured order.
    mean, std
        Their train mean and population standard deviation (float64).
    dropped
        Descriptor -> its single train value, for descriptors constant over train.
    """

    names: tuple[str, ...]
    mean: NDArray[np.float64]
    std: NDArray[np.float64]
    dropped: dict[str, float] = field(default_factory=dict)

    def apply(self, frame: pd.DataFrame) -> NDArray[np.float64]:
        """Standardized values ``(n, len(names))`` of the rows of ``frame``."""
        values = frame[list(self.names)].to_numpy(dtype=np.float64)
        values = values.reshape(len(frame), len(self.names))
        return (values - self.mean) / self.std

    def to_dict(self) -> dict[str, Any]:
        """Plain form (JSON)."""
        return {
            "used": list(self.names),
            "mean": dict(zip(self.names, map(float, self.mean), strict=True)),
            "std": dict(zip(self.names, map(float, self.std), strict=True)),
            "dropped": {k: float(v) for k, v in self.dropped.items()},
        }


def standardize(train: pd.DataFrame, descriptors: Sequence[str]) -> Standardization:
    """Statistics of the train scenes; descriptors constant over them are dropped.

    Parameters
    ----------
    train
        The train split's cloudy scenes (finite descriptors).
    descriptors
        Descriptor columns, in configured order.

    Returns
    -------
    Standardization
        Mean and population standard deviation (``ddof=0``) of each kept descriptor.

    Examples
    --------
    >>> t = pd.DataFrame({"a": [1.0, 3.0], "b": [2.0, 2.0]})
    >>> s = standardize(t, ["a", "b"])
    >>> s.names, s.dropped, s.apply(t).ravel().tolist()
    (('a',), {'b': 2.0}, [-1.0, 1.0])
    """
    values = train[list(descriptors)].to_numpy(dtype=np.float64)
    values = values.reshape(len(train), len(descriptors))
    constant = np.max(values, axis=0) == np.min(values, axis=0)
    kept = tuple(n for n, c in zip(descriptors, constant, strict=True) if not c)
    dropped = {n: float(values[0, i]) for i, n in enumerate(descriptors) if constant[i]}
    keep = ~constant
    return Standardization(
        names=kept,
        mean=values[:, keep].mean(axis=0),
        std=values[:, keep].std(axis=0, ddof=0),
        dropped=dropped,
    )


# ------------------------------------------------------------------ k-means and silhouette


@dataclass(frozen=True)
class KFit:
    """One k-means fit: its labels (renumbered, see the module docstring), centroids in
    standardized units, inertia and mean silhouette."""

    k: int
    labels: NDArray[np.int64]
    centroids: NDArray[np.float64]
    inertia: float
    silhouette: float


def _renumber(
    labels: NDArray[np.int64], centroids: NDArray[np.float64]
) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Number clusters by their centroids, lexicographically over the columns."""
    order = np.lexsort(centroids.T[::-1]) if centroids.shape[1] else np.arange(len(centroids))
    new = np.empty_like(order)
    new[order] = np.arange(len(order))
    return new[labels].astype(np.int64), centroids[order]


def _feasible(x: NDArray[np.float64], k_values: Sequence[int]) -> list[int]:
    distinct = len(np.unique(x, axis=0)) if x.shape[1] else 1
    return [k for k in k_values if 2 <= k <= min(distinct, len(x) - 1)]


def fit_k_range(
    x: NDArray[np.float64], k_values: Sequence[int], *, seed: int, n_init: int
) -> tuple[list[KFit], list[int]]:
    """k-means and its mean silhouette for every feasible k.

    Parameters
    ----------
    x
        Standardized points ``(n, d)``, rows in a fixed order.
    k_values
        Cluster counts to try.
    seed, n_init
        ``random_state`` and restarts of :class:`sklearn.cluster.KMeans`.

    Returns
    -------
    fits
        One :class:`KFit` per feasible k, ascending.
    skipped
        The k the data do not allow (more than the distinct points or than ``n - 1``).

    Examples
    --------
    >>> x = np.array([[0.0], [0.1], [5.0], [5.1]])
    >>> fits, skipped = fit_k_range(x, [2, 3, 4], seed=0, n_init=4)
    >>> [f.k for f in fits], skipped, fits[0].labels.tolist()
    ([2, 3], [4], [0, 0, 1, 1])
    """
    from sklearn.cluster import KMeans
    from sklearn.metrics import silhouette_score
    from threadpoolctl import threadpool_limits

    feasible = _feasible(x, k_values)
    fits = []
    with threadpool_limits(limits=1):
        for k in feasible:
            model = KMeans(n_clusters=k, n_init=n_init, random_state=seed).fit(x)
            labels, centroids = _renumber(
                model.labels_.astype(np.int64), model.cluster_centers_.astype(np.float64)
            )
            score = float(silhouette_score(x, labels, metric="euclidean"))
            fits.append(KFit(k, labels, centroids, float(model.inertia_), score))
    return fits, [k for k in k_values if k not in feasible]


def choose_k(scores: Mapping[int, float]) -> int:
    """The k with the largest mean silhouette; the smaller k on ties.

    Examples
    --------
    >>> choose_k({2: 0.5, 3: 0.7, 4: 0.7})
    3
    """
    if not scores:
        raise ValueError("no silhouette scores to choose from")
    best = max(scores.values())
    return min(k for k, s in scores.items() if s == best)


def nearest_centroid(x: NDArray[np.float64], centroids: NDArray[np.float64]) -> NDArray[np.int64]:
    """Index of the nearest centroid (Euclidean) of each row; ties to the smaller index.

    Examples
    --------
    >>> nearest_centroid(np.array([[0.2], [0.5], [0.9]]), np.array([[0.0], [1.0]])).tolist()
    [0, 0, 1]
    """
    d2 = ((x[:, None, :] - centroids[None, :, :]) ** 2).sum(axis=2)
    return np.argmin(d2, axis=1).astype(np.int64)  # argmin keeps the first of equal values


# ------------------------------------------------------------------ the whole labelling


@dataclass(frozen=True)
class RegimeFit:
    """What the labelling learned from the train split.

    Attributes
    ----------
    k
        Chosen number of regimes (1 when no k of the range was possible).
    silhouette
        Mean silhouette per feasible k.
    skipped
        k of the range the data did not allow.
    standardization
        Train statistics, kept and dropped descriptors.
    centroids
        ``(k, len(standardization.names))`` centroids in standardized units, by label.
    n_fit
        Number of cloudy train scenes the fit used.
    settings
        The settings it was fitted with.
    """

    k: int
    silhouette: dict[int, float]
    skipped: tuple[int, ...]
    standardization: Standardization
    centroids: NDArray[np.float64]
    n_fit: int
    settings: RegimeSettings

    def to_dict(self) -> dict[str, Any]:
        """Plain form (``regimes.json``)."""
        st = self.standardization
        physical = self.centroids * st.std + st.mean if len(st.names) else self.centroids
        return {
            "settings": self.settings.to_dict(),
            "clear_label": CLEAR_LABEL,
            "k": self.k,
            "silhouette": {str(k): v for k, v in sorted(self.silhouette.items())},
            "skipped_k": list(self.skipped),
            "n_fit": self.n_fit,
            **st.to_dict(),
            "centroids_standardized": self.centroids.tolist(),
            "centroids": physical.tolist(),
        }


def _splits_of(cases: pd.Series, splits: Mapping[str, str], source: str) -> NDArray[np.str_]:
    unknown = sorted(set(cases) - set(splits))
    if unknown:
        raise InputError(
            f"the scene table has case(s) {unknown} that the split table does not list; "
            f"expected every case of the scene table in {source}",
            file=source,
            case=unknown[0],
            hint="re-run the workflow so scenes.tsv and splits.tsv come from the same case sheet",
        )
    return cases.map(dict(splits)).to_numpy(dtype=str)


def label_scenes(
    scenes: pd.DataFrame,
    splits: Mapping[str, str],
    settings: RegimeSettings,
    *,
    source: str = "scene table",
    splits_source: str = "split table",
) -> tuple[pd.DataFrame, RegimeFit]:
    """Regime label of every scene, fitted on the train split (module docstring).

    Parameters
    ----------
    scenes
        Scene table rows in any order (see :func:`descriptor_frame`).
    splits
        Case -> split (``train``, ``validation`` or ``test``).
    settings
        Descriptors, k range, seed and restarts.
    source, splits_source
        Names of the two tables for error messages.

    Returns
    -------
    labels
        ``case``, ``time_s``, ``split``, ``label`` (int, :data:`CLEAR_LABEL` for clear
        scenes) and ``clear`` (bool), sorted by ``(case, time_s)``.
    fit
        The :class:`RegimeFit`.

    Raises
    ------
    InputError
        Missing columns, repeated rows, a case without split, or no cloudy train scene.
    """
    names = list(settings.descriptors)
    frame = descriptor_frame(scenes, names, source=source)
    split = _splits_of(frame["case"], splits, splits_source)
    clear = clear_scenes(frame, names)
    train = (split == "train") & ~clear
    if not train.any():
        raise InputError(
            f"no cloudy scene of a train case in {source} ({int(clear.sum())} of "
            f"{len(frame)} scenes are clear); expected at least one to fit regimes on",
            file=source,
            hint="put a case with cloud in the train split",
        )
    st = standardize(frame[train], names)
    if st.dropped:
        log.warning(
            "regimes: descriptor(s) %s constant over the train split's cloudy scenes; dropped",
            ", ".join(f"{k} = {v:g}" for k, v in st.dropped.items()),
        )
    fits, skipped = fit_k_range(
        st.apply(frame[train]), settings.k_values, seed=settings.seed, n_init=settings.n_init
    )
    labels = np.full(len(frame), CLEAR_LABEL, dtype=np.int64)
    if fits:
        chosen = {f.k: f for f in fits}[choose_k({f.k: f.silhouette for f in fits})]
        centroids = chosen.centroids
        labels[train] = chosen.labels
        others = ~clear & ~train
        if others.any():
            labels[others] = nearest_centroid(st.apply(frame[others]), centroids)
    else:
        log.warning(
            "regimes: no k in [%d, %d] is possible with %d cloudy train scenes and %d "
            "varying descriptor(s); every cloudy scene gets label 0",
            settings.k_min,
            settings.k_max,
            int(train.sum()),
            len(st.names),
        )
        centroids = np.zeros((1, len(st.names)))
        labels[~clear] = 0
    table = frame[["case", "time_s"]].copy()
    table["split"] = split
    table["label"] = labels
    table["clear"] = clear
    fit = RegimeFit(
        k=len(centroids),
        silhouette={f.k: f.silhouette for f in fits},
        skipped=tuple(skipped),
        standardization=st,
        centroids=centroids,
        n_fit=int(train.sum()),
        settings=settings,
    )
    return table, fit


def _atomic_text(path: str | Path, text: str) -> Path:
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp-{os.getpid()}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, out)
    return out


def write_regimes(
    scenes_tsv: str | Path,
    splits_tsv: str | Path,
    settings: RegimeSettings,
    *,
    table_out: str | Path,
    fit_out: str | Path,
) -> RegimeFit:
    """Label every scene of ``scenes_tsv`` and write the label table and the fit.

    Parameters
    ----------
    scenes_tsv
        Scene descriptors per case and time (``results/scenes.tsv``).
    splits_tsv
        The split assignment (``results/splits.tsv``).
    settings
        Regime settings.
    table_out
        Label table (TSV, atomically): ``case``, ``time_s``, ``split``, ``label``, ``clear``.
    fit_out
        The fit as JSON (atomically): settings, descriptors used and dropped, train mean and
        std, silhouette by k, chosen k and centroids (standardized and physical).

    Returns
    -------
    RegimeFit
        The fit written to ``fit_out``.
    """
    scenes = pd.read_csv(scenes_tsv, sep="\t")
    splits = {a.case: a.split for a in read_assignment_tsv(splits_tsv)}
    table, fit = label_scenes(
        scenes, splits, settings, source=str(scenes_tsv), splits_source=str(splits_tsv)
    )
    text = table.to_csv(sep="\t", index=False, float_format="%.9g", lineterminator="\n")
    _atomic_text(table_out, text)
    _atomic_text(fit_out, json.dumps(fit.to_dict(), indent=2, allow_nan=False) + "\n")
    counts = table.groupby(["split", "label"]).size().to_dict()
    log.info(
        "regimes: k = %d from %d train scenes; scenes per (split, label): %s",
        fit.k,
        fit.n_fit,
        counts,
    )
    return fit


def read_regime_fit(path: str | Path) -> dict[str, Any]:
    """The fit written by :func:`write_regimes` (a plain dict)."""
    return json.loads(Path(path).read_text(encoding="utf-8"))

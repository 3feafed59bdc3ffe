"""Settings of the coarsening stage, parsed once from the validated config.

Scales are parsed here (:func:`lesprep.scales.spec.parse_scales`) and travel to the jobs
as :class:`~lesprep.scales.spec.ScaleSpec` records, never re-parsed from their text.
Defaults live in the config schema only.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Literal

from lesprep import catalogue
from lesprep.errors import ConfigError
from lesprep.scales.layers import LayerSetSpec, layer_store_label, parse_layer_sets
from lesprep.scales.spec import ScaleSpec, parse_scale, parse_scales
from lesprep.store import StoreSettings

OnMisfit = Literal["error", "skip"]
Dtype = Literal["float32", "float64"]


@dataclass(frozen=True, kw_only=True)
class CoarsenSettings:
    """Coarsening settings of one job (one scale group).

    Attributes
    ----------
    scales
        The group's scales.
    moments
        Variables that get block mean, variance and skewness: stored ones (catalogue
        names or names a variable map adds, 3-D or 2-D) and the per-slab conserved ones
        (``qt``, ``theta_l``, ``theta_il``, ``theta_v``).
    covariances
        Pairs of 3-D variables whose sub-grid covariance is stored (``cov_<a>_<b>``).
    patch_variables, patch_scales, patch_size, patch_halo
        Fine patches: which variables, at which scale labels, edge P, periodic halo.
    on_misfit
        What a scale that does not fit a case's domain does.
    rh_critical
        Critical relative humidity of the Sundqvist et al. (1989) baseline.
    dtype
        Stored floating-point type.
    chunk_mib
        Target chunk size of the scale stores (MiB).
    store
        Compressor settings.
    layers
        Target layer sets (:mod:`lesprep.scales.layers`); each scale a set applies to
        also gets a store on its layers.
    """

    scales: tuple[ScaleSpec, ...]
    moments: tuple[str, ...]
    covariances: tuple[tuple[str, str], ...]
    patch_variables: tuple[str, ...]
    patch_scales: tuple[str, ...]
    patch_size: int
    patch_halo: int
    on_misfit: OnMisfit
    rh_critical: float
    dtype: Dtype
    chunk_mib: float
    store: StoreSettings
    layers: tuple[LayerSetSpec, ...] = ()

    def __post_init__(self) -> None:
        catalogue.check_names(self.moments, what="coarsen.moments", use="moments")
        pairs = tuple((str(a), str(b)) for a, b in self.covariances)
        object.__setattr__(self, "covariances", pairs)
        for a, b in pairs:
            if a == b:
                raise ConfigError(
                    f"coarsen.covariances lists [{a}, {b}]: the covariance of a variable "
                    "with itself is its variance",
                    hint=f"list {a} under coarsen.moments instead",
                )
            catalogue.check_names([a, b], what="coarsen.covariances", use="moments")
        if len(set(pairs)) != len(pairs):
            raise ConfigError("coarsen.covariances lists a pair twice")
        catalogue.check_names(self.patch_variables, what="coarsen.patches.variables", use="patches")

    @property
    def labels(self) -> tuple[str, ...]:
        """Store labels of the scales, in order."""
        return tuple(s.label for s in self.scales)

    @property
    def store_labels(self) -> tuple[str, ...]:
        """Labels of every store a job writes: the scales', then each scale's layer
        stores (:func:`~lesprep.scales.layers.layer_store_label`)."""
        layered = [
            layer_store_label(s.label, g.name)
            for s in self.scales
            for g in self.layers
            if g.applies_to(s.label)
        ]
        return (*self.labels, *layered)

    def to_dict(self) -> dict[str, Any]:
        """Plain form (job params, provenance); :meth:`from_dict` inverts it."""
        return {
            "scales": [s.to_dict() for s in self.scales],
            "moments": list(self.moments),
            "covariances": [list(p) for p in self.covariances],
            "patch_variables": list(self.patch_variables),
            "patch_scales": list(self.patch_scales),
            "patch_size": self.patch_size,
            "patch_halo": self.patch_halo,
            "on_misfit": self.on_misfit,
            "rh_critical": self.rh_critical,
            "dtype": self.dtype,
            "chunk_mib": self.chunk_mib,
            "store": self.store.to_dict(),
            "layers": [g.to_dict() for g in self.layers],
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> CoarsenSettings:
        """Inverse of :meth:`to_dict`."""
        return cls(
            scales=tuple(ScaleSpec.from_dict(s) for s in d["scales"]),
            moments=tuple(d["moments"]),
            covariances=tuple((a, b) for a, b in d["covariances"]),
            patch_variables=tuple(d["patch_variables"]),
            patch_scales=tuple(d["patch_scales"]),
            patch_size=int(d["patch_size"]),
            patch_halo=int(d["patch_halo"]),
            on_misfit=d["on_misfit"],
            rh_critical=float(d["rh_critical"]),
            dtype=d["dtype"],
            chunk_mib=float(d["chunk_mib"]),
            store=StoreSettings.from_dict(d["store"]),
            layers=tuple(LayerSetSpec.from_dict(g) for g in d.get("layers", [])),
        )


@dataclass(frozen=True, kw_only=True)
class CoarsenPlan:
    """The whole ``coarsen`` section, parsed: every scale, its group, the job settings."""

    scales: tuple[ScaleSpec, ...]
    groups: Mapping[str, tuple[str, ...]]
    patch_scales: tuple[str, ...]
    base: CoarsenSettings

    @classmethod
    def from_config(
        cls, coarsen: Mapping[str, Any], *, dtype: Dtype, store: StoreSettings
    ) -> CoarsenPlan:
        """Parse the validated ``coarsen`` section once."""
        scales = tuple(parse_scales(coarsen["scales"]))
        layers = parse_layer_sets(coarsen["layers"], [s.label for s in scales], base=Path.cwd())
        patches = coarsen["patches"]
        patch_scales = tuple(parse_scale(v).label for v in patches["scales"])
        base = CoarsenSettings(
            scales=scales,
            moments=tuple(coarsen["moments"]),
            covariances=tuple((a, b) for a, b in coarsen["covariances"]),
            patch_variables=tuple(patches["variables"]),
            patch_scales=patch_scales,
            patch_size=int(patches["size"]),
            patch_halo=int(patches["halo"]),
            on_misfit=coarsen["on_misfit"],
            rh_critical=float(coarsen["baseline_rh_critical"]),
            dtype=dtype,
            chunk_mib=float(coarsen["chunk_mib"]),
            store=store,
            layers=layers,
        )
        groups = scale_groups(scales, coarsen["groups"])
        return cls(scales=scales, groups=groups, patch_scales=patch_scales, base=base)

    @property
    def labels(self) -> tuple[str, ...]:
        """Every scale label, in configured order."""
        return tuple(s.label for s in self.scales)

    @property
    def store_labels(self) -> tuple[str, ...]:
        """Every store label: each group's scale stores, then its layer stores."""
        return tuple(lab for g in self.groups for lab in self.for_group(g).store_labels)

    def for_group(self, group: str) -> CoarsenSettings:
        """Settings of one group's jobs: only its scales and the patches of those scales.

        Changing another group's scales therefore changes nothing a job of this group
        depends on.
        """
        labels = self.groups[group]
        return replace(
            self.base,
            scales=tuple(s for s in self.scales if s.label in labels),
            patch_scales=tuple(lab for lab in self.patch_scales if lab in labels),
            layers=tuple(g for g in self.base.layers if any(g.applies_to(x) for x in labels)),
        )


def scale_groups(
    scales: Sequence[ScaleSpec], groups: Sequence[Sequence[Any]] | None
) -> dict[str, tuple[str, ...]]:
    """Group name -> scale labels. Without ``groups``: one group ``all`` with every scale.

    Each group is one job per case that computes its scales in one pass.

    Raises
    ------
    ConfigError
        A group names a scale not in ``scales``, puts one in two groups, or leaves one out.
    """
    labels = [s.label for s in scales]
    if not groups:
        return {"all": tuple(labels)}
    out: dict[str, tuple[str, ...]] = {}
    seen: set[str] = set()
    for g in groups:
        glabels = tuple(parse_scale(v).label for v in g)
        for lab in glabels:
            if lab not in labels:
                raise ConfigError(f"coarsen.groups names scale {lab!r}, not in coarsen.scales")
            if lab in seen:
                raise ConfigError(f"coarsen.groups puts scale {lab!r} in two groups")
            seen.add(lab)
        out["g-" + "-".join(glabels)] = glabels
    missing = [lab for lab in labels if lab not in seen]
    if missing:
        raise ConfigError(f"coarsen.groups leaves out scale(s) {missing}")
    return out

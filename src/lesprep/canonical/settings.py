"""Settings of the ingest stage, parsed once from the validated config.

Quantities with units (spin-up, cloud threshold) are parsed here, once, into floats in
SI units; the stage code never sees the configured strings. Defaults live in the config
schema only (``lesprep/schemas/config.schema.yaml``): every field is required here.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from types import MappingProxyType
from typing import Any, Literal

from lesprep import catalogue
from lesprep.canonical.mask import ThresholdUnits, parse_threshold
from lesprep.errors import ConfigError
from lesprep.store import StoreSettings
from lesprep.units import parse_quantity

Dtype = Literal["float32", "float64"]
TimeGaps = Literal["warn", "error"]
DuplicateTimes = Literal["error", "keep_later"]
RestartOrder = Literal["mtime", "name"]


def parse_tolerances(overrides: Mapping[str, Any]) -> dict[str, float]:
    """The catalogue's negative tolerances updated with the config's overrides.

    Raises
    ------
    ConfigError
        An override names a variable the catalogue does not know.
    """
    out = catalogue.negative_tolerances()
    for name, tol in overrides.items():
        catalogue.get(name)
        out[name] = float(tol)
    return out


def parse_ranges(overrides: Mapping[str, Any]) -> dict[str, tuple[float, float]]:
    """The catalogue's plausibility ranges updated with the config's overrides.

    Raises
    ------
    ConfigError
        An override names a variable the catalogue does not know, or min > max.
    """
    out = catalogue.plausible_ranges()
    for name, bounds in overrides.items():
        catalogue.get(name)  # names the known variables when unknown
        lo, hi = float(bounds[0]), float(bounds[1])
        if lo > hi:
            raise ConfigError(f"ingest.plausible_ranges.{name} is [{lo:g}, {hi:g}] (min > max)")
        out[name] = (lo, hi)
    return out


@dataclass(frozen=True, kw_only=True)
class IngestSettings:
    """Ingest settings of one case (all values parsed, SI units).

    Attributes
    ----------
    spinup_s
        Spin-up dropped from the case's first output time (s).
    threshold, threshold_units
        Cloud-water amount above which a fine cell is cloudy: a mixing ratio
        (``"kg kg-1"``) or a mass concentration (``"kg m-3"``, compared with dry-air
        density times ``qc``); see :mod:`lesprep.canonical.mask`.
    ranges
        Plausibility range per variable, canonical units.
    dtype
        Stored floating-point type.
    chunk_mib
        Target chunk size of a 3-D field (MiB).
    store
        Compressor settings.
    negative_tolerance
        How far below zero each non-negative variable may go (canonical units) before the
        archive is refused; values in between are set to zero and recorded.
    time_gaps
        What a missing output time or an irregular interval does.
    duplicate_times, restart_order
        What an output time in two files does, and which file is the later one.
    """

    spinup_s: float
    threshold: float
    threshold_units: ThresholdUnits
    ranges: Mapping[str, tuple[float, float]]
    dtype: Dtype
    chunk_mib: float
    store: StoreSettings
    negative_tolerance: Mapping[str, float]
    time_gaps: TimeGaps
    duplicate_times: DuplicateTimes
    restart_order: RestartOrder

    def __post_init__(self) -> None:
        ranges = {k: (float(v[0]), float(v[1])) for k, v in self.ranges.items()}
        object.__setattr__(self, "ranges", MappingProxyType(ranges))
        tol = {k: float(v) for k, v in self.negative_tolerance.items()}
        object.__setattr__(self, "negative_tolerance", MappingProxyType(tol))

    def __hash__(self) -> int:
        return hash(
            (
                self.spinup_s,
                self.threshold,
                self.threshold_units,
                tuple(self.ranges.items()),
                self.dtype,
            )
        )

    @classmethod
    def from_config(cls, ingest: Mapping[str, Any], store: StoreSettings) -> IngestSettings:
        """Parse the validated ``ingest`` section once."""
        threshold, threshold_units = parse_threshold(ingest["cloud_threshold"])
        return cls(
            spinup_s=parse_quantity(ingest["spinup"], "s", name="ingest.spinup"),
            threshold=threshold,
            threshold_units=threshold_units,  # type: ignore[arg-type]
            ranges=parse_ranges(ingest["plausible_ranges"]),
            dtype=ingest["dtype"],
            chunk_mib=float(ingest["chunk_mib"]),
            store=store,
            negative_tolerance=parse_tolerances(ingest["negative_tolerance"]),
            time_gaps=ingest["time_gaps"],
            duplicate_times=ingest["duplicate_times"],
            restart_order=ingest["restart_order"],
        )

    def for_case(self, spinup_s: float | None) -> IngestSettings:
        """These settings with a case's own spin-up (None: keep the config's)."""
        return self if spinup_s is None else replace(self, spinup_s=float(spinup_s))

    def to_dict(self) -> dict[str, Any]:
        """Plain form (job params, provenance); :meth:`from_dict` inverts it."""
        return {
            "spinup_s": self.spinup_s,
            "threshold": self.threshold,
            "threshold_units": self.threshold_units,
            "ranges": {k: list(v) for k, v in self.ranges.items()},
            "dtype": self.dtype,
            "chunk_mib": self.chunk_mib,
            "store": self.store.to_dict(),
            "negative_tolerance": dict(self.negative_tolerance),
            "time_gaps": self.time_gaps,
            "duplicate_times": self.duplicate_times,
            "restart_order": self.restart_order,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> IngestSettings:
        """Inverse of :meth:`to_dict`."""
        return cls(
            spinup_s=float(d["spinup_s"]),
            threshold=float(d["threshold"]),
            threshold_units=d["threshold_units"],
            ranges={k: (float(v[0]), float(v[1])) for k, v in d["ranges"].items()},
            dtype=d["dtype"],
            chunk_mib=float(d["chunk_mib"]),
            store=StoreSettings.from_dict(d["store"]),
            negative_tolerance=dict(d["negative_tolerance"]),
            time_gaps=d["time_gaps"],
            duplicate_times=d["duplicate_times"],
            restart_order=d["restart_order"],
        )

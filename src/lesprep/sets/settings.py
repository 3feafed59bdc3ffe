"""Settings of the training stores, parsed once from the validated config.

Defaults live in the config schema only.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

from lesprep.errors import ConfigError
from lesprep.store import StoreSettings
from lesprep.units import parse_quantity

Dtype = Literal["float32", "float64"]
Chunking = Literal["widest", "per-array"]


@dataclass(frozen=True, kw_only=True)
class SetSettings:
    """Settings of one training store.

    Attributes
    ----------
    z_range
        Keep samples with z in [min, max] (m), or None for all.
    time_stride
        Keep every n-th kept output time.
    shuffle, shuffle_seed
        Store samples in a seeded random order (else the natural order).
    chunk_mib
        Target chunk size along ``sample`` (MiB; the inner chunk when sharded).
    chunking
        ``per-array`` (each array's chunk sized by its own width) or ``widest`` (one
        chunk length for all arrays, set by the widest); see :mod:`lesprep.sets.chunking`.
    shard_mib
        Target size of one common shard length of all arrays together (MiB); 0: no
        sharding.
    dtype
        Stored floating-point type.
    store
        Compressor settings.
    lag_features
        Features stored also at earlier output times of the same cell (empty: none).
    lag_steps
        Those earlier times, in output times before the sample's (each at least 1).
    """

    z_range: tuple[float, float] | None
    time_stride: int
    shuffle: bool
    shuffle_seed: int
    chunk_mib: float
    chunking: Chunking
    shard_mib: float
    dtype: Dtype
    store: StoreSettings
    lag_features: tuple[str, ...]
    lag_steps: tuple[int, ...]

    def __post_init__(self) -> None:
        steps = tuple(int(k) for k in self.lag_steps)
        if any(k < 1 for k in steps) or len(set(steps)) != len(steps):
            raise ConfigError(f"sets.lags.steps is {list(steps)}; expected distinct integers >= 1")
        features = tuple(str(f) for f in self.lag_features)
        if len(set(features)) != len(features):
            raise ConfigError(f"sets.lags.features lists a feature twice: {list(features)}")
        if self.chunking not in ("widest", "per-array"):
            raise ConfigError(f"sets.chunking is {self.chunking!r}; expected widest or per-array")
        if self.shard_mib < 0:
            raise ConfigError(f"sets.shard_mib is {self.shard_mib:g}; expected >= 0 (0: none)")
        if features and not steps:
            raise ConfigError("sets.lags.features is set but sets.lags.steps is empty")
        object.__setattr__(self, "lag_features", features)
        object.__setattr__(self, "lag_steps", tuple(sorted(steps)) if features else ())
        if self.z_range is not None:
            lo, hi = (float(v) for v in self.z_range)
            if lo > hi:
                raise ConfigError(f"sets.z_range [{lo:g} m, {hi:g} m] is empty (min > max)")
            object.__setattr__(self, "z_range", (lo, hi))

    @classmethod
    def from_config(
        cls, sets: Mapping[str, Any], *, dtype: Dtype, store: StoreSettings
    ) -> SetSettings:
        """Parse the validated ``sets`` section once."""
        zr = sets["z_range"]
        z_range = None
        if zr:
            z_range = (
                parse_quantity(zr[0], "m", name="sets.z_range[0]"),
                parse_quantity(zr[1], "m", name="sets.z_range[1]"),
            )
        return cls(
            z_range=z_range,
            time_stride=int(sets["time_stride"]),
            shuffle=bool(sets["shuffle"]),
            shuffle_seed=int(sets["shuffle_seed"]),
            chunk_mib=float(sets["chunk_mib"]),
            chunking=sets["chunking"],
            shard_mib=float(sets["shard_mib"]),
            dtype=dtype,
            store=store,
            lag_features=tuple(sets["lags"]["features"]),
            lag_steps=tuple(sets["lags"]["steps"]),
        )

    def to_dict(self) -> dict[str, Any]:
        """Plain form (job params, provenance); :meth:`from_dict` inverts it."""
        return {
            "z_range_m": None if self.z_range is None else list(self.z_range),
            "time_stride": self.time_stride,
            "shuffle": self.shuffle,
            "shuffle_seed": self.shuffle_seed,
            "chunk_mib": self.chunk_mib,
            "chunking": self.chunking,
            "shard_mib": self.shard_mib,
            "dtype": self.dtype,
            "store": self.store.to_dict(),
            "lags": {"features": list(self.lag_features), "steps": list(self.lag_steps)},
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SetSettings:
        """Inverse of :meth:`to_dict`."""
        zr = d["z_range_m"]
        return cls(
            z_range=None if zr is None else (float(zr[0]), float(zr[1])),
            time_stride=int(d["time_stride"]),
            shuffle=bool(d["shuffle"]),
            shuffle_seed=int(d["shuffle_seed"]),
            chunk_mib=float(d["chunk_mib"]),
            chunking=d["chunking"],
            shard_mib=float(d["shard_mib"]),
            dtype=d["dtype"],
            store=StoreSettings.from_dict(d["store"]),
            lag_features=tuple(d["lags"]["features"]),
            lag_steps=tuple(d["lags"]["steps"]),
        )

"""Settings of the scene regimes, parsed once from the validated config.

Defaults live in the config schema only (the ``regimes`` section).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from lesprep.errors import ConfigError

DESCRIPTORS = (
    "lwp_mean",
    "lwp_std",
    "lwp_skew",
    "cloud_cover",
    "peak_wavelength_rel",
    "peak_at_domain",
)
"""Scene descriptors a regime fit may use. ``peak_wavelength_rel`` is the peak wavelength
of the LWP spectrum divided by the domain size; ``peak_at_domain`` is 1 when that peak is
at the domain size, else 0 (see :mod:`lesprep.report.regimes`)."""


@dataclass(frozen=True, kw_only=True)
class RegimeSettings:
    """Settings of the regime labelling.

    Attributes
    ----------
    descriptors
        Names from :data:`DESCRIPTORS` that span the space the scenes are clustered in.
    k_min, k_max
        Range of cluster counts tried (inclusive); the one with the largest mean
        silhouette wins.
    seed
        ``random_state`` of every k-means fit.
    n_init
        k-means restarts per cluster count (the best inertia is kept).
    """

    descriptors: tuple[str, ...]
    k_min: int
    k_max: int
    seed: int
    n_init: int

    def __post_init__(self) -> None:
        names = tuple(str(d) for d in self.descriptors)
        unknown = [d for d in names if d not in DESCRIPTORS]
        if unknown or not names or len(set(names)) != len(names):
            raise ConfigError(
                f"regimes.descriptors is {list(names)}; expected distinct names "
                f"from {list(DESCRIPTORS)} (at least one)"
            )
        object.__setattr__(self, "descriptors", names)
        if not 2 <= int(self.k_min) <= int(self.k_max):
            raise ConfigError(
                f"regimes.k_range is [{self.k_min}, {self.k_max}]; expected "
                "2 <= min <= max (a silhouette needs at least two clusters)"
            )
        if int(self.n_init) < 1:
            raise ConfigError(f"regimes.n_init is {self.n_init}; expected at least 1")

    @classmethod
    def from_config(cls, regimes: Mapping[str, Any]) -> RegimeSettings:
        """Parse the validated ``regimes`` section once."""
        k_range = regimes["k_range"]
        return cls(
            descriptors=tuple(regimes["descriptors"]),
            k_min=int(k_range[0]),
            k_max=int(k_range[1]),
            seed=int(regimes["seed"]),
            n_init=int(regimes["n_init"]),
        )

    @property
    def k_values(self) -> tuple[int, ...]:
        """Every cluster count tried, ascending."""
        return tuple(range(self.k_min, self.k_max + 1))

    def to_dict(self) -> dict[str, Any]:
        """Plain form (job params, provenance); :meth:`from_dict` inverts it."""
        return {
            "descriptors": list(self.descriptors),
            "k_range": [self.k_min, self.k_max],
            "seed": self.seed,
            "n_init": self.n_init,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> RegimeSettings:
        """Inverse of :meth:`to_dict`."""
        return cls.from_config(d)

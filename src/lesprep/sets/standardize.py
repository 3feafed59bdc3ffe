"""Train normalization statistics of a set: read them, apply them, invert them.

The statistics are those :func:`lesprep.sets.assemble.write_normalization` writes: for
each feature and patch variable the mean and the population standard deviation over
every sample (and patch pixel) of the train split, as ``normalization.json`` and as the
train store's root attribute ``normalization`` (the same JSON text). Applied values are
``(x - mean) / std`` computed in float64 and rounded once to the input's floating type;
a variable constant over the train split (``std == 0``) is only centred (divided by 1),
since dividing by zero helps nobody. :meth:`Statistics.invert` undoes it exactly up to
rounding.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from lesprep._jit import HAVE_NUMBA, njit
from lesprep.errors import ConfigError


@dataclass(frozen=True)
class Statistics:
    """Mean and standard deviation per variable, and where they came from.

    Attributes
    ----------
    mean, std
        Variable -> value.
    source
        The file or store attribute they were read from (for error messages).
    """

    mean: Mapping[str, float]
    std: Mapping[str, float]
    source: str

    def scale(self, name: str) -> float:
        """Divisor of ``name``: its std, or 1 where the std is 0 or not finite."""
        s = float(self._get(self.std, name))
        return s if np.isfinite(s) and s > 0 else 1.0

    def _get(self, table: Mapping[str, float], name: str) -> float:
        if name not in table:
            raise ConfigError(
                f"{self.source} has no statistics of {name!r}; found "
                f"{sorted(table)[:12]}{' ...' if len(table) > 12 else ''}",
                variable=name,
                hint="compute the statistics on a train store that holds this variable, or "
                "leave it out of the normalized variables",
            )
        return float(table[name])

    def check(self, names: list[str]) -> None:
        """Raise :class:`ConfigError` if a variable of ``names`` has no statistics."""
        for name in names:
            self._get(self.mean, name)
            self._get(self.std, name)

    def apply(self, name: str, x: NDArray, out: NDArray | None = None) -> NDArray:
        """``(x - mean) / std`` of variable ``name``, in ``x``'s floating type.

        Computed in float64 (one float64 copy of ``x``) and rounded once to the result's
        type; ``out`` may be ``x`` itself.
        """
        x = np.asarray(x)
        work = x.astype(np.float64)
        work -= self._get(self.mean, name)
        work *= 1.0 / self.scale(name)
        if out is None:
            return work.astype(x.dtype if x.dtype.kind == "f" else np.float64, copy=False)
        out[...] = work
        return out

    def take(self, name: str, src: NDArray, rows: NDArray, out: NDArray) -> NDArray:
        """``apply`` of the rows ``rows`` of ``src`` (along the first axis) into ``out``.

        The gather and the normalization are one pass (compiled when numba is present),
        with the values :meth:`apply` gives: each value is converted to float64, centred,
        multiplied by ``1 / std`` and rounded once to ``out``'s type.
        """
        take_normalized(src, rows, self._get(self.mean, name), 1.0 / self.scale(name), out)
        return out

    def invert(self, name: str, y: NDArray) -> NDArray:
        """``y * std + mean``: the physical values of normalized ``y``."""
        y = np.asarray(y)
        dt = y.dtype if y.dtype.kind == "f" else np.dtype(np.float64)
        x = y.astype(np.float64) * self.scale(name) + self._get(self.mean, name)
        return x.astype(dt, copy=False)


def take_normalized(
    src: NDArray, rows: NDArray, mean: float, inv_scale: float, out: NDArray
) -> None:
    """``out[i] = (float64(src[rows[i]]) - mean) * inv_scale``, rounded to ``out``'s type.

    ``src`` and ``out`` have the same trailing shape; ``out`` has ``len(rows)`` rows.
    """
    src, rows = np.asarray(src), np.asarray(rows, dtype=np.int64)
    if out.shape != (rows.size, *src.shape[1:]):
        raise ValueError(f"out has shape {out.shape}; expected {(rows.size, *src.shape[1:])}")
    width = int(np.prod(src.shape[1:], dtype=np.int64))
    flat_src = src.reshape(src.shape[0], width) if src.flags.c_contiguous else None
    flat_out = out.reshape(rows.size, width) if out.flags.c_contiguous else None
    if HAVE_NUMBA and flat_src is not None and flat_out is not None and out.dtype.kind == "f":
        _nb_take_normalized(flat_src, rows, float(mean), float(inv_scale), flat_out)
        return
    work = src[rows].astype(np.float64)
    work -= mean
    work *= inv_scale
    out[...] = work


if HAVE_NUMBA:

    @njit(cache=True, nogil=True, error_model="numpy")
    def _nb_take_normalized(src, rows, mean, inv, out):  # pragma: no cover - compiled
        width = src.shape[1]
        for i in range(rows.size):
            r = rows[i]
            for j in range(width):
                out[i, j] = (np.float64(src[r, j]) - mean) * inv


def from_document(doc: Mapping[str, Any], source: str) -> Statistics:
    """Statistics of a normalization document (the JSON written by the workflow).

    Examples
    --------
    >>> s = from_document({"statistics": {"a": {"mean": 1.0, "std": 2.0}}}, "x.json")
    >>> s.apply("a", np.array([3.0])).tolist(), s.invert("a", np.array([1.0])).tolist()
    ([1.0], [3.0])
    """
    stats = doc.get("statistics") if isinstance(doc, Mapping) else None
    if not isinstance(stats, Mapping):
        raise ConfigError(
            f"{source} holds no 'statistics' mapping; expected the normalization document "
            "of a train store ({'statistics': {variable: {'mean': ..., 'std': ...}}})",
            file=source,
            hint="point the reader at the normalization.json of the train set",
        )
    try:
        mean = {str(k): float(v["mean"]) for k, v in stats.items()}
        std = {str(k): float(v["std"]) for k, v in stats.items()}
    except (KeyError, TypeError, ValueError) as err:
        raise ConfigError(
            f"{source}: a variable's statistics lack a numeric 'mean' or 'std' ({err})",
            file=source,
        ) from err
    return Statistics(mean, std, source)


def read_statistics(
    source: str | Path | Mapping[str, Any], attrs: Mapping[str, Any], store: str
) -> Statistics:
    """Statistics from a JSON file, a document, or (``source`` None) the store attribute.

    Parameters
    ----------
    source
        A ``normalization.json`` path, an already loaded document, or None.
    attrs
        The root attributes of the store (used when ``source`` is None).
    store
        The store's name, for messages.
    """
    if source is None:
        text = attrs.get("normalization")
        where = f"{store} (root attribute 'normalization')"
        if text is None:
            raise ConfigError(
                f"{store} has no root attribute 'normalization'; expected the train "
                "statistics (only the train store carries them)",
                file=store,
                hint="pass the train set's normalization.json, or normalize=False",
            )
        doc = json.loads(text) if isinstance(text, str) else text
        return from_document(doc, where)
    if isinstance(source, Mapping):
        return from_document(source, "the given normalization document")
    path = Path(source)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as err:
        raise ConfigError(
            f"cannot read normalization statistics: {err}",
            file=str(path),
            hint="expected the normalization.json the workflow writes next to the sets",
        ) from err
    return from_document(doc, str(path))

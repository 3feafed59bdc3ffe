"""Error hierarchy of lesprep.

Every error a user can meet derives from :class:`LesprepError` and from the builtin
exception that fits it best, stores the facts as typed fields and formats them into
one line that says what was found, what was expected and what to do. The errors
pickle, so they survive dask and multiprocessing workers.
"""

from __future__ import annotations


class LesprepError(Exception):
    """Base class of every error lesprep raises on purpose."""


class InputError(LesprepError, ValueError):
    """A raw archive, variable map, config or case sheet is not usable as it is.

    Parameters
    ----------
    message
        What was found and what was expected.
    case, file, variable
        Where the problem is; any may be omitted.
    hint
        What the user can do about it.
    """

    def __init__(
        self,
        message: str,
        *,
        case: str | None = None,
        file: str | None = None,
        variable: str | None = None,
        hint: str | None = None,
    ) -> None:
        self.message = message
        self.case = case
        self.file = file
        self.variable = variable
        self.hint = hint
        super().__init__(message, case, file, variable, hint)

    def __reduce__(self):  # keep keyword fields through pickling
        return (
            _rebuild,
            (type(self), self.message, self.case, self.file, self.variable, self.hint),
        )

    def __str__(self) -> str:
        where = []
        if self.case is not None:
            where.append(f"case {self.case!r}")
        if self.file is not None:
            where.append(f"file {self.file}")
        if self.variable is not None:
            where.append(f"variable {self.variable!r}")
        text = (", ".join(where) + ": " if where else "") + self.message
        if self.hint:
            text += f" -- {self.hint}"
        return text


def _rebuild(cls, message, case, file, variable, hint):
    return cls(message, case=case, file=file, variable=variable, hint=hint)


class UnitError(InputError):
    """Units are missing, unparsable or of the wrong dimensionality."""


class RangeError(InputError):
    """Values lie outside the plausible range of a canonical variable."""


class NonFiniteError(InputError):
    """A field holds NaN or infinite values."""


class GridError(InputError):
    """The grid is not what lesprep needs (spacing, staggering, shape)."""


class TimeAxisError(InputError):
    """The time axis is unusable (duplicates, not monotonic, nothing left after spin-up)."""


class ConfigError(InputError):
    """The configuration, case sheet or a variable map is invalid."""


class ScaleError(InputError):
    """A requested coarse scale or patch size does not fit a case's grid."""


class VerifyError(LesprepError, RuntimeError):
    """A results tree failed verification."""

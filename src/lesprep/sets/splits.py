"""Train/validation/test splits by whole case, stable under adding cases.

A parameterization must be tested on simulations it never saw, so lesprep splits by
case, never by sample: every sample of a case goes to the split of its case.

Rule
----
The splits are, in this fixed order, ``train``, ``validation`` and ``test``. A rule
(:class:`SplitRule`) holds target fractions and a seed. ``train`` and ``test`` need a
fraction > 0; ``validation`` is optional (fraction 0 or absent: no validation split).
The fractions must be >= 0 and sum to 1 within 1e-9.

1. **Pins.** A case pinned to a split keeps it (reason ``"pinned"``).

2. **Hash rule.** Every case gets a stable uniform number

   ``u = int.from_bytes(sha256(f"{seed}\\0{case}".encode("utf-8")).digest()[:8], "big") / 2**64``

   i.e. the first 8 bytes of the SHA-256 digest (FIPS 180-4) of the seed's text, a NUL
   byte and the case id, read as a big-endian unsigned integer and divided by 2**64 with
   Python's correctly rounded float64 division. The seed enters as its text, so ``7`` and
   ``"7"`` are the same seed. Case ids hold no NUL, so distinct (seed, case) pairs hash
   distinct strings. ``u`` lies in [0, 1]; it rounds to exactly 1.0 only when the integer
   is >= 2**64 - 2**10 (probability 2**-54). With the float64 bounds
   ``c_train = f_train`` and ``c_val = f_train + f_validation``, an unpinned case goes to

   * ``train`` if ``u < c_train``,
   * ``validation`` if ``c_train <= u < c_val``,
   * ``test`` otherwise, so ``test`` absorbs the <= 1e-9 slack of the fractions

   (reason ``"hash"``). ``u`` is a pure function of (seed, case id): the hash split of a
   case never depends on the other cases. ``u`` is computed and recorded for pinned cases
   too.

3. **Stratification by regime.** The cases of each regime tag form a group; the empty tag
   is one group too (the untagged cases), so a sheet without tags still gets at least one
   train and one test case. A group of >= 2 cases must hold >= 1 ``train`` and >= 1
   ``test`` case, pins included (a pinned test case satisfies the test requirement). Call
   a group *stratifiable* when it has >= 2 cases and at least as many unpinned cases as
   it has missing pinned splits, ``n_unpinned >= [no case pinned to train] + [no case
   pinned to test]``; only then can it be made valid. For a stratifiable group, after
   pins and the hash rule:

   * no ``train`` case: the unpinned case with the smallest ``u`` (the one nearest the
     train interval [0, c_train)) moves to ``train``;
   * no ``test`` case: the unpinned case with the largest ``u`` (nearest the test
     interval [c_val, 1]) moves to ``test``.

   Ties in ``u`` are broken by the case id (order of the key ``(u, case)``). Moved cases
   get reason ``"stratified"``. At most one case moves per missing split, so the number
   of moves is the minimum. A move never takes away the other required split: if the
   smallest-``u`` unpinned case were the only test case, every unpinned case would be
   test and there would be exactly one, with no test pin, and the group would not be
   stratifiable (mirror argument for the largest ``u``); when both splits are missing
   there are >= 2 unpinned cases, so the two chosen cases differ. A group that is not
   stratifiable is left as pins and hash rule made it (no partial corrections) and
   reported: one message per such group, sorted by regime, in the second return value
   of :func:`assign_splits` (the caller logs them). A one-case group is always reported.

Stability when cases are added
------------------------------
Let ``S`` be a case set and ``S'`` the set after adding cases with new ids (existing
cases unchanged: same id, regime and pin; same rule). Groups never interact, and the
result does not depend on the input order.

G1. If a case's group is stratifiable in ``S``, its split in ``S'`` is either its split in
    ``S`` or its hash split. Hence pinned and hash-assigned cases of such groups never
    move. A stratified case leaves its corrected split X only back to its hash split,
    and only when in ``S'`` a new case of its group is in X (a new case pinned or hashed
    to X, so the correction is no longer needed, or a new unpinned case with a smaller
    ``u`` for X = train, larger for X = test, which takes the correction over). A
    stratifiable group therefore never loses its train or test case.
    Proof: the pinned and hashed cases of the group in ``S'`` are a superset of those
    in ``S``, so a split present in ``S`` stays present and ``S'`` needs a correction
    only where ``S`` needed one; stratifiability only improves; the minimum (maximum)
    over a superset is the old one or a new element.

G2. A hash-assigned case can move only if its group was *not* stratifiable in ``S``
    (a single case, or too few unpinned cases for the pins) and in ``S'`` it is
    stratifiable and pins plus hash rule leave it without train or test; then the case
    moves exactly when it is the smallest-``u`` (or largest-``u``) unpinned case. No
    rule that depends only on the case set can avoid this: if cases ``a`` and ``b`` of
    one regime both hash to train, the set ``{a, b}`` must send one of them to test, so
    one of the histories ``{a} + b`` and ``{b} + a`` moves a case that was
    hash-assigned. (A lone case hashed to validation must move as soon as any second
    case joins its regime, whatever rule is used.)

Changing the seed, the fractions or an existing case's regime or pin is not covered: it
defines a new split.
"""

from __future__ import annotations

import hashlib
import math
import os
import uuid
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from numbers import Integral, Real
from pathlib import Path
from types import MappingProxyType
from typing import Any, Literal, get_args

from lesprep.errors import ConfigError, InputError
from lesprep.layout import SPLITS  # split names, in the order of the cumulative hash intervals

_Reason = Literal["pinned", "hash", "stratified"]
_REASONS: tuple[str, ...] = get_args(_Reason)
_TSV_COLUMNS: tuple[str, ...] = ("case", "regime", "split", "reason", "u")
_FRACTION_TOLERANCE = 1e-9  # largest accepted |sum(fractions) - 1|

_REQUIRED = ("train", "test")


def _bad_char(text: str) -> str | None:
    """First ASCII control character (incl. tab, newline, NUL, DEL) in ``text``, if any."""
    for char in text:
        if ord(char) < 32 or ord(char) == 127:
            return char
    return None


def _check_label(value: Any, *, what: str, case: str | None, allow_empty: bool) -> None:
    if not isinstance(value, str):
        raise ConfigError(
            f"{what} is {value!r} of type {type(value).__name__}; expected a string",
            case=case,
        )
    if not value and not allow_empty:
        raise ConfigError(f"{what} is empty; expected a non-empty string", case=case)
    bad = _bad_char(value)
    if bad is not None:
        raise ConfigError(
            f"{what} {value!r} contains the control character {bad!r}; expected printable text",
            case=case,
            hint="case ids and regime tags must not contain tabs, newlines or NUL",
        )


@dataclass(frozen=True, kw_only=True)
class CaseInfo:
    """One case as the splitter sees it.

    Attributes
    ----------
    case
        Case id: non-empty, no ASCII control characters (tab, newline, NUL ...).
    regime
        Regime tag for stratification; ``""`` means untagged (the untagged cases form
        one group).
    pinned
        A split the case must go to, or None to let the rule decide.
    """

    case: str
    regime: str = ""
    pinned: str | None = None

    def __post_init__(self) -> None:
        _check_label(self.case, what="case id", case=None, allow_empty=False)
        _check_label(self.regime, what="regime tag", case=self.case, allow_empty=True)
        if self.pinned is not None and self.pinned not in SPLITS:
            raise ConfigError(
                f"pinned split {self.pinned!r} is not a split name; expected one of {SPLITS}",
                case=self.case,
            )


def _check_fractions(fractions: Any) -> dict[str, float]:
    """Validate target fractions and return them as floats in :data:`SPLITS` order."""
    if not isinstance(fractions, Mapping):
        raise ConfigError(
            f"split fractions are {fractions!r}; expected a mapping such as "
            "{'train': 0.7, 'validation': 0.1, 'test': 0.2}"
        )
    unknown = [name for name in fractions if name not in SPLITS]
    if unknown:
        raise ConfigError(
            f"unknown split name(s) {unknown} in the split fractions; expected names from {SPLITS}"
        )
    out: dict[str, float] = {}
    for name in SPLITS:
        if name not in fractions:
            continue
        value = fractions[name]
        if isinstance(value, bool) or not isinstance(value, Real):
            raise ConfigError(f"fraction of {name!r} is {value!r}; expected a number in [0, 1]")
        value = float(value)
        if not math.isfinite(value) or value < 0.0:
            raise ConfigError(f"fraction of {name!r} is {value!r}; expected a number in [0, 1]")
        out[name] = value
    for name in _REQUIRED:
        if out.get(name, 0.0) <= 0.0:
            raise ConfigError(
                f"fraction of {name!r} is {out.get(name, 'missing')}; expected a number > 0",
                hint="every split needs a train and a test share; validation is optional",
            )
    total = math.fsum(out.values())
    if abs(total - 1.0) > _FRACTION_TOLERANCE:
        raise ConfigError(
            f"split fractions {out} sum to {total!r}; expected 1 (tolerance "
            f"{_FRACTION_TOLERANCE:g})"
        )
    return out


@dataclass(frozen=True, kw_only=True)
class SplitRule:
    """Target fractions and seed of the case split.

    Attributes
    ----------
    fractions
        Split name to target fraction; ``train`` and ``test`` > 0, ``validation``
        optional. Stored read-only, as floats, in :data:`SPLITS` order.
    seed
        Integer or string; enters the hash as its text (``7`` and ``"7"`` are equal).

    Raises
    ------
    ConfigError
        Unknown split names, negative or non-finite fractions, fractions not summing to
        1 within 1e-9, a zero or missing train/test fraction, or a seed of another type.
    """

    fractions: Mapping[str, float]
    seed: int | str = 0

    def __post_init__(self) -> None:
        clean = _check_fractions(self.fractions)
        object.__setattr__(self, "fractions", MappingProxyType(clean))
        seed = self.seed
        if isinstance(seed, bool) or not isinstance(seed, (Integral, str)):
            raise ConfigError(f"split seed is {seed!r}; expected an integer or a string")
        if isinstance(seed, Integral):
            object.__setattr__(self, "seed", int(seed))

    def __hash__(self) -> int:  # the read-only mapping itself is not hashable
        return hash((tuple(self.fractions.items()), self.seed))

    def to_dict(self) -> dict[str, Any]:
        """Plain-dict form for config files and provenance.

        Returns
        -------
        dict
            ``{"fractions": {...}, "seed": seed}``.

        Examples
        --------
        >>> SplitRule(fractions={"train": 0.8, "test": 0.2}, seed=3).to_dict()
        {'fractions': {'train': 0.8, 'test': 0.2}, 'seed': 3}
        """
        return {"fractions": dict(self.fractions), "seed": self.seed}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SplitRule:
        """Inverse of :meth:`to_dict` (the config's ``splits`` section has the same form).

        Parameters
        ----------
        d
            Mapping with keys ``fractions`` and ``seed``.

        Returns
        -------
        SplitRule

        Raises
        ------
        ConfigError
            Missing ``fractions`` or ``seed``, unknown keys, or invalid values.

        Examples
        --------
        >>> SplitRule.from_dict({"fractions": {"train": 0.5, "test": 0.5}, "seed": 4}).seed
        4
        """
        if not isinstance(d, Mapping):
            raise ConfigError(f"split rule is {d!r}; expected a mapping with key 'fractions'")
        unknown = sorted(set(d) - {"fractions", "seed"}, key=str)
        if unknown:
            raise ConfigError(
                f"unknown key(s) {unknown} in the split rule; expected 'fractions' and 'seed'"
            )
        if "fractions" not in d:
            raise ConfigError("split rule has no 'fractions'; expected e.g. {'train': 0.8, ...}")
        if "seed" not in d:
            raise ConfigError("split rule has no 'seed'; expected an integer or a string")
        return cls(fractions=d["fractions"], seed=d["seed"])


@dataclass(frozen=True, kw_only=True)
class Assignment:
    """The split of one case and why.

    Attributes
    ----------
    case, regime
        As in :class:`CaseInfo`.
    split
        One of :data:`SPLITS`.
    reason
        ``"pinned"`` (kept its pin), ``"hash"`` (plain hash rule) or ``"stratified"``
        (moved to make its regime hold a train and a test case).
    u
        The case's stable uniform number (see the module docstring).
    """

    case: str
    regime: str
    split: str
    reason: _Reason
    u: float

    def __post_init__(self) -> None:
        _check_label(self.case, what="case id", case=None, allow_empty=False)
        _check_label(self.regime, what="regime tag", case=self.case, allow_empty=True)
        if self.split not in SPLITS:
            raise ConfigError(
                f"split {self.split!r} is not a split name; expected one of {SPLITS}",
                case=self.case,
            )
        if self.reason not in _REASONS:
            raise ConfigError(
                f"reason {self.reason!r} is unknown; expected one of {_REASONS}", case=self.case
            )
        u = self.u
        if isinstance(u, bool) or not isinstance(u, Real) or not 0.0 <= float(u) <= 1.0:
            raise ConfigError(f"u is {u!r}; expected a number in [0, 1]", case=self.case)
        object.__setattr__(self, "u", float(u))

    def to_dict(self) -> dict[str, Any]:
        """Plain form (job params, provenance); :meth:`from_dict` inverts it."""
        return {
            "case": self.case,
            "regime": self.regime,
            "split": self.split,
            "reason": self.reason,
            "u": self.u,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Assignment:
        """Inverse of :meth:`to_dict`."""
        return cls(
            case=d["case"], regime=d["regime"], split=d["split"], reason=d["reason"], u=d["u"]
        )


def _stable_u(seed: int | str, case: str) -> float:
    """The documented uniform number of (seed, case): sha256 prefix / 2**64."""
    digest = hashlib.sha256(f"{seed}\0{case}".encode()).digest()
    return int.from_bytes(digest[:8], "big") / 2**64


def _configured(rule: SplitRule) -> tuple[str, ...]:
    """Splits with a fraction > 0, in :data:`SPLITS` order."""
    return tuple(name for name, value in rule.fractions.items() if value > 0.0)


def _bounds(rule: SplitRule) -> tuple[float, float]:
    """Cumulative float64 bounds ``(c_train, c_val)`` of the hash intervals."""
    c_train = rule.fractions["train"]
    return c_train, c_train + rule.fractions.get("validation", 0.0)


def _hash_split(u: float, bounds: tuple[float, float]) -> str:
    """Split of ``u`` under the cumulative bounds ``(c_train, c_val)``."""
    c_train, c_val = bounds
    if u < c_train:
        return "train"
    if u < c_val:
        return "validation"
    return "test"


def _regime_label(regime: str) -> str:
    return f"regime {regime!r}" + (" (untagged)" if regime == "" else "")


def _stratify(members: Sequence[Assignment]) -> tuple[dict[str, str], str | None]:
    """Corrections for one regime group: ``({case: new split}, message or None)``.

    ``members`` hold the pinned and hashed assignments of one regime.
    """
    label = _regime_label(members[0].regime) if members else "regime"
    if len(members) < 2:
        only = members[0]
        return {}, (
            f"{label} has only 1 case ({only.case!r}, {only.split} by {only.reason}); "
            "it needs at least 2 cases to hold both a train and a test case"
        )
    pinned = {m.split for m in members if m.reason == "pinned"}
    free = sorted((m for m in members if m.reason != "pinned"), key=lambda m: (m.u, m.case))
    missing_pins = [name for name in _REQUIRED if name not in pinned]
    if len(free) < len(missing_pins):
        counts = {name: sum(m.split == name for m in members) for name in SPLITS}
        return {}, (
            f"{label} has {len(members)} cases but cannot hold both a train and a test case: "
            f"{len(free)} unpinned, none pinned to {' or '.join(missing_pins)}; left as "
            f"pinned/hashed ({', '.join(f'{k}: {v}' for k, v in counts.items())}) -- pin a "
            "case of this regime to the missing split or add cases"
        )
    present = {m.split for m in members}
    moves: dict[str, str] = {}
    if "train" not in present:
        moves[free[0].case] = "train"
    if "test" not in present:
        moves[free[-1].case] = "test"
    return moves, None


def _check_cases(cases: Sequence[CaseInfo], rule: SplitRule) -> None:
    seen: set[str] = set()
    configured = _configured(rule)
    for info in cases:
        if not isinstance(info, CaseInfo):
            raise ConfigError(f"case entry {info!r} is not a CaseInfo")
        if info.case in seen:
            raise ConfigError(
                "case id appears more than once; expected unique case ids",
                case=info.case,
                hint="rename or remove the duplicate entry in the case sheet",
            )
        seen.add(info.case)
        if info.pinned is not None and info.pinned not in configured:
            raise ConfigError(
                f"pinned to split {info.pinned!r}, which the split rule does not configure "
                f"(configured: {configured})",
                case=info.case,
                hint=f"give {info.pinned!r} a fraction > 0 or change the pin",
            )


def assign_splits(cases: Sequence[CaseInfo], rule: SplitRule) -> tuple[list[Assignment], list[str]]:
    """Assign every case to a split (pins, hash rule, stratification by regime).

    Parameters
    ----------
    cases
        The cases; ids must be unique. Their order does not affect the result.
    rule
        Target fractions and seed.

    Returns
    -------
    assignments : list of Assignment
        One per case, in input order.
    messages : list of str
        One line per regime group that cannot be stratified (fewer than 2 cases, or too
        few unpinned cases for its pins), sorted by regime tag; for the caller to log.

    Raises
    ------
    ConfigError
        Duplicate case ids, or a case pinned to a split the rule does not configure.

    Examples
    --------
    >>> rule = SplitRule(fractions={"train": 0.7, "validation": 0.1, "test": 0.2}, seed=0)
    >>> cases = [CaseInfo(case=f"demo-{i}", regime="calm") for i in range(3)]
    >>> cases.append(CaseInfo(case="demo-pinned", regime="windy", pinned="test"))
    >>> assignments, messages = assign_splits(cases, rule)
    >>> [(a.split, a.reason) for a in assignments]  # all of 'calm' hashed to train
    [('test', 'stratified'), ('train', 'hash'), ('train', 'hash'), ('test', 'pinned')]
    >>> messages  # doctest: +ELLIPSIS
    ["regime 'windy' has only 1 case ('demo-pinned', test by pinned); ..."]
    """
    _check_cases(cases, rule)
    bounds = _bounds(rule)
    first: list[Assignment] = []
    for info in cases:
        u = _stable_u(rule.seed, info.case)
        if info.pinned is not None:
            split, reason = info.pinned, "pinned"
        else:
            split, reason = _hash_split(u, bounds), "hash"
        first.append(
            Assignment(case=info.case, regime=info.regime, split=split, reason=reason, u=u)
        )
    groups: dict[str, list[Assignment]] = {}
    for item in first:
        groups.setdefault(item.regime, []).append(item)
    moves: dict[str, str] = {}
    messages: list[str] = []
    for regime in sorted(groups):
        group_moves, message = _stratify(groups[regime])
        moves.update(group_moves)
        if message is not None:
            messages.append(message)
    final = [
        Assignment(case=a.case, regime=a.regime, split=moves[a.case], reason="stratified", u=a.u)
        if a.case in moves
        else a
        for a in first
    ]
    return final, messages


def _row(a: Assignment) -> str:
    return "\t".join((a.case, a.regime, a.split, a.reason, repr(a.u))) + "\n"


def write_assignment_tsv(assignments: Iterable[Assignment], path: str | os.PathLike[str]) -> None:
    """Write assignments as a tab-separated table, atomically.

    The table is UTF-8 with ``\\n`` line ends, a header line ``case regime split reason
    u`` and one row per assignment in the given order; ``u`` is written with Python's
    shortest round-trip float repr, so :func:`read_assignment_tsv` restores it exactly.
    The text goes to a temporary file in the target's directory, is flushed to disk and
    then renamed over ``path`` (``os.replace``), so readers never see a partial table.

    Parameters
    ----------
    assignments
        Assignments with unique case ids.
    path
        Target file; its directory must exist.

    Raises
    ------
    ConfigError
        A case id appears more than once.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> a = Assignment(case="demo-1", regime="", split="test", reason="hash", u=0.9)
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     target = pathlib.Path(tmp) / "splits.tsv"
    ...     write_assignment_tsv([a], target)
    ...     target.read_text().splitlines()
    ['case\\tregime\\tsplit\\treason\\tu', 'demo-1\\t\\ttest\\thash\\t0.9']
    """
    items = list(assignments)
    seen: set[str] = set()
    for a in items:
        if a.case in seen:
            raise ConfigError("case id appears more than once in the assignments", case=a.case)
        seen.add(a.case)
    text = "\t".join(_TSV_COLUMNS) + "\n" + "".join(_row(a) for a in items)
    target = Path(path)
    tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex}.tmp")
    try:
        with open(tmp, "x", encoding="utf-8", newline="") as handle:
            handle.write(text)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def read_assignment_tsv(path: str | os.PathLike[str]) -> list[Assignment]:
    """Read a table written by :func:`write_assignment_tsv`.

    Parameters
    ----------
    path
        The table.

    Returns
    -------
    list of Assignment
        In file order.

    Raises
    ------
    InputError
        Wrong header, a row without exactly 5 fields, an unknown split or reason, a
        ``u`` outside [0, 1], or a repeated case id; the message names the line.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     target = pathlib.Path(tmp) / "splits.tsv"
    ...     _ = target.write_text("case\\tregime\\tsplit\\treason\\tu\\ndemo-1\\tcalm\\ttrain\\thash\\t0.25\\n")
    ...     read_assignment_tsv(target)
    [Assignment(case='demo-1', regime='calm', split='train', reason='hash', u=0.25)]
    """  # noqa: E501
    where = str(path)
    with open(path, encoding="utf-8") as handle:
        lines = handle.read().split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    header = "\t".join(_TSV_COLUMNS)
    if not lines or lines[0] != header:
        found = lines[0] if lines else "an empty file"
        raise InputError(
            f"line 1 is {found!r}; expected the header {header!r}",
            file=where,
            hint="write the table with lesprep's split step",
        )
    out: list[Assignment] = []
    seen: set[str] = set()
    for number, line in enumerate(lines[1:], start=2):
        fields = line.split("\t")
        if len(fields) != len(_TSV_COLUMNS):
            raise InputError(
                f"line {number} has {len(fields)} tab-separated fields; expected "
                f"{len(_TSV_COLUMNS)} ({', '.join(_TSV_COLUMNS)})",
                file=where,
            )
        case, regime, split, reason, u_text = fields
        try:
            u = float(u_text)
        except ValueError:
            raise InputError(
                f"line {number}: u is {u_text!r}; expected a number in [0, 1]",
                file=where,
                case=case,
            ) from None
        try:
            item = Assignment(case=case, regime=regime, split=split, reason=reason, u=u)
        except ConfigError as exc:
            raise InputError(f"line {number}: {exc.message}", file=where, case=case) from None
        if case in seen:
            raise InputError(
                f"line {number}: case id appears more than once", file=where, case=case
            )
        seen.add(case)
        out.append(item)
    return out


def cases_in_split(assignments: Iterable[Assignment], split: str) -> list[str]:
    """Case ids assigned to ``split``, in the order of ``assignments``.

    Parameters
    ----------
    assignments
        As returned by :func:`assign_splits` or :func:`read_assignment_tsv`.
    split
        One of :data:`SPLITS`.

    Returns
    -------
    list of str

    Raises
    ------
    ConfigError
        ``split`` is not a split name.

    Examples
    --------
    >>> items = [Assignment(case="demo-1", regime="", split="test", reason="hash", u=0.9)]
    >>> cases_in_split(items, "test"), cases_in_split(items, "train")
    (['demo-1'], [])
    """
    if split not in SPLITS:
        raise ConfigError(f"split {split!r} is not a split name; expected one of {SPLITS}")
    return [a.case for a in assignments if a.split == split]

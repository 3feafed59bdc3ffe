"""Train/validation/test splits by whole group of cases, stable under adding cases.

A parameterization must be tested on simulations it never saw, so lesprep splits by
case, never by sample: every sample of a case goes to the split of its case. Runs of one
site (another seed, season or aerosol load) are near-duplicates, so cases can be put in
a *group* and a group is never split: all its cases go to one split.

Groups and attributes
---------------------
Every case has a group id (:attr:`CaseInfo.group`); a case given no group is its own
group, whose id is the case id (so a group id equal to a case id joins that case's
group). Every case has a regime tag (``""`` = untagged) and optional *attributes*, e.g.
``surface`` or ``season`` (name to value; ``""`` is a value like any other). The rule's
``stratify`` list names the attributes to stratify by; ``"regime"`` names the regime
tag. A group *carries* every value that one of its cases has.

Rule
----
The splits are, in this fixed order, ``train``, ``validation`` and ``test``. A rule
(:class:`SplitRule`) holds target fractions, a seed and the ``stratify`` list.
``train`` and ``test`` need a fraction > 0; ``validation`` is optional (fraction 0 or
absent: no validation split). The fractions must be >= 0 and sum to 1 within 1e-9.

1. **Pins.** A case pinned to a split pins its whole group there (reason ``"pinned"``
   for every case of the group). Cases of one group pinned to different splits are an
   error naming both cases.

2. **Hash rule.** Every group gets a stable uniform number

   ``u = int.from_bytes(sha256(f"{seed}\\0{group}".encode("utf-8")).digest()[:8], "big") / 2**64``

   i.e. the first 8 bytes of the SHA-256 digest (FIPS 180-4) of the seed's text, a NUL
   byte and the group id, read as a big-endian unsigned integer and divided by 2**64 with
   Python's correctly rounded float64 division; every case records the ``u`` of its
   group. For a case that is its own group this is the hash of the case id. The seed
   enters as its text, so ``7`` and ``"7"`` are the same seed. Ids hold no NUL, so
   distinct (seed, group) pairs hash distinct strings. ``u`` lies in [0, 1]; it rounds to
   exactly 1.0 only when the integer is >= 2**64 - 2**10 (probability 2**-54). With the
   float64 bounds ``c_train = f_train`` and ``c_val = f_train + f_validation``, an
   unpinned group goes to

   * ``train`` if ``u < c_train``,
   * ``validation`` if ``c_train <= u < c_val``,
   * ``test`` otherwise, so ``test`` absorbs the <= 1e-9 slack of the fractions

   (reason ``"hash"``). ``u`` is a pure function of (seed, group id): the hash split of a
   group never depends on the other groups. ``u`` is recorded for pinned groups too.

3. **Stratification.** For each attribute of ``stratify``, in the listed order, and each
   of its values, in sorted order, the groups carrying the value form a *stratum* (the
   untagged regime is a stratum too, so a sheet without tags still gets a train and a
   test group). A stratum of >= 2 groups must hold >= 1 ``train`` and >= 1 ``test``
   group, pins included. Call a stratum *stratifiable* when it has >= 2 groups and
   ``n_unpinned >= [no group pinned to train] + [no group pinned to test]`` (counted in
   groups); only then can it be made valid. The strata are processed one after the
   other, starting from pins and hash rule; for a stratifiable stratum:

   * no ``train`` group: the unpinned group with the smallest ``u`` (nearest the train
     interval [0, c_train)) moves to ``train``;
   * no ``test`` group: the unpinned group with the largest ``u`` (nearest the test
     interval [c_val, 1]) moves to ``test``;

   ties in ``u`` are broken by the group id (order of the key ``(u, group)``), and a
   candidate is skipped when the move would take away the only train (test) group of
   this stratum or of an earlier stratifiable stratum; the next candidate in the same
   order is tried. Moved groups' cases get reason ``"stratified"`` (a group moved back
   to its hash split by a later stratum is ``"hash"`` again). A stratum that is not
   stratifiable gets no move of its own (no partial corrections) and one message; a
   stratifiable stratum for which every candidate of a missing split is skipped gets one
   message per such split. The messages come in processing order, in the second return
   value of :func:`assign_splits` (the caller logs them); a one-group stratum is always
   reported.

   *One stratification attribute whose values each group carries one of* (the default
   ``stratify: [regime]`` with groups of one regime): strata are disjoint, no candidate
   is ever skipped, and every stratifiable stratum ends with a train and a test group
   after at most one move per missing split, which is the minimum. Proof: moves in one
   stratum do not touch another; if the smallest-``u`` unpinned group were the only
   test group, every unpinned group would be test and there would be exactly one, with
   no test pin, so the stratum would not be stratifiable (mirror argument for the
   largest ``u``); when both splits are missing there are >= 2 unpinned groups, so the
   two chosen groups differ.

   *Several attributes, or groups carrying several values of one attribute:* each
   stratum is handled as above, but a move can be refused because it would empty an
   earlier stratum, and then the stratum is reported, not corrected. Only single moves
   are tried, never exchanges, so a report does not prove that no valid assignment
   exists; pinning a group settles it. Combinations of attributes (e.g. cumulus over
   land) are not stratified and not promised to reach both splits.

Stability when cases are added
------------------------------
Let ``S`` be a case set and ``S'`` the set after adding cases with new ids, each in a new
group or joining an existing group unpinned and with values that group already carries
(existing cases unchanged: same id, group, regime, attributes and pin; same rule), so
every existing group keeps its pin and its values. The result does not depend on the
input order. The statements below hold for one stratification attribute whose values
each group carries one of (e.g. the default ``[regime]``); they are the case rules with
"case" read as "group". With several attributes the strata interact through the
skipped candidates and only pins and the hash rule (rules 1 and 2) are stable.

G1. If a group's stratum is stratifiable in ``S``, its split in ``S'`` is either its
    split in ``S`` or its hash split. Hence pinned and hash-assigned groups of such
    strata never move. A stratified group leaves its corrected split X only back to its
    hash split, and only when in ``S'`` a new group of its stratum is in X (a new group
    pinned or hashed to X, so the correction is no longer needed, or a new unpinned group
    with a smaller ``u`` for X = train, larger for X = test, which takes the correction
    over). A stratifiable stratum therefore never loses its train or test group.
    Proof: the pinned and hashed groups of the stratum in ``S'`` are a superset of those
    in ``S``, so a split present in ``S`` stays present and ``S'`` needs a correction
    only where ``S`` needed one; stratifiability only improves; the minimum (maximum)
    over a superset is the old one or a new element.

G2. A hash-assigned group can move only if its stratum was *not* stratifiable in ``S``
    (a single group, or too few unpinned groups for the pins) and in ``S'`` it is
    stratifiable and pins plus hash rule leave it without train or test; then the group
    moves exactly when it is the smallest-``u`` (or largest-``u``) unpinned group. No
    rule that depends only on the case set can avoid this: if groups ``a`` and ``b`` of
    one regime both hash to train, the set ``{a, b}`` must send one of them to test, so
    one of the histories ``{a} + b`` and ``{b} + a`` moves a group that was
    hash-assigned. (A lone group hashed to validation must move as soon as a second
    group joins its regime, whatever rule is used.)

Changing the seed, the fractions, the ``stratify`` list or an existing case's group,
regime, attributes or pin is not covered: it defines a new split.
"""

from __future__ import annotations

import hashlib
import math
import os
import uuid
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from numbers import Integral, Real
from pathlib import Path
from types import MappingProxyType
from typing import Any, Literal, get_args

from lesprep.errors import ConfigError, InputError
from lesprep.layout import SPLITS  # split names, in the order of the cumulative hash intervals
from lesprep.sets.strata import REQUIRED, Stratum, stratify

_Reason = Literal["pinned", "hash", "stratified"]
_REASONS: tuple[str, ...] = get_args(_Reason)
_TSV_COLUMNS: tuple[str, ...] = ("case", "group", "regime", "split", "reason", "u")
_FRACTION_TOLERANCE = 1e-9  # largest accepted |sum(fractions) - 1|


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
            hint="case ids, group ids, regime tags and attributes must not contain tabs, "
            "newlines or NUL",
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
        one stratum).
    pinned
        A split the case (and with it its group) must go to, or None to let the rule
        decide.
    group
        Group id; ``""`` (the default) resolves to the case id: the case is its own group.
    attributes
        Attribute name to value (e.g. ``{"surface": "ocean"}``), stored read-only; the
        name ``"regime"`` is reserved for :attr:`regime`.
    """

    case: str
    regime: str = ""
    pinned: str | None = None
    group: str = ""
    attributes: Mapping[str, str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        _check_label(self.case, what="case id", case=None, allow_empty=False)
        _check_label(self.regime, what="regime tag", case=self.case, allow_empty=True)
        _check_label(self.group, what="group id", case=self.case, allow_empty=True)
        if self.pinned is not None and self.pinned not in SPLITS:
            raise ConfigError(
                f"pinned split {self.pinned!r} is not a split name; expected one of {SPLITS}",
                case=self.case,
            )
        if not isinstance(self.attributes, Mapping):
            raise ConfigError(
                f"attributes are {self.attributes!r}; expected a mapping of name to value",
                case=self.case,
            )
        for name, value in self.attributes.items():
            _check_label(name, what="attribute name", case=self.case, allow_empty=False)
            if name == "regime":
                raise ConfigError(
                    "attribute name 'regime' is reserved for the regime tag",
                    case=self.case,
                    hint="give the regime as CaseInfo.regime",
                )
            _check_label(
                value, what=f"value of attribute {name!r}", case=self.case, allow_empty=True
            )
        object.__setattr__(self, "group", self.group or self.case)
        object.__setattr__(self, "attributes", MappingProxyType(dict(self.attributes)))

    def __hash__(self) -> int:  # the read-only mapping itself is not hashable
        items = tuple(sorted(self.attributes.items()))
        return hash((self.case, self.regime, self.pinned, self.group, items))

    def value_of(self, attribute: str) -> str:
        """The case's value of a stratification attribute (``"regime"``: the regime tag).

        Raises
        ------
        ConfigError
            The case has no such attribute.
        """
        if attribute == "regime":
            return self.regime
        if attribute not in self.attributes:
            raise ConfigError(
                f"has no attribute {attribute!r}, which the split rule stratifies by; "
                f"its attributes: {sorted(self.attributes)}",
                case=self.case,
                hint="declare the attribute column in case_attributes and fill it, or "
                "remove it from splits.stratify",
            )
        return self.attributes[attribute]


def _check_stratify(stratify: Any) -> tuple[str, ...]:
    """Validate the list of stratification attributes and return it as a tuple."""
    if isinstance(stratify, str) or not isinstance(stratify, Sequence):
        raise ConfigError(
            f"stratify is {stratify!r}; expected a list of attribute names such as "
            "['regime', 'surface']"
        )
    out = tuple(stratify)
    for name in out:
        if not isinstance(name, str) or not name or _bad_char(name) is not None:
            raise ConfigError(
                f"stratify entry {name!r} is not an attribute name; expected a non-empty "
                "string such as 'regime'"
            )
    repeated = sorted({name for name in out if out.count(name) > 1})
    if repeated:
        raise ConfigError(f"stratify lists {repeated} more than once; expected each name once")
    return out


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
    for name in REQUIRED:
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
    stratify
        Attributes to stratify by, in processing order; ``"regime"`` is the regime tag.
        Stored as a tuple.

    Raises
    ------
    ConfigError
        Unknown split names, negative or non-finite fractions, fractions not summing to
        1 within 1e-9, a zero or missing train/test fraction, a seed of another type, or
        a stratify entry that is not a name or is repeated.
    """

    fractions: Mapping[str, float]
    seed: int | str = 0
    stratify: Sequence[str] = ("regime",)

    def __post_init__(self) -> None:
        clean = _check_fractions(self.fractions)
        object.__setattr__(self, "fractions", MappingProxyType(clean))
        seed = self.seed
        if isinstance(seed, bool) or not isinstance(seed, (Integral, str)):
            raise ConfigError(f"split seed is {seed!r}; expected an integer or a string")
        if isinstance(seed, Integral):
            object.__setattr__(self, "seed", int(seed))
        object.__setattr__(self, "stratify", _check_stratify(self.stratify))

    def __hash__(self) -> int:  # the read-only mapping itself is not hashable
        return hash((tuple(self.fractions.items()), self.seed, self.stratify))

    def to_dict(self) -> dict[str, Any]:
        """Plain-dict form for config files and provenance.

        Returns
        -------
        dict
            ``{"fractions": {...}, "seed": seed, "stratify": [...]}``.

        Examples
        --------
        >>> SplitRule(fractions={"train": 0.8, "test": 0.2}, seed=3).to_dict()
        {'fractions': {'train': 0.8, 'test': 0.2}, 'seed': 3, 'stratify': ['regime']}
        """
        return {
            "fractions": dict(self.fractions),
            "seed": self.seed,
            "stratify": list(self.stratify),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SplitRule:
        """Inverse of :meth:`to_dict` (the config's ``splits`` section has the same form).

        Parameters
        ----------
        d
            Mapping with keys ``fractions``, ``seed`` and ``stratify``.

        Returns
        -------
        SplitRule

        Raises
        ------
        ConfigError
            Missing ``fractions``, ``seed`` or ``stratify``, unknown keys, or invalid
            values.

        Examples
        --------
        >>> d = {"fractions": {"train": 0.5, "test": 0.5}, "seed": 4, "stratify": ["regime"]}
        >>> SplitRule.from_dict(d).seed
        4
        """
        if not isinstance(d, Mapping):
            raise ConfigError(f"split rule is {d!r}; expected a mapping with key 'fractions'")
        unknown = sorted(set(d) - {"fractions", "seed", "stratify"}, key=str)
        if unknown:
            raise ConfigError(
                f"unknown key(s) {unknown} in the split rule; expected 'fractions', 'seed' "
                "and 'stratify'"
            )
        if "fractions" not in d:
            raise ConfigError("split rule has no 'fractions'; expected e.g. {'train': 0.8, ...}")
        if "seed" not in d:
            raise ConfigError("split rule has no 'seed'; expected an integer or a string")
        if "stratify" not in d:
            raise ConfigError("split rule has no 'stratify'; expected a list such as ['regime']")
        return cls(fractions=d["fractions"], seed=d["seed"], stratify=d["stratify"])


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
        ``"pinned"`` (its group kept its pin), ``"hash"`` (plain hash rule) or
        ``"stratified"`` (its group moved to make a stratum hold a train and a test group).
    u
        The stable uniform number of the case's group (see the module docstring).
    group
        Group id; ``""`` (the default) resolves to the case id.
    """

    case: str
    regime: str
    split: str
    reason: _Reason
    u: float
    group: str = ""

    def __post_init__(self) -> None:
        _check_label(self.case, what="case id", case=None, allow_empty=False)
        _check_label(self.regime, what="regime tag", case=self.case, allow_empty=True)
        _check_label(self.group, what="group id", case=self.case, allow_empty=True)
        object.__setattr__(self, "group", self.group or self.case)
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
            "group": self.group,
            "regime": self.regime,
            "split": self.split,
            "reason": self.reason,
            "u": self.u,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Assignment:
        """Inverse of :meth:`to_dict`."""
        return cls(
            case=d["case"],
            group=d["group"],
            regime=d["regime"],
            split=d["split"],
            reason=d["reason"],
            u=d["u"],
        )


def _stable_u(seed: int | str, group: str) -> float:
    """The documented uniform number of (seed, group): sha256 prefix / 2**64."""
    digest = hashlib.sha256(f"{seed}\0{group}".encode()).digest()
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


def _check_cases(cases: Sequence[CaseInfo], rule: SplitRule) -> dict[str, str]:
    """Check ids, pins and attributes; return the pinned split of every pinned group."""
    seen: set[str] = set()
    configured = _configured(rule)
    pins: dict[str, CaseInfo] = {}
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
        for attribute in rule.stratify:
            info.value_of(attribute)
        if info.pinned is None:
            continue
        if info.pinned not in configured:
            raise ConfigError(
                f"pinned to split {info.pinned!r}, which the split rule does not configure "
                f"(configured: {configured})",
                case=info.case,
                hint=f"give {info.pinned!r} a fraction > 0 or change the pin",
            )
        other = pins.setdefault(info.group, info)
        if other.pinned != info.pinned:
            raise ConfigError(
                f"pinned to {info.pinned!r}, but case {other.case!r} of the same group "
                f"{info.group!r} is pinned to {other.pinned!r}; a group goes to one split",
                case=info.case,
                hint="pin the cases of one group to the same split, or pin only one of them",
            )
    return {group: info.pinned for group, info in pins.items() if info.pinned is not None}


def assign_splits(cases: Sequence[CaseInfo], rule: SplitRule) -> tuple[list[Assignment], list[str]]:
    """Assign every case to a split (pins, hash rule and stratification, by whole group).

    Parameters
    ----------
    cases
        The cases; ids must be unique. Their order does not affect the result.
    rule
        Target fractions, seed and the attributes to stratify by.

    Returns
    -------
    assignments : list of Assignment
        One per case, in input order.
    messages : list of str
        One line per stratum (value of a ``stratify`` attribute) that cannot be
        stratified (fewer than 2 groups, too few unpinned groups for its pins, or every
        move blocked), in the order the rule processes them; for the caller to log.

    Raises
    ------
    ConfigError
        Duplicate case ids, a case pinned to a split the rule does not configure, two
        cases of one group pinned to different splits, or a case without an attribute
        the rule stratifies by.

    Examples
    --------
    >>> rule = SplitRule(fractions={"train": 0.7, "validation": 0.1, "test": 0.2}, seed=0)
    >>> cases = [CaseInfo(case=f"demo-{i}", regime="calm") for i in range(3)]
    >>> cases.append(CaseInfo(case="demo-pinned", regime="windy", pinned="test"))
    >>> assignments, messages = assign_splits(cases, rule)
    >>> [(a.split, a.reason) for a in assignments]  # all of 'calm' hashed to train
    [('test', 'stratified'), ('train', 'hash'), ('train', 'hash'), ('test', 'pinned')]
    >>> messages  # doctest: +ELLIPSIS
    ["regime 'windy' has only 1 group ('demo-pinned', test by pinned); ..."]
    """
    pinned = _check_cases(cases, rule)
    bounds = _bounds(rule)
    groups = sorted({info.group for info in cases})
    u = {group: _stable_u(rule.seed, group) for group in groups}
    base = {g: pinned[g] if g in pinned else _hash_split(u[g], bounds) for g in groups}
    strata: list[Stratum] = []
    for attribute in rule.stratify:
        carriers: dict[str, set[str]] = {}
        for info in cases:
            carriers.setdefault(info.value_of(attribute), set()).add(info.group)
        strata.extend(
            Stratum(attribute=attribute, value=value, groups=tuple(sorted(carriers[value])))
            for value in sorted(carriers)
        )
    final, messages = stratify(strata, u, base, pinned)
    assignments = []
    for info in cases:
        group = info.group
        if group in pinned:
            reason: _Reason = "pinned"
        else:
            reason = "hash" if final[group] == base[group] else "stratified"
        assignments.append(
            Assignment(
                case=info.case,
                group=group,
                regime=info.regime,
                split=final[group],
                reason=reason,
                u=u[group],
            )
        )
    return assignments, messages


def _row(a: Assignment) -> str:
    return "\t".join((a.case, a.group, a.regime, a.split, a.reason, repr(a.u))) + "\n"


def write_assignment_tsv(assignments: Iterable[Assignment], path: str | os.PathLike[str]) -> None:
    """Write assignments as a tab-separated table, atomically.

    The table is UTF-8 with ``\\n`` line ends, a header line ``case group regime split
    reason u`` and one row per assignment in the given order; ``u`` is written with Python's
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
    ['case\\tgroup\\tregime\\tsplit\\treason\\tu', 'demo-1\\tdemo-1\\t\\ttest\\thash\\t0.9']
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
        Wrong header, a row without exactly 6 fields, an unknown split or reason, a
        ``u`` outside [0, 1], a repeated case id, or cases of one group with different
        splits or ``u``; the message names the line.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     target = pathlib.Path(tmp) / "splits.tsv"
    ...     _ = target.write_text(
    ...         "case\\tgroup\\tregime\\tsplit\\treason\\tu\\n"
    ...         "demo-1\\tsite-a\\tcalm\\ttrain\\thash\\t0.25\\n"
    ...     )
    ...     read_assignment_tsv(target)
    [Assignment(case='demo-1', regime='calm', split='train', reason='hash', u=0.25, group='site-a')]
    """
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
    first_of: dict[str, tuple[int, Assignment]] = {}
    for number, line in enumerate(lines[1:], start=2):
        fields = line.split("\t")
        if len(fields) != len(_TSV_COLUMNS):
            raise InputError(
                f"line {number} has {len(fields)} tab-separated fields; expected "
                f"{len(_TSV_COLUMNS)} ({', '.join(_TSV_COLUMNS)})",
                file=where,
            )
        case, group, regime, split, reason, u_text = fields
        try:
            u = float(u_text)
        except ValueError:
            raise InputError(
                f"line {number}: u is {u_text!r}; expected a number in [0, 1]",
                file=where,
                case=case,
            ) from None
        try:
            item = Assignment(
                case=case, group=group, regime=regime, split=split, reason=reason, u=u
            )
        except ConfigError as exc:
            raise InputError(f"line {number}: {exc.message}", file=where, case=case) from None
        if case in seen:
            raise InputError(
                f"line {number}: case id appears more than once", file=where, case=case
            )
        seen.add(case)
        line_one, one = first_of.setdefault(item.group, (number, item))
        if (one.split, one.u) != (item.split, item.u):
            raise InputError(
                f"line {number}: case {case!r} of group {item.group!r} has split "
                f"{item.split!r} and u {item.u!r}, but case {one.case!r} of the same group "
                f"(line {line_one}) has {one.split!r} and {one.u!r}; a group has one split "
                "and one u",
                file=where,
                case=case,
                hint="write the table with lesprep's split step; do not edit single rows",
            )
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

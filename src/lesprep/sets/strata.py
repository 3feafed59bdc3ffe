"""Stratification of a split assignment over groups of cases (the moves of rule 3).

This module holds the correction step only; the rule it implements, its guarantees and
their proofs are written in the docstring of :mod:`lesprep.sets.splits`, which calls
:func:`stratify`. It works on plain data: group ids, their ``u``, their splits after pins
and hash rule, and one *stratum* (the set of groups carrying one value of one listed
attribute) per requirement.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from lesprep.layout import SPLITS

REQUIRED = ("train", "test")
"""Splits every stratifiable stratum must hold."""


@dataclass(frozen=True, kw_only=True)
class Stratum:
    """The groups that carry one value of one attribute.

    Attributes
    ----------
    attribute
        Attribute name (``"regime"`` or a case-sheet attribute column).
    value
        The value; ``""`` is a value like any other (e.g. untagged regime).
    groups
        Group ids carrying the value, sorted.
    """

    attribute: str
    value: str
    groups: tuple[str, ...]

    @property
    def label(self) -> str:
        """How messages name the stratum, e.g. ``regime 'cumulus'``."""
        untagged = " (untagged)" if self.value == "" else ""
        return f"{self.attribute} {self.value!r}{untagged}"


def _counts(groups: Sequence[str], split: Mapping[str, str]) -> str:
    return ", ".join(f"{name}: {sum(split[g] == name for g in groups)}" for name in SPLITS)


def stratifiable(stratum: Stratum, pinned: Mapping[str, str]) -> bool:
    """Whether pins leave enough unpinned groups to give the stratum a train and a test group.

    Parameters
    ----------
    stratum
        The stratum.
    pinned
        Group id to pinned split, for pinned groups only.

    Returns
    -------
    bool
        ``len(groups) >= 2`` and ``n_unpinned >= [no group pinned to train] + [no group
        pinned to test]``.
    """
    if len(stratum.groups) < 2:
        return False
    pins = {pinned[g] for g in stratum.groups if g in pinned}
    free = sum(g not in pinned for g in stratum.groups)
    return free >= sum(name not in pins for name in REQUIRED)


def _blocker(
    group: str,
    current: str,
    split: Mapping[str, str],
    protected: Sequence[tuple[Stratum, str]],
) -> Stratum | None:
    """A protected stratum that would lose its only ``current`` group if ``group`` moved."""
    for stratum, name in protected:
        if name != current or group not in stratum.groups:
            continue
        if sum(split[g] == name for g in stratum.groups) == 1:
            return stratum
    return None


def stratify(
    strata: Sequence[Stratum],
    u: Mapping[str, float],
    base: Mapping[str, str],
    pinned: Mapping[str, str],
) -> tuple[dict[str, str], list[str]]:
    """Move whole groups so that every stratifiable stratum holds a train and a test group.

    Parameters
    ----------
    strata
        In processing order (listed attributes in order, values sorted within each).
    u
        Each group's stable uniform number.
    base
        Each group's split after pins and hash rule.
    pinned
        Group id to pinned split, for pinned groups only (they never move).

    Returns
    -------
    splits : dict
        Group id to final split.
    messages : list of str
        One line per stratum that is not stratifiable or could not be completed, in
        processing order.
    """
    split = dict(base)
    protected: list[tuple[Stratum, str]] = []
    messages: list[str] = []
    for stratum in strata:
        groups = stratum.groups
        if len(groups) < 2:
            (only,) = groups
            how = (
                "pinned"
                if only in pinned
                else "hash"
                if split[only] == base[only]
                else "stratified"
            )
            messages.append(
                f"{stratum.label} has only 1 group ({only!r}, {split[only]} by {how}); it "
                "needs at least 2 groups to hold both a train and a test group"
            )
            continue
        if not stratifiable(stratum, pinned):
            pins = {pinned[g] for g in groups if g in pinned}
            missing = [name for name in REQUIRED if name not in pins]
            free = sum(g not in pinned for g in groups)
            messages.append(
                f"{stratum.label} has {len(groups)} groups but cannot hold both a train and "
                f"a test group: {free} unpinned, none pinned to {' or '.join(missing)}; left "
                f"as it is ({_counts(groups, split)}) -- pin a group of this "
                f"{stratum.attribute} to the missing split or add groups"
            )
            continue
        own = [(stratum, name) for name in REQUIRED if any(split[g] == name for g in groups)]
        free = sorted((g for g in groups if g not in pinned), key=lambda g: (u[g], g))
        for need, order in (("train", free), ("test", free[::-1])):
            if any(split[g] == need for g in groups):
                continue
            blocked: list[str] = []
            for group in order:
                blocker = _blocker(group, split[group], split, [*protected, *own])
                if blocker is None:
                    split[group] = need
                    own.append((stratum, need))
                    break
                blocked.append(f"{group!r} (the only {split[group]} group of {blocker.label})")
            else:
                messages.append(
                    f"{stratum.label} has no {need} group and no unpinned group of it can "
                    f"move there without emptying another requirement: {', '.join(blocked)}; "
                    f"left with {_counts(groups, split)} -- pin a group of this "
                    f"{stratum.attribute} to {need}"
                )
        protected.extend(own)
    return split, messages

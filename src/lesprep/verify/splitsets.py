"""Check ``splits``: the sets hold disjoint cases and agree with ``splits.tsv``."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import zarr

from lesprep.errors import InputError
from lesprep.layout import ResultsLayout
from lesprep.sets.assemble import label_values
from lesprep.sets.splits import SPLITS, read_assignment_tsv
from lesprep.verify.findings import ResultsTree, own_step

# --- splits ----------------------------------------------------------------------------


def _set_cases(tree: ResultsTree, path: Path) -> tuple[list[str], set[str], np.ndarray | None]:
    """(``cases`` attribute, case names of the samples, per-sample case names)."""
    attrs = tree.attrs[path]
    listed = [str(c) for c in attrs.get("cases", []) or []]
    root = zarr.open_group(str(path), mode="r")
    if "case" not in root:
        return listed, set(), None
    names = label_values(root["case"])
    return listed, {str(c) for c in np.unique(names)}, names


def read_splits(tree: ResultsTree) -> dict[str, str] | None:
    """Case -> split of ``splits.tsv`` (None, with a finding, when missing or unreadable)."""
    tsv = ResultsLayout(tree.root).splits_tsv()
    tree.checked["splits"] += 1
    if not tsv.is_file():
        tree.add("splits", "splits.tsv", "missing")
        return None
    try:
        return {a.case: a.split for a in read_assignment_tsv(tsv)}
    except (InputError, OSError) as exc:
        tree.add("splits", "splits.tsv", f"unreadable: {exc}")
        return None


def check_splits(tree: ResultsTree, assigned: dict[str, str] | None) -> None:
    members: dict[str, dict[str, set[Path]]] = {}  # split -> case -> set stores holding it
    for (split, _), path in sorted(tree.sets.items()):
        if not tree.opened(path):
            continue
        tree.checked["splits"] += 1
        attrs = tree.attrs[path]
        if attrs.get("split") != split:
            tree.add("splits", path, f"attr split is {attrs.get('split')!r}, expected {split!r}")
        try:
            listed, sampled, _ = _set_cases(tree, path)
        except Exception as exc:  # unreadable case coordinate
            tree.add("splits", path, f"cannot read the per-sample case: {exc}")
            continue
        extra = sorted(sampled - set(listed))
        if extra:
            tree.add("splits", path, f"samples of cases {extra} not in attr cases {listed}")
        for c in set(listed) | sampled:
            members.setdefault(split, {}).setdefault(c, set()).add(path)
        if assigned is not None:
            _agree_with_tsv(tree, path, split, listed, sampled, assigned)
    names = sorted(members, key=SPLITS.index if set(members) <= set(SPLITS) else str)
    for i, a in enumerate(names):
        for b in names[i + 1 :]:
            for c in sorted(set(members[a]) & set(members[b])):
                where = ", ".join(tree.rel(p) for p in sorted(members[a][c] | members[b][c]))
                tree.add("splits", f"sets/{a}", f"case {c} is in both {a} and {b} ({where})")
    if assigned is not None:
        for split in sorted(set(assigned.values())):
            if not any(s == split for s, _ in tree.sets):
                n = sum(v == split for v in assigned.values())
                tree.add("splits", "splits.tsv", f"{n} case(s) in {split} but no sets/{split}")
        for case in sorted(assigned):
            if case not in tree.canonical:
                tree.add("open", f"cases/{case}", "case of splits.tsv has no canonical store")


def _agree_with_tsv(
    tree: ResultsTree,
    path: Path,
    split: str,
    listed: Sequence[str],
    sampled: set[str],
    assigned: Mapping[str, str],
) -> None:
    for c in sorted(set(listed) | sampled):
        if assigned.get(c) != split:
            got = assigned.get(c, "no split (not in the table)")
            tree.add("splits", path, f"holds case {c}, which splits.tsv assigns to {got}")
    step = own_step(tree.prov.get(path, {}), "assemble") or {}
    skipped = set((step.get("skipped_cases") or {}).keys())
    want = sorted(c for c, s in assigned.items() if s == split and c not in skipped)
    missing = sorted(set(want) - set(listed))
    if missing:
        tree.add("splits", path, f"lacks cases {missing} that splits.tsv assigns to {split}")
    for a in step.get("assignment", []) or []:
        if a.get("case") in assigned and a.get("split") != assigned[a["case"]]:
            tree.add(
                "splits",
                path,
                f"was assembled with {a['case']} in {a.get('split')}, splits.tsv says "
                f"{assigned[a['case']]}",
            )

"""Check ``normalization``: the train statistics, as stored and as recomputed."""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from lesprep.layout import ResultsLayout, normalization_label
from lesprep.sets.assemble import normalization_stats
from lesprep.verify.findings import ResultsTree, listing, own_step

STAT_RTOL = 1e-9


# --- normalization ---------------------------------------------------------------------


def _same(a: Any, b: Any) -> bool:
    """Equality of JSON-like values with NaN equal to NaN."""
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    return bool(a == b)


def json_differences(a: Any, b: Any, prefix: str = "") -> list[str]:
    """Dotted paths where two JSON-like values differ (NaN equals NaN).

    Parameters
    ----------
    a, b
        Values parsed from JSON.
    prefix
        Path of ``a`` and ``b`` in the enclosing document.

    Returns
    -------
    list of str

    Examples
    --------
    >>> json_differences({"s": {"m": 1.0, "n": 2}}, {"s": {"m": 1.5, "n": 2}})
    ['s.m: 1.0 vs 1.5']
    """
    if isinstance(a, dict) and isinstance(b, dict):
        out = []
        for k in sorted(set(a) | set(b), key=str):
            p = f"{prefix}.{k}" if prefix else str(k)
            if k not in a or k not in b:
                out.append(f"{p}: only in {'the second' if k not in a else 'the first'}")
            else:
                out.extend(json_differences(a[k], b[k], p))
        return out
    return [] if _same(a, b) else [f"{prefix or '.'}: {a!r} vs {b!r}"]


def stats_differences(
    recorded: Mapping[str, Mapping[str, Any]],
    recomputed: Mapping[str, Mapping[str, Any]],
    *,
    rtol: float = STAT_RTOL,
) -> list[str]:
    """Where recorded normalization statistics disagree with recomputed ones.

    Means and standard deviations agree within relative tolerance ``rtol`` (no absolute
    tolerance; NaN equals NaN), counts exactly, and both name the same features.

    Parameters
    ----------
    recorded, recomputed
        Feature -> ``{"mean", "std", "count"}``.
    rtol
        Relative tolerance of means and standard deviations.

    Returns
    -------
    list of str

    Examples
    --------
    >>> stats_differences({"a": {"mean": 1.0, "std": 2.0, "count": 3}},
    ...                   {"a": {"mean": 1.0 + 1e-12, "std": 2.0, "count": 3}})
    []
    >>> stats_differences({"a": {"mean": 1.0, "std": 2.0, "count": 3}},
    ...                   {"a": {"mean": 1.1, "std": 2.0, "count": 3}})
    ['a.mean: recorded 1.0, recomputed 1.1']
    """
    out = [
        f"{k}: recorded but not a feature of the store"
        for k in sorted(set(recorded) - set(recomputed))
    ]
    out += [
        f"{k}: feature without recorded statistics" for k in sorted(set(recomputed) - set(recorded))
    ]
    for k in sorted(set(recorded) & set(recomputed)):
        r, c = recorded[k], recomputed[k]
        for stat in ("mean", "std"):
            a, b = float(r.get(stat, math.nan)), float(c[stat])
            if not (math.isnan(a) and math.isnan(b)) and not math.isclose(a, b, rel_tol=rtol):
                out.append(f"{k}.{stat}: recorded {a!r}, recomputed {b!r}")
        if r.get("count") != c["count"]:
            out.append(f"{k}.count: recorded {r.get('count')!r}, recomputed {c['count']!r}")
    return out


def check_normalization(tree: ResultsTree, assigned: dict[str, str] | None) -> None:
    labels = {lab for s, lab in tree.sets if s == "train"}
    json_files = {
        lab: p
        for p in ResultsLayout(tree.root).sets_dir().glob("normalization-*.json")
        if (lab := normalization_label(p)) is not None
    }
    for label in sorted(set(json_files) - labels):
        tree.add("normalization", json_files[label], "no train store of this scale")
    for label in sorted(labels):
        tree.checked["normalization"] += 1
        store = tree.sets[("train", label)]
        if not tree.opened(store):
            continue
        try:
            _normalization_of(tree, store, label, json_files.get(label), assigned)
        except Exception as exc:  # unreadable store data
            tree.add("normalization", store, f"cannot recompute the statistics: {exc}")


def _parse_doc(
    tree: ResultsTree, where: Path, text: str | None, what: str
) -> dict[str, Any] | None:
    if not text:
        tree.add("normalization", where, f"{what} is missing")
        return None
    try:
        doc = json.loads(text)
    except ValueError as exc:
        tree.add("normalization", where, f"{what} is not JSON: {exc}")
        return None
    if not isinstance(doc, dict) or not isinstance(doc.get("statistics"), dict):
        tree.add("normalization", where, f"{what} has no 'statistics' mapping")
        return None
    return doc


def _normalization_of(
    tree: ResultsTree,
    store: Path,
    label: str,
    json_path: Path | None,
    assigned: dict[str, str] | None,
) -> None:
    attrs = tree.attrs[store]
    in_attr = _parse_doc(tree, store, attrs.get("normalization"), "attr normalization")
    in_file = None
    where = json_path or tree.root / "sets" / f"normalization-{label}.json"
    if json_path is None:
        tree.add("normalization", where, "missing")
    else:
        in_file = _parse_doc(tree, where, json_path.read_text(), f"{where.name}")
    if in_attr is not None and in_file is not None and not _same(in_attr, in_file):
        diffs = json_differences(in_attr, in_file)
        tree.add("normalization", where, f"differs from the train store's attr: {listing(diffs)}")
    train_cases = sorted(str(c) for c in attrs.get("cases", []) or [])
    recomputed = normalization_stats(store)
    for name, doc, place in (("attr", in_attr, store), ("file", in_file, where)):
        if doc is None:
            continue
        if doc.get("split") != "train" or doc.get("scale") != label:
            tree.add(
                "normalization",
                place,
                f"{name} names split {doc.get('split')!r} scale {doc.get('scale')!r}, "
                f"expected 'train' {label!r}",
            )
        cases = sorted(str(c) for c in doc.get("cases") or [])
        if cases != train_cases:
            tree.add("normalization", place, f"{name} cases {cases} != train cases {train_cases}")
        if assigned is not None:
            step = own_step(tree.prov.get(store, {}), "assemble") or {}
            skipped = set((step.get("skipped_cases") or {}).keys())
            tsv = sorted(c for c, s in assigned.items() if s == "train" and c not in skipped)
            if cases != tsv:
                tree.add("normalization", place, f"{name} cases {cases} != splits.tsv train {tsv}")
        diffs = stats_differences(doc["statistics"], recomputed)
        if diffs:
            tree.add(
                "normalization",
                place,
                f"{name} statistics do not match the train store: {listing(diffs)}",
            )

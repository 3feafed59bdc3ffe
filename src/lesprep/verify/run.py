"""Verify a results tree: stores, lineage, raw-file drift, splits, normalization, values.

:func:`verify_results` reads a finished ``results/`` folder and reports every failure it
finds as a :class:`Finding` (it never stops at the first one). The checks, by name:

``open``
    every store (``cases/*/canonical.zarr``, ``cases/*/scale-*.zarr``,
    ``sets/*/scale-*.zarr``) opens with :func:`lesprep.store.open_store`, and every case
    of ``splits.tsv`` has a canonical store.
``provenance``
    every store has a parsable ``lesprep_provenance`` root attribute with the step that
    made it (``ingest`` of its case, ``coarsen`` to its scale, ``assemble`` of its split
    and scale).
``raw_files``
    every raw file recorded by an ``ingest`` step still exists with the recorded size and
    sha256 (FIPS 180-4). Drift is reported as ``changed:`` or ``missing:``. Relative raw
    paths are resolved against the workflow's working directory: the folder that holds
    ``results`` as the recorded config's ``results`` key names it (the parent of the
    results folder for the default ``results: results``), unless ``workdir`` is given.
``splits``
    the train, validation and test sets hold disjoint cases (from each set store's
    ``cases`` attribute and its per-sample ``case`` coordinate), and agree with
    ``splits.tsv``: a set's cases are exactly the tsv's cases of its split, less the cases
    its ``assemble`` step recorded as skipped.
``normalization``
    per scale, the train store's ``normalization`` attribute and
    ``sets/normalization-<L>.json`` are identical, name split ``train`` and the scale,
    their ``cases`` equal the train store's cases, and recomputing the statistics with
    :func:`lesprep.sets.assemble.normalization_stats` on the train store gives the same means and
    standard deviations (relative tolerance 1e-9) and counts (exactly).
``nan``
    no NaN or infinity where the conventions forbid one: the canonical ``qc, qv, T, w,
    rh, lwp, p`` (ingest refuses non-finite raw fields); in per-case scale stores and set
    stores every ``*_mean``, ``*_var``, ``*_skew`` and ``cloud_fraction`` (skewness is 0,
    not NaN, where the block variance is 0).
``consistency``
    a per-case scale store has its canonical store's times and heights and ``n // f``
    cells across; a set store's sample count equals the per-case cells that pass the
    filters its ``assemble`` step recorded (``z_range_m``, ``time_stride``), in total and
    per case; its features exist in the per-case stores with matching shapes; and for a
    seeded random sample of ``sample_checks`` samples per set store, the sample's
    ``(case, time, z, y, x)`` is a cell of that case's store and every feature equals the
    per-case value cast to the set's dtype (exactly; NaN equals NaN).

``VerifyReport.checked`` counts what was examined per check: stores (``open``,
``provenance``), distinct raw files (``raw_files``), set stores plus ``splits.tsv``
(``splits``), train scales (``normalization``), arrays scanned (``nan``), store pairs
compared (``consistency``) and, under ``samples``, set samples compared value by value.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from lesprep import provenance
from lesprep.errors import InputError
from lesprep.sets.assemble import COORDS, normalization_stats
from lesprep.sets.splits import SPLITS, read_assignment_tsv
from lesprep.store import open_store

CHECKS: tuple[str, ...] = (
    "open",
    "provenance",
    "raw_files",
    "splits",
    "normalization",
    "nan",
    "consistency",
)
"""Check names, in the order they run and are summarised."""

UNITS: dict[str, str] = {
    "open": "stores",
    "provenance": "stores",
    "raw_files": "raw files",
    "splits": "set stores and splits.tsv",
    "normalization": "train scales",
    "nan": "arrays",
    "consistency": "store pairs",
    "samples": "set samples compared",
}
CANONICAL_FINITE: tuple[str, ...] = ("qc", "qv", "T", "w", "rh", "lwp", "p")
STAT_RTOL = 1e-9
_BLOCK_BYTES = 64 * 2**20  # read at most this much per array access when scanning
_MAX_LISTED = 5


@dataclass(frozen=True)
class Finding:
    """One failure: which check, which store or file (relative to results), what."""

    check: str
    store: str
    message: str

    def __str__(self) -> str:
        return f"[{self.check}] {self.store}: {self.message}"


@dataclass
class VerifyReport:
    """Every finding of a verification and how much each check examined."""

    findings: list[Finding] = field(default_factory=list)
    checked: dict[str, int] = field(default_factory=dict)
    results: str = ""

    @property
    def ok(self) -> bool:
        """True when no check failed."""
        return not self.findings

    def by_check(self, check: str) -> list[Finding]:
        """The findings of one check.

        Parameters
        ----------
        check
            One of :data:`CHECKS`.

        Returns
        -------
        list of Finding

        Examples
        --------
        >>> r = VerifyReport(findings=[Finding("nan", "cases/a/canonical.zarr", "qc: 1 NaN")])
        >>> [f.store for f in r.by_check("nan")], r.by_check("open")
        (['cases/a/canonical.zarr'], [])
        """
        return [f for f in self.findings if f.check == check]

    def summary(self) -> str:
        """A readable report: a status line, one line per finding, counts per check.

        Returns
        -------
        str

        Examples
        --------
        >>> print(VerifyReport(checked={"open": 2}, results="results").summary())
        verify results: OK, 0 findings
        checks:
          open: 2 stores checked, 0 failed
        """
        status = "OK" if self.ok else "FAILED"
        n = len(self.findings)
        lines = [f"verify {self.results}: {status}, {n} finding{'' if n == 1 else 's'}"]
        lines.extend(str(f) for f in self.findings)
        failed = Counter(f.check for f in self.findings)
        lines.append("checks:")
        for check in (*CHECKS, *sorted(set(self.checked) - set(CHECKS) - {"samples"})):
            if check not in self.checked and not failed[check]:
                continue
            n = self.checked.get(check, 0)
            lines.append(
                f"  {check}: {n} {UNITS.get(check, 'items')} checked, {failed[check]} failed"
            )
            if check == "consistency" and "samples" in self.checked:
                lines.append(f"    {self.checked['samples']} {UNITS['samples']}")
        return "\n".join(lines)


@dataclass
class _Tree:
    """The stores of a results folder and what verification has learnt about them."""

    root: Path
    canonical: dict[str, Path]
    scale: dict[tuple[str, str], Path]
    sets: dict[tuple[str, str], Path]
    attrs: dict[Path, dict[str, Any]] = field(default_factory=dict)
    prov: dict[Path, dict[str, Any]] = field(default_factory=dict)
    findings: list[Finding] = field(default_factory=list)
    checked: Counter[str] = field(default_factory=Counter)

    def rel(self, path: Path) -> str:
        try:
            return path.relative_to(self.root).as_posix()
        except ValueError:
            return str(path)

    def add(self, check: str, where: Path | str, message: str) -> None:
        store = self.rel(where) if isinstance(where, Path) else where
        self.findings.append(Finding(check, store, message))

    def opened(self, path: Path) -> bool:
        return path in self.attrs


def _label(store: Path) -> str:
    """Scale label of ``scale-<L>.zarr``."""
    return store.name[len("scale-") : -len(".zarr")]


def discover(
    results: Path,
) -> tuple[dict[str, Path], dict[tuple[str, str], Path], dict[tuple[str, str], Path]]:
    """The stores of a results folder (hidden temporaries of killed jobs excluded).

    Parameters
    ----------
    results
        The results folder.

    Returns
    -------
    canonical : dict
        Case id -> canonical store.
    scale : dict
        (case id, scale label) -> per-case scale store.
    sets : dict
        (split, scale label) -> set store.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     r = pathlib.Path(tmp)
    ...     (r / "cases/demo-a/scale-600m.zarr").mkdir(parents=True)
    ...     (r / "sets/train/.scale-600m.zarr.tmp-1").mkdir(parents=True)
    ...     [sorted(found) for found in discover(r)]
    [[], [('demo-a', '600m')], []]
    """

    def visible(pattern: str) -> list[Path]:
        return sorted(p for p in results.glob(pattern) if not p.name.startswith("."))

    canonical = {p.parent.name: p for p in visible("cases/*/canonical.zarr")}
    scale = {(p.parent.name, _label(p)): p for p in visible("cases/*/scale-*.zarr")}
    sets = {(p.parent.name, _label(p)): p for p in visible("sets/*/scale-*.zarr")}
    return canonical, scale, sets


# --- open and provenance ---------------------------------------------------------------


def _check_open(tree: _Tree) -> None:
    for path in [*tree.canonical.values(), *tree.scale.values(), *tree.sets.values()]:
        tree.checked["open"] += 1
        try:
            ds = open_store(path)
        except Exception as exc:  # any failure to open is the finding itself
            tree.add("open", path, f"does not open: {type(exc).__name__}: {exc}")
            continue
        tree.attrs[path] = dict(ds.attrs)
        ds.close()
    if not (tree.canonical or tree.scale or tree.sets):
        tree.add("open", tree.root, "no store found (cases/*/*.zarr, sets/*/scale-*.zarr)")


def _expected_step(tree: _Tree, path: Path) -> dict[str, str]:
    """Fields the step that made ``path`` must carry."""
    for case, p in tree.canonical.items():
        if p == path:
            return {"step": "ingest", "case": case}
    for (case, label), p in tree.scale.items():
        if p == path:
            return {"step": "coarsen", "case": case, "scale": label}
    for (split, label), p in tree.sets.items():
        if p == path:
            return {"step": "assemble", "split": split, "scale": label}
    raise KeyError(path)


def walk_steps(prov: Mapping[str, Any]) -> Iterator[dict[str, Any]]:
    """Every step of a provenance record, upstream inputs first.

    Parameters
    ----------
    prov
        A record as :func:`lesprep.provenance.load` returns it.

    Returns
    -------
    iterator of dict

    Examples
    --------
    >>> rec = {"inputs": [{"steps": [{"step": "ingest"}]}], "steps": [{"step": "assemble"}]}
    >>> [s["step"] for s in walk_steps(rec)]
    ['ingest', 'assemble']
    """
    for inp in prov.get("inputs", []) or []:
        yield from walk_steps(inp)
    yield from prov.get("steps", []) or []


def _own_step(prov: Mapping[str, Any], step: str) -> dict[str, Any] | None:
    """The last step of kind ``step`` in a record's own steps (not its inputs)."""
    own = [s for s in prov.get("steps", []) or [] if s.get("step") == step]
    return own[-1] if own else None


def _check_provenance(tree: _Tree) -> None:
    for path, attrs in tree.attrs.items():
        tree.checked["provenance"] += 1
        text = attrs.get(provenance.ATTR)
        if not text:
            tree.add("provenance", path, f"no root attribute {provenance.ATTR!r}")
            continue
        try:
            prov = json.loads(text)
        except (TypeError, ValueError) as exc:
            tree.add("provenance", path, f"{provenance.ATTR} is not JSON: {exc}")
            continue
        if not isinstance(prov, dict) or prov.get("format") != 1:
            tree.add("provenance", path, f"{provenance.ATTR} is not a format-1 record")
            continue
        want = _expected_step(tree, path)
        step = _own_step(prov, want["step"])
        if step is None:
            tree.add("provenance", path, f"records no {want['step']!r} step of its own")
            continue
        bad = {k: step.get(k) for k, v in want.items() if k != "step" and step.get(k) != v}
        if bad:
            tree.add(
                "provenance",
                path,
                f"its {want['step']} step records {bad}, expected { {k: want[k] for k in bad} }",
            )
        for st in walk_steps(prov):
            if st.get("step") == "ingest" and not st.get("raw_files"):
                tree.add("provenance", path, f"ingest step of {st.get('case')} lists no raw file")
        tree.prov[path] = prov


# --- raw files -------------------------------------------------------------------------


def working_directory(results: Path, recorded_results: str | None) -> Path:
    """The workflow's working directory, inferred from the results folder.

    Parameters
    ----------
    results
        The results folder as found (absolute).
    recorded_results
        The ``results`` key of the config recorded in provenance, if any.

    Returns
    -------
    pathlib.Path
        ``results`` with the relative recorded path taken off its end; the parent of
        ``results`` when that is not possible.

    Examples
    --------
    >>> from pathlib import Path
    >>> working_directory(Path("/p/out/results"), "out/results")
    PosixPath('/p')
    >>> working_directory(Path("/p/results"), None)
    PosixPath('/p')
    """
    if recorded_results and not Path(recorded_results).is_absolute():
        parts = Path(recorded_results).parts
        if parts and results.parts[-len(parts) :] == parts:
            return Path(*results.parts[: -len(parts)])
    return results.parent


def _recorded_results(tree: _Tree) -> str | None:
    for prov in tree.prov.values():
        for st in walk_steps(prov):
            record = st.get("config")  # the job's recorded params
            if st.get("step") == "ingest" and isinstance(record, dict) and record.get("results"):
                return str(record["results"])
    return None


def _check_raw_files(tree: _Tree, workdir: Path | None) -> None:
    base = workdir or working_directory(tree.root, _recorded_results(tree))
    # resolved path -> {(sha256, size): [stores that recorded it]}
    records: dict[Path, dict[tuple[str, int], list[Path]]] = {}
    shown: dict[Path, str] = {}
    for store, prov in tree.prov.items():
        for st in walk_steps(prov):
            if st.get("step") != "ingest":
                continue
            for rec in st.get("raw_files", []) or []:
                p = Path(str(rec.get("path", "")))
                full = p if p.is_absolute() else base / p
                shown.setdefault(full, str(p))
                key = (str(rec.get("sha256")), int(rec.get("size", -1)))
                records.setdefault(full, {}).setdefault(key, []).append(store)
    for full, versions in sorted(records.items()):
        tree.checked["raw_files"] += 1
        stores = sorted({s for v in versions.values() for s in v})
        first = min((v[0] for v in versions.values()), key=str)
        n = f"recorded in {len(stores)} store(s)"
        if not full.is_file():
            tree.add("raw_files", first, f"missing: {shown[full]} (looked at {full}; {n})")
            continue
        size = full.stat().st_size
        sha = provenance.sha256_file(full)
        for (want_sha, want_size), who in sorted(versions.items()):
            if sha != want_sha or size != want_size:
                tree.add(
                    "raw_files",
                    who[0],
                    f"changed: {shown[full]} now has {size} B sha256 {sha[:16]}..., recorded "
                    f"{want_size} B sha256 {want_sha[:16]}... (in {len(who)} store(s))",
                )


# --- splits ----------------------------------------------------------------------------


def _set_cases(tree: _Tree, path: Path) -> tuple[list[str], set[str], np.ndarray | None]:
    """(``cases`` attribute, case names of the samples, per-sample case codes)."""
    attrs = tree.attrs[path]
    listed = [str(c) for c in attrs.get("cases", []) or []]
    root = zarr.open_group(str(path), mode="r")
    if "case" not in root:
        return listed, set(), None
    arr = root["case"]
    codes = np.asarray(arr[...], dtype=np.int64)
    meanings = str(arr.attrs.get("flag_meanings", "")).split()
    values = [int(v) for v in arr.attrs.get("flag_values", [])]
    if meanings != listed:
        tree.add("splits", path, f"case flag_meanings {meanings} differ from attr cases {listed}")
    if values != list(range(len(meanings))):
        raise ValueError(f"case flag_values {values} are not 0..{len(meanings) - 1}")
    if codes.size and (codes.min() < 0 or codes.max() >= len(meanings)):
        raise ValueError(f"case codes outside flag_values 0..{len(meanings) - 1}")
    return listed, {meanings[c] for c in np.unique(codes)}, codes


def _read_splits(tree: _Tree) -> dict[str, str] | None:
    tsv = tree.root / "splits.tsv"
    tree.checked["splits"] += 1
    if not tsv.is_file():
        tree.add("splits", "splits.tsv", "missing")
        return None
    try:
        return {a.case: a.split for a in read_assignment_tsv(tsv)}
    except (InputError, OSError) as exc:
        tree.add("splits", "splits.tsv", f"unreadable: {exc}")
        return None


def _check_splits(tree: _Tree, assigned: dict[str, str] | None) -> None:
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
    tree: _Tree,
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
    step = _own_step(tree.prov.get(path, {}), "assemble") or {}
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


def _listed(items: Sequence[str]) -> str:
    more = f" (and {len(items) - _MAX_LISTED} more)" if len(items) > _MAX_LISTED else ""
    return "; ".join(items[:_MAX_LISTED]) + more


def _check_normalization(tree: _Tree, assigned: dict[str, str] | None) -> None:
    labels = {lab for s, lab in tree.sets if s == "train"}
    json_files = {
        p.name[len("normalization-") : -len(".json")]: p
        for p in (tree.root / "sets").glob("normalization-*.json")
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


def _parse_doc(tree: _Tree, where: Path, text: str | None, what: str) -> dict[str, Any] | None:
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
    tree: _Tree, store: Path, label: str, json_path: Path | None, assigned: dict[str, str] | None
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
        tree.add("normalization", where, f"differs from the train store's attr: {_listed(diffs)}")
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
            step = _own_step(tree.prov.get(store, {}), "assemble") or {}
            skipped = set((step.get("skipped_cases") or {}).keys())
            tsv = sorted(c for c, s in assigned.items() if s == "train" and c not in skipped)
            if cases != tsv:
                tree.add("normalization", place, f"{name} cases {cases} != splits.tsv train {tsv}")
        diffs = stats_differences(doc["statistics"], recomputed)
        if diffs:
            tree.add(
                "normalization",
                place,
                f"{name} statistics do not match the train store: {_listed(diffs)}",
            )


# --- NaN -------------------------------------------------------------------------------


def _forbidden(kind: str, name: str) -> bool:
    if kind == "canonical":
        return name in CANONICAL_FINITE
    base, _, suffix = name.rpartition("_")
    return name == "cloud_fraction" or (bool(base) and suffix in ("mean", "var", "skew"))


def nonfinite(
    arr: Any, *, block_bytes: int = _BLOCK_BYTES
) -> tuple[int, int, tuple[int, ...] | None]:
    """NaN count, infinity count and the first non-finite index of an array.

    Reads blocks of whole chunks along the first axis, so memory stays bounded.

    Parameters
    ----------
    arr
        A zarr (or numpy) array of floats.
    block_bytes
        Most bytes read at once (at least one chunk along the first axis).

    Returns
    -------
    n_nan, n_inf : int
    first : tuple of int or None
        Index of the first non-finite element in C order, or None.

    Examples
    --------
    >>> import numpy as np
    >>> nonfinite(np.array([[1.0, np.nan], [np.inf, np.nan]]))
    (2, 1, (0, 1))
    """
    if arr.ndim == 0 or arr.shape[0] == 0:
        return 0, 0, None
    chunk0 = getattr(arr, "chunks", arr.shape)[0]
    per_row = max(1, math.prod(arr.shape[1:]) * arr.dtype.itemsize)
    step = max(chunk0, (block_bytes // per_row) // chunk0 * chunk0)
    n_nan = n_inf = 0
    first: tuple[int, ...] | None = None
    for lo in range(0, arr.shape[0], step):
        a = np.asarray(arr[lo : lo + step])
        if a.dtype.kind not in "fc":
            return 0, 0, None
        nan, inf = np.isnan(a), np.isinf(a)
        n_nan += int(nan.sum())
        n_inf += int(inf.sum())
        if first is None and (n_nan or n_inf):
            idx = np.argwhere(nan | inf)[0]
            first = (int(idx[0]) + lo, *(int(i) for i in idx[1:]))
    return n_nan, n_inf, first


def _check_nan(tree: _Tree) -> None:
    kinds = [("canonical", p) for p in tree.canonical.values()]
    kinds += [("coarse", p) for p in [*tree.scale.values(), *tree.sets.values()]]
    for kind, path in kinds:
        if not tree.opened(path):
            continue
        try:
            root = zarr.open_group(str(path), mode="r")
            arrays = sorted((n, a) for n, a in root.arrays() if _forbidden(kind, n))
        except Exception as exc:
            tree.add("nan", path, f"cannot list arrays: {exc}")
            continue
        for name, arr in arrays:
            tree.checked["nan"] += 1
            try:
                n_nan, n_inf, first = nonfinite(arr)
            except Exception as exc:  # undecodable chunk
                tree.add("nan", path, f"{name}: cannot read: {type(exc).__name__}: {exc}")
                continue
            if n_nan or n_inf:
                dims = arr.metadata.dimension_names or tuple(f"dim{i}" for i in range(arr.ndim))
                at = ", ".join(f"{d}={i}" for d, i in zip(dims, first or (), strict=False))
                tree.add("nan", path, f"{name}: {n_nan} NaN, {n_inf} inf (first at {at})")


# --- consistency -----------------------------------------------------------------------


def kept_indices(
    times: int, z: np.ndarray, *, z_range: Sequence[float] | None, time_stride: int
) -> tuple[np.ndarray, np.ndarray]:
    """Time and level indices a set keeps of a per-case store under its filters.

    Every ``time_stride``-th time from the first; levels with ``z_min <= z <= z_max``.

    Parameters
    ----------
    times
        Number of times of the per-case store.
    z
        Its heights (m).
    z_range
        ``(z_min, z_max)`` in m, or None for every level.
    time_stride
        Keep every n-th time.

    Returns
    -------
    t_idx, z_idx : numpy.ndarray

    Examples
    --------
    >>> import numpy as np
    >>> t, k = kept_indices(5, np.array([50.0, 150.0, 250.0]), z_range=(100, 300), time_stride=2)
    >>> t.tolist(), k.tolist()
    ([0, 2, 4], [1, 2])
    """
    t_idx = np.arange(0, times, max(1, int(time_stride)))
    z = np.asarray(z, dtype=np.float64)
    z_idx = np.arange(z.size)
    if z_range is not None:
        z_idx = z_idx[(z >= float(z_range[0])) & (z <= float(z_range[1]))]
    return t_idx, z_idx


def _check_scale_vs_canonical(tree: _Tree) -> None:
    for (case, _), path in sorted(tree.scale.items()):
        canon = tree.canonical.get(case)
        if not tree.opened(path) or canon is None or not tree.opened(canon):
            continue
        attrs = tree.attrs[path]
        if "skipped" in attrs:
            continue
        tree.checked["consistency"] += 1
        try:
            c, s = open_store(canon), open_store(path)
        except Exception as exc:
            tree.add("consistency", path, f"cannot open with {tree.rel(canon)}: {exc}")
            continue
        f = int(attrs.get("factor", 0) or 0)
        problems = []
        for coord in ("time", "z"):
            if not np.array_equal(c[coord].values, s[coord].values):
                problems.append(f"{coord} differs from the canonical store's")
        for ax in ("y", "x"):
            if f <= 0 or s.sizes.get(ax) != c.sizes[ax] // f:
                problems.append(
                    f"{s.sizes.get(ax)} cells along {ax}, expected {c.sizes[ax]} // factor {f}"
                )
        for p in problems:
            tree.add("consistency", path, p)
        c.close()
        s.close()


def _feature_dims(dims: tuple[str, ...]) -> str | None:
    """Kind of a per-case scale-store variable a set carries (None: not a feature)."""
    table = {
        ("time", "z", "y", "x"): "cell",
        ("time", "y", "x"): "column",
        ("z",): "profile",
        ("time", "z", "y", "x", "py", "px"): "patch",
    }
    return table.get(dims)


def _case_features(group: zarr.Group) -> dict[str, zarr.Array]:
    out = {}
    for name, arr in group.arrays():
        dims = tuple(arr.metadata.dimension_names or ())
        if name.endswith("_bounds") or name in COORDS or _feature_dims(dims) is None:
            continue
        out[name] = arr
    return out


@dataclass
class _CaseStore:
    group: zarr.Group
    features: dict[str, zarr.Array]
    index: dict[str, dict[float, int]]
    t_idx: np.ndarray
    z_idx: np.ndarray
    cells: int


def _open_case(path: Path, step: Mapping[str, Any]) -> _CaseStore:
    g = zarr.open_group(str(path), mode="r")
    coords = {c: np.asarray(g[c][...], dtype=np.float64) for c in ("time", "z", "y", "x")}
    settings = step.get("settings") or {}
    t_idx, z_idx = kept_indices(
        coords["time"].size,
        coords["z"],
        z_range=settings.get("z_range_m"),
        time_stride=int(settings.get("time_stride") or 1),
    )
    return _CaseStore(
        group=g,
        features=_case_features(g),
        index={c: {float(v): i for i, v in enumerate(vals)} for c, vals in coords.items()},
        t_idx=t_idx,
        z_idx=z_idx,
        cells=t_idx.size * z_idx.size * coords["y"].size * coords["x"].size,
    )


def _check_set(tree: _Tree, label: str, path: Path, k: int, seed: Any) -> None:
    tree.checked["consistency"] += 1
    attrs = tree.attrs[path]
    step = _own_step(tree.prov.get(path, {}), "assemble")
    if step is None:
        tree.add("consistency", path, "no assemble step: the recorded filters are unknown")
        return
    listed = [str(c) for c in attrs.get("cases", []) or []]
    cases: dict[str, _CaseStore] = {}
    for c in listed:
        cp = tree.scale.get((c, label))
        if cp is None or not tree.opened(cp):
            tree.add("consistency", path, f"case {c} has no readable cases/{c}/scale-{label}.zarr")
            continue
        if "skipped" in tree.attrs[cp]:
            tree.add("consistency", path, f"case {c} is listed but skipped scale {label}")
            continue
        cases[c] = _open_case(cp, step)
    root = zarr.open_group(str(path), mode="r")
    n = int(root["case"].shape[0]) if "case" in root else 0
    if len(cases) == len(listed):
        want = sum(cs.cells for cs in cases.values())
        if n != want:
            tree.add(
                "consistency",
                path,
                f"{n} samples, expected {want} per-case cells after the recorded filters "
                f"(z_range_m {step.get('settings', {}).get('z_range_m')}, time_stride "
                f"{step.get('settings', {}).get('time_stride')})",
            )
    if step.get("samples") is not None and int(step["samples"]) != n:
        tree.add("consistency", path, f"{n} samples, its assemble step recorded {step['samples']}")
    if n == 0:
        return
    codes = np.asarray(root["case"][...], dtype=np.int64)
    per_case = np.bincount(codes, minlength=len(listed))
    for ci, c in enumerate(listed):
        if c in cases and int(per_case[ci]) != cases[c].cells:
            tree.add(
                "consistency",
                path,
                f"{int(per_case[ci])} samples of case {c}, expected {cases[c].cells} cells of "
                f"cases/{c}/scale-{label}.zarr after the recorded filters",
            )
    feats = {
        name: arr
        for name, arr in root.arrays()
        if name not in COORDS and arr.ndim >= 1 and arr.shape[0] == n
    }
    _check_layout(tree, path, feats, cases)
    rng = np.random.default_rng(seed)
    idx = np.sort(rng.choice(n, size=min(k, n), replace=False))
    _check_samples(tree, path, root, idx, listed, cases, feats, label)


def _check_layout(
    tree: _Tree, path: Path, feats: Mapping[str, zarr.Array], cases: Mapping[str, _CaseStore]
) -> None:
    for c, cs in cases.items():
        missing = sorted(set(cs.features) - set(feats))
        extra = sorted(set(feats) - set(cs.features))
        if missing:
            tree.add("consistency", path, f"lacks features {missing} of case {c}")
        if extra:
            tree.add("consistency", path, f"features {extra} are not in case {c}'s store")
        for name in sorted(set(feats) & set(cs.features)):
            kind = _feature_dims(tuple(cs.features[name].metadata.dimension_names))
            want = cs.features[name].shape[-2:] if kind == "patch" else ()
            if tuple(feats[name].shape[1:]) != tuple(want):
                tree.add(
                    "consistency",
                    path,
                    f"{name} has per-sample shape {feats[name].shape[1:]}, case {c} has {want}",
                )


def _lookup(cs: _CaseStore, t: float, z: float, y: float, x: float) -> tuple[int, ...] | None:
    try:
        return (
            cs.index["time"][t],
            cs.index["z"][z],
            cs.index["y"][y],
            cs.index["x"][x],
        )
    except KeyError:
        return None


def _case_values(arr: zarr.Array, cells: np.ndarray) -> np.ndarray:
    """Values of a per-case feature at cells ``(m, 4)`` of (time, z, y, x) indices."""
    kind = _feature_dims(tuple(arr.metadata.dimension_names))
    ti, zi, yi, xi = cells.T
    if kind == "cell":
        return np.asarray(arr.vindex[ti, zi, yi, xi])
    if kind == "column":
        return np.asarray(arr.vindex[ti, yi, xi])
    if kind == "profile":
        return np.asarray(arr[...])[zi]
    py, px = arr.shape[-2:]
    col = (slice(None), None, None)
    return np.asarray(
        arr.vindex[ti[col], zi[col], yi[col], xi[col], np.arange(py)[None, :, None], np.arange(px)]
    )


def _check_samples(
    tree: _Tree,
    path: Path,
    root: zarr.Group,
    idx: np.ndarray,
    listed: Sequence[str],
    cases: Mapping[str, _CaseStore],
    feats: Mapping[str, zarr.Array],
    label: str,
) -> None:
    coord = {c: np.asarray(root[c].oindex[idx]) for c in ("case", "time", "z", "y", "x")}
    lost: list[str] = []
    outside: list[str] = []
    by_case: dict[str, list[tuple[int, tuple[int, ...]]]] = {}
    for j, s in enumerate(idx):
        c = listed[int(coord["case"][j])]
        if c not in cases:
            continue
        pos = (float(coord[a][j]) for a in ("time", "z", "y", "x"))
        cell = _lookup(cases[c], *pos)
        where = (
            f"sample {int(s)} ({c}, time {coord['time'][j]:g}, z {coord['z'][j]:g}, "
            f"y {coord['y'][j]:g}, x {coord['x'][j]:g})"
        )
        if cell is None:
            lost.append(where)
            continue
        if cell[0] not in cases[c].t_idx or cell[1] not in cases[c].z_idx:
            outside.append(where)
        by_case.setdefault(c, []).append((j, cell))
    if lost:
        tree.add(
            "consistency",
            path,
            f"{len(lost)} sampled cells not in their case's store: {_listed(lost)}",
        )
    if outside:
        tree.add(
            "consistency",
            path,
            f"{len(outside)} sampled cells outside the recorded filters: {_listed(outside)}",
        )
    values = {
        name: np.asarray(arr.oindex[(idx, *(slice(None),) * (arr.ndim - 1))])
        for name, arr in feats.items()
    }
    for c, items in sorted(by_case.items()):
        rows = np.array([j for j, _ in items])
        cells = np.array([cell for _, cell in items], dtype=np.int64)
        tree.checked["samples"] += rows.size
        for name in sorted(set(feats) & set(cases[c].features)):
            got = values[name][rows]
            want = _case_values(cases[c].features[name], cells).astype(got.dtype)
            same = (got == want) | (np.isnan(got) & np.isnan(want))
            bad = ~same.reshape(rows.size, -1).all(axis=1)
            if bad.any():
                b = int(np.argmax(bad))
                tree.add(
                    "consistency",
                    path,
                    f"{name}: {int(bad.sum())} of {rows.size} sampled cells of case {c} differ "
                    f"from cases/{c}/scale-{label}.zarr (first: sample "
                    f"{int(idx[rows[b]])}, set {got[b].ravel()[:3]}, per-case "
                    f"{want[b].ravel()[:3]})",
                )


def _check_consistency(tree: _Tree, sample_checks: int, seed: int) -> None:
    _check_scale_vs_canonical(tree)
    for i, ((_, label), path) in enumerate(sorted(tree.sets.items())):
        if not tree.opened(path):
            continue
        try:
            _check_set(tree, label, path, sample_checks, [seed, i])
        except Exception as exc:  # unreadable data
            tree.add("consistency", path, f"cannot compare: {type(exc).__name__}: {exc}")


# --- entry point -----------------------------------------------------------------------


def verify_results(
    results: str | Path,
    *,
    sample_checks: int = 200,
    seed: int = 0,
    workdir: str | Path | None = None,
) -> VerifyReport:
    """Check a results tree and report every failure.

    Parameters
    ----------
    results
        The results folder (``results/`` of a workflow run).
    sample_checks
        Samples per set store compared value by value with the per-case stores (all
        samples when a set has fewer; 0 compares none).
    seed
        Seed of the sample choice (reproducible reports).
    workdir
        Folder relative raw-file paths are resolved against; by default the workflow's
        working directory inferred from the recorded config (see the module docstring).

    Returns
    -------
    VerifyReport
        Findings of the checks :data:`CHECKS` and how much each examined.

    Raises
    ------
    InputError
        ``results`` is not a folder.

    Examples
    --------
    >>> report = verify_results("results")  # doctest: +SKIP
    >>> print(report.summary())  # doctest: +SKIP
    """
    root = Path(results).resolve()
    if not root.is_dir():
        raise InputError(
            "is not a folder; expected a results tree (cases/, sets/, splits.tsv)",
            file=str(results),
            hint="pass the workflow's results folder (config key 'results')",
        )
    if sample_checks < 0:
        raise InputError(f"sample_checks is {sample_checks}; expected a number >= 0")
    canonical, scale, sets = discover(root)
    tree = _Tree(root=root, canonical=canonical, scale=scale, sets=sets)
    _check_open(tree)
    _check_provenance(tree)
    _check_raw_files(tree, Path(workdir).resolve() if workdir is not None else None)
    assigned = _read_splits(tree)
    _check_splits(tree, assigned)
    _check_normalization(tree, assigned)
    _check_nan(tree)
    _check_consistency(tree, sample_checks, seed)
    return VerifyReport(findings=tree.findings, checked=dict(tree.checked), results=str(results))

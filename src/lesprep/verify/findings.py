"""What verification reports: findings, the report, and the results tree it walks."""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from lesprep.layout import ResultsLayout, scale_label

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
    "splits": "files (set stores and splits.tsv)",
    "normalization": "train scales",
    "nan": "arrays",
    "consistency": "store pairs",
    "samples": "set samples compared",
}
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
class ResultsTree:
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

    layout = ResultsLayout(results)

    def visible(folders: str, store: str) -> list[Path]:
        found = results.glob(f"{folders}/{store}")
        return sorted(p for p in found if not p.name.startswith("."))

    canonical = {
        p.parent.name: p
        for p in visible("cases/*", "*.zarr")
        if p == layout.canonical(p.parent.name)
    }
    scale = {
        (p.parent.name, lab): p
        for p in visible("cases/*", "*.zarr")
        if (lab := scale_label(p)) is not None
    }
    sets = {
        (p.parent.name, lab): p
        for p in visible("sets/*", "*.zarr")
        if (lab := scale_label(p)) is not None
    }
    return canonical, scale, sets


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


def own_step(prov: Mapping[str, Any], step: str) -> dict[str, Any] | None:
    """The last step of kind ``step`` in a record's own steps (not its inputs)."""
    own = [s for s in prov.get("steps", []) or [] if s.get("step") == step]
    return own[-1] if own else None


def listing(items: Sequence[str]) -> str:
    more = f" (and {len(items) - _MAX_LISTED} more)" if len(items) > _MAX_LISTED else ""
    return "; ".join(items[:_MAX_LISTED]) + more

"""Code version per stage: a hash of exactly the package code a stage runs.

Snakemake does not notice changes in code that a ``script:`` imports, so every rule
passes a code version as a param. Hashing the whole package would re-run every ingest
(hours to days of cluster time on real archives) for a fix in the figures; instead each
stage's version covers its entry modules and every package module they import,
transitively (module-level and function-level imports alike, read statically from the
source, nothing is imported). The dispatcher ``lesprep.jobs.steps`` is hashed as text
but not followed: its imports are the other stages' entry points.
"""

from __future__ import annotations

import ast
import hashlib
from collections.abc import Iterable
from pathlib import Path

PACKAGE = "lesprep"
_ROOT = Path(__file__).resolve().parent
_DISPATCH = "lesprep.jobs.steps"


def module_file(module: str, root: Path = _ROOT) -> Path | None:
    """Source file of a package module (``lesprep.a.b``), or None if there is none."""
    parts = module.split(".")[1:]
    base = root.joinpath(*parts)
    for candidate in (base.with_suffix(".py"), base / "__init__.py"):
        if candidate.is_file():
            return candidate
    return None


def _package_of(module: str, root: Path) -> str:
    f = module_file(module, root)
    is_pkg = f is not None and f.name == "__init__.py"
    return module if is_pkg else module.rpartition(".")[0]


def imported_modules(module: str, root: Path = _ROOT) -> set[str]:
    """Package modules that ``module`` imports anywhere in its source."""
    f = module_file(module, root)
    if f is None:
        return set()
    found: set[str] = set()
    for node in ast.walk(ast.parse(f.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                pkg = _package_of(module, root).split(".")
                base = ".".join(pkg[: len(pkg) - node.level + 1])
                target = f"{base}.{node.module}" if node.module else base
            else:
                target = node.module or ""
            found.add(target)
            found.update(f"{target}.{a.name}" for a in node.names)
    out: set[str] = set()
    for name in found:
        if name == PACKAGE or name.startswith(PACKAGE + "."):
            parts = name.split(".")
            for i in range(1, len(parts) + 1):  # parent packages run their __init__ too
                sub = ".".join(parts[:i])
                if module_file(sub, root) is not None:
                    out.add(sub)
    return out


def closure(entries: Iterable[str], root: Path = _ROOT) -> list[str]:
    """Every package module the entries run, sorted (the dispatcher is not followed)."""
    seen: set[str] = set()
    todo = [*entries, _DISPATCH]
    while todo:
        m = todo.pop()
        if m in seen:
            continue
        seen.add(m)
        if m != _DISPATCH:
            todo.extend(imported_modules(m, root) - seen)
    return sorted(seen)


def code_version(entries: Iterable[str], root: Path = _ROOT) -> str:
    """sha256 (16 hex digits) over the names and sources of :func:`closure` of ``entries``.

    Examples
    --------
    >>> a = code_version(["lesprep.canonical.ingest"])
    >>> a == code_version(["lesprep.canonical.ingest"]) and len(a) == 16
    True
    """
    h = hashlib.sha256()
    for m in closure(entries, root):
        f = module_file(m, root)
        if f is None:
            continue
        h.update(m.encode())
        h.update(f.read_bytes())
    return h.hexdigest()[:16]

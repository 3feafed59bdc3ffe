"""Checks ``open``, ``provenance`` and ``raw_files``: every store opens and records the
step that made it, and every raw file still matches its recorded size and sha256.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from lesprep import provenance
from lesprep.scales.layers import split_store_label
from lesprep.store import open_store
from lesprep.verify.findings import ResultsTree, own_step, walk_steps

# --- open and provenance ---------------------------------------------------------------


def check_open(tree: ResultsTree) -> None:
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


def _expected_step(tree: ResultsTree, path: Path) -> dict[str, str | None]:
    """Fields the step that made ``path`` must carry."""
    for case, p in tree.canonical.items():
        if p == path:
            return {"step": "ingest", "case": case}
    for (case, label), p in tree.scale.items():
        if p == path:  # (a layer store's step records its scale and its layer set apart)
            scale, layers = split_store_label(label)
            return {"step": "coarsen", "case": case, "scale": scale, "layers": layers}
    for (split, label), p in tree.sets.items():
        if p == path:
            return {"step": "assemble", "split": split, "scale": label}
    raise KeyError(path)


def _recorded(step: dict[str, Any], key: str) -> Any:
    """A step's field; for ``layers``, the name of its layer set (None without one)."""
    value = step.get(key)
    return (value or {}).get("name") if key == "layers" else value


def check_provenance(tree: ResultsTree) -> None:
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
        step = own_step(prov, want["step"])
        if step is None:
            tree.add("provenance", path, f"records no {want['step']!r} step of its own")
            continue
        found = {k: _recorded(step, k) for k in want if k != "step"}
        bad = {k: v for k, v in found.items() if v != want[k]}
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


def _recorded_results(tree: ResultsTree) -> str | None:
    for prov in tree.prov.values():
        for st in walk_steps(prov):
            record = st.get("config")  # the job's recorded params
            if st.get("step") == "ingest" and isinstance(record, dict) and record.get("results"):
                return str(record["results"])
    return None


def check_raw_files(tree: ResultsTree, workdir: Path | None) -> None:
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

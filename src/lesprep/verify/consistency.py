"""Check ``consistency``: scale stores agree with their canonical store, set samples
with the per-case cells they came from (the assembly's own selection and layout); a
lagged feature ``<f>_lag<k>`` with ``f`` of the same cell ``k`` output times earlier.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from lesprep.scales.layers import centres_and_bounds, split_store_label
from lesprep.sets.assemble import COORDS, feature_kind, kept_indices, label_values
from lesprep.store import open_store
from lesprep.verify.findings import ResultsTree, listing, own_step

# --- consistency -----------------------------------------------------------------------


def layer_levels(step: Mapping[str, Any] | None) -> tuple[np.ndarray, np.ndarray] | None:
    """The z and z_bounds of a layer store, from the interfaces its coarsen step recorded.

    Examples
    --------
    >>> z, bounds = layer_levels({"layers": {"name": "l2", "interfaces_m": [0.0, 100.0, 300.0]}})
    >>> z.tolist(), bounds.tolist()
    ([50.0, 200.0], [[0.0, 100.0], [100.0, 300.0]])
    >>> layer_levels({"layers": {"name": "l2"}}) is None
    True
    """
    faces = ((step or {}).get("layers") or {}).get("interfaces_m")
    return centres_and_bounds(faces) if faces else None


def _z_problems(canon: Any, store: Any, label: str, step: Mapping[str, Any] | None) -> list[str]:
    """How the z of a scale store differs from what it must be: the canonical levels, or
    for a layer store the midpoints and bounds of its recorded layer interfaces."""
    if split_store_label(label)[1] is None:
        same = np.array_equal(canon["z"].values, store["z"].values)
        return [] if same else ["z differs from the canonical store's"]
    levels = layer_levels(step)
    if levels is None:
        return ["its coarsen step records no layer interfaces (interfaces_m)"]
    problems = []
    for name, want in zip(("z", "z_bounds"), levels, strict=True):
        got = store[name].values if name in store.variables else None
        if got is None or not np.allclose(got, want, rtol=1e-12, atol=0.0):
            problems.append(f"{name} differs from the midpoints and bounds of its recorded layers")
    return problems


def check_scale_vs_canonical(tree: ResultsTree) -> None:
    for (case, label), path in sorted(tree.scale.items()):
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
        if not np.array_equal(c["time"].values, s["time"].values):
            problems.append("time differs from the canonical store's")
        problems += _z_problems(c, s, label, own_step(tree.prov.get(path, {}), "coarsen"))
        for ax in ("y", "x"):
            if f <= 0 or s.sizes.get(ax) != c.sizes[ax] // f:
                problems.append(
                    f"{s.sizes.get(ax)} cells along {ax}, expected {c.sizes[ax]} // factor {f}"
                )
        for p in problems:
            tree.add("consistency", path, p)
        c.close()
        s.close()


def _case_features(group: zarr.Group) -> dict[str, zarr.Array]:
    out = {}
    for name, arr in group.arrays():
        dims = tuple(arr.metadata.dimension_names or ())
        if name.endswith("_bounds") or name in COORDS or feature_kind(dims) is None:
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
        lag_steps=(settings.get("lags") or {}).get("steps") or (),
    )
    return _CaseStore(
        group=g,
        features=_case_features(g),
        index={c: {float(v): i for i, v in enumerate(vals)} for c, vals in coords.items()},
        t_idx=t_idx,
        z_idx=z_idx,
        cells=t_idx.size * z_idx.size * coords["y"].size * coords["x"].size,
    )


def check_set(tree: ResultsTree, label: str, path: Path, k: int, seed: Any) -> None:
    tree.checked["consistency"] += 1
    attrs = tree.attrs[path]
    step = own_step(tree.prov.get(path, {}), "assemble")
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
    names, counts = np.unique(label_values(root["case"]), return_counts=True)
    per_case = {str(c): int(k) for c, k in zip(names, counts, strict=True)}
    for c in listed:
        if c in cases and per_case.get(c, 0) != cases[c].cells:
            tree.add(
                "consistency",
                path,
                f"{per_case.get(c, 0)} samples of case {c}, expected {cases[c].cells} cells of "
                f"cases/{c}/scale-{label}.zarr after the recorded filters",
            )
    feats = {
        name: arr
        for name, arr in root.arrays()
        if name not in COORDS
        and np.dtype(arr.dtype).kind == "f"
        and arr.ndim >= 1
        and arr.shape[0] == n
    }
    check_layout(tree, path, feats, cases)
    rng = np.random.default_rng(seed)
    idx = np.sort(rng.choice(n, size=min(k, n), replace=False))
    check_samples(tree, path, root, idx, listed, cases, feats, label)


def lagged(feats: Mapping[str, zarr.Array]) -> dict[str, tuple[str, int]]:
    """Lagged features of a set store -> (their feature, lag in output times)."""
    return {
        name: (str(arr.attrs["lag_of"]), int(arr.attrs["lag_steps"]))
        for name, arr in feats.items()
        if "lag_of" in arr.attrs and "lag_steps" in arr.attrs
    }


def check_layout(
    tree: ResultsTree, path: Path, feats: Mapping[str, zarr.Array], cases: Mapping[str, _CaseStore]
) -> None:
    lags = lagged(feats)
    for c, cs in cases.items():
        missing = sorted(set(cs.features) - set(feats))
        extra = sorted(set(feats) - set(cs.features) - set(lags))
        extra += sorted(n for n, (f, _) in lags.items() if f not in cs.features)
        if missing:
            tree.add("consistency", path, f"lacks features {missing} of case {c}")
        if extra:
            tree.add("consistency", path, f"features {extra} are not in case {c}'s store")
        for name in sorted(set(feats) & (set(cs.features) | set(lags))):
            base = lags[name][0] if name in lags else name
            if base not in cs.features:
                continue
            kind = feature_kind(tuple(cs.features[base].metadata.dimension_names))
            want = cs.features[base].shape[-2:] if kind == "patch" else ()
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
    kind = feature_kind(tuple(arr.metadata.dimension_names))
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


def check_samples(
    tree: ResultsTree,
    path: Path,
    root: zarr.Group,
    idx: np.ndarray,
    listed: Sequence[str],
    cases: Mapping[str, _CaseStore],
    feats: Mapping[str, zarr.Array],
    label: str,
) -> None:
    coord = {c: np.asarray(root[c].oindex[idx]) for c in ("time", "z", "y", "x")}
    coord["case"] = label_values(root["case"], idx)
    lost: list[str] = []
    outside: list[str] = []
    by_case: dict[str, list[tuple[int, tuple[int, ...]]]] = {}
    for j, s in enumerate(idx):
        c = str(coord["case"][j])
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
            f"{len(lost)} sampled cells not in their case's store: {listing(lost)}",
        )
    if outside:
        tree.add(
            "consistency",
            path,
            f"{len(outside)} sampled cells outside the recorded filters: {listing(outside)}",
        )
    values = {
        name: np.asarray(arr.oindex[(idx, *(slice(None),) * (arr.ndim - 1))])
        for name, arr in feats.items()
    }
    lags = lagged(feats)
    for c, items in sorted(by_case.items()):
        rows = np.array([j for j, _ in items])
        cells = np.array([cell for _, cell in items], dtype=np.int64)
        tree.checked["samples"] += rows.size
        for name in sorted(set(feats) & (set(cases[c].features) | set(lags))):
            base, back = lags.get(name, (name, 0))
            if base not in cases[c].features:
                continue
            at = cells.copy()
            at[:, 0] -= back
            if (at[:, 0] < 0).any():
                tree.add(
                    "consistency",
                    path,
                    f"{name}: {int((at[:, 0] < 0).sum())} sampled cells of case {c} lie "
                    f"within the first {back} output time(s), so their lag precedes the case",
                )
                continue
            got = values[name][rows]
            want = _case_values(cases[c].features[base], at).astype(got.dtype)
            earlier = f" {back} output time(s) earlier" if back else ""
            same = (got == want) | (np.isnan(got) & np.isnan(want))
            bad = ~same.reshape(rows.size, -1).all(axis=1)
            if bad.any():
                b = int(np.argmax(bad))
                tree.add(
                    "consistency",
                    path,
                    f"{name}: {int(bad.sum())} of {rows.size} sampled cells of case {c} differ "
                    f"from {base}{earlier} of cases/{c}/scale-{label}.zarr (first: sample "
                    f"{int(idx[rows[b]])}, set {got[b].ravel()[:3]}, per-case "
                    f"{want[b].ravel()[:3]})",
                )


def check_consistency(tree: ResultsTree, sample_checks: int, seed: int) -> None:
    check_scale_vs_canonical(tree)
    for i, ((_, label), path) in enumerate(sorted(tree.sets.items())):
        if not tree.opened(path):
            continue
        try:
            check_set(tree, label, path, sample_checks, [seed, i])
        except Exception as exc:  # unreadable data
            tree.add("consistency", path, f"cannot compare: {type(exc).__name__}: {exc}")

"""Ingest: one case's raw archive -> its canonical Zarr store.

The canonical store has dims ``(time, z, y, x)``, variables in canonical units with CF
attributes, w at cell centres, the spin-up dropped, and the fine-grid derived fields
``rh``, ``cloud_mask`` and ``lwp``. It is written one output time at a time (memory is
bounded by one time step, not by the run length), into a temporary sibling that is
renamed into place when complete.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from lesprep import catalogue, provenance, thermo
from lesprep.canonical.derived import cell_diagnostics
from lesprep.canonical.mask import describe_threshold
from lesprep.canonical.nearconstant import (
    deviation_layout,
    first_step,
    level_deviation,
)
from lesprep.canonical.settings import IngestSettings
from lesprep.errors import TimeAxisError, UnitError
from lesprep.progress import StepProgress
from lesprep.raw.archive import ArchiveIndex, index_archive, read_field, resolve_files
from lesprep.raw.checks import (
    check_finite,
    check_range,
    value_extent,
)
from lesprep.raw.grid import (
    destagger_horizontal,
    destagger_vertical,
    face_side,
    horizontal_attrs,
    horizontal_spacing,
    layer_thickness,
    vertical_faces,
)
from lesprep.raw.timeaxis import cf_time_attrs, check_intervals
from lesprep.raw.varmap import VariableMap, load_varmap
from lesprep.store import (
    CONVENTIONS,
    ArraySpec,
    TimeWriter,
    atomic_path,
    compressors,
    consolidate,
    create_store,
)
from lesprep.units import Conversion, conversion

log = logging.getLogger(__name__)

DERIVED_3D = ("rh", "cloud_mask")
"""Fine-grid derived fields of the fused per-cell pass stored with dims (time, z, y, x)."""


def mapped_names(vm: VariableMap) -> tuple[str, ...]:
    """The variable map's variables: the catalogue's in catalogue order (``p`` first: others
    may need it), then those the map adds, in map order."""
    known = [v.name for v in catalogue.variables(kind="mapped") if v.name in vm.variables]
    return (*known, *(n for n in vm.variables if n not in known))


def fields_3d(vm: VariableMap) -> tuple[str, ...]:
    """Stored (time, z, y, x) fields of a case: mapped ones except ``p``, then derived."""
    return (*(n for n in mapped_names(vm) if n != "p" and not vm.is_2d(n)), *DERIVED_3D)


def fields_2d(vm: VariableMap) -> tuple[str, ...]:
    """Mapped (time, y, x) fields of a case (surface fields)."""
    return tuple(n for n in mapped_names(vm) if n != "p" and vm.is_2d(n))


def warm_kernels(dtype: np.dtype) -> None:
    """Load the compiled kernels the ingest calls (from numba's cache) on tiny arrays.

    The first call of a compiled kernel in a process costs a few tenths of a second
    (numba's target set-up and the cache load); :func:`ingest_case` runs this on a
    background thread while it indexes the archive, so a small case does not pay it on
    its first time step.
    """
    a = np.ones((2, 4, 4), dtype=np.float32)
    conv = Conversion(
        variable="T", raw_variable="t", from_units="degC", to_units="K", factor=1.0, offset=1.0
    )
    conv.convert(a, dtype)
    destagger_vertical(
        np.ones((3, 4, 4), np.float32), np.arange(3.0), np.arange(2.0) + 0.5, dtype=dtype
    )
    cell_diagnostics(a * 9e4, a * 280.0, a * 1e-3, a * 1e-4, np.ones(2), 1e-5, dtype=dtype)


def kept_times(times: np.ndarray, spinup_s: float, *, case: str) -> np.ndarray:
    """Indices of the output times kept after dropping the spin-up.

    Times earlier than ``first + spinup`` are dropped. A spin-up at or beyond the end of
    the run (nothing, or only the very last time, would be left by a spin-up longer than
    the run) is an error.
    """
    t0, t1 = float(times[0]), float(times[-1])
    if spinup_s < 0:
        raise TimeAxisError(f"spin-up is negative ({spinup_s:g} s)", case=case)
    if spinup_s >= t1 - t0 and spinup_s > 0:
        raise TimeAxisError(
            f"spin-up of {spinup_s:g} s is at or beyond the end of the run (output times "
            f"span {t1 - t0:g} s from {t0:g} s to {t1:g} s); nothing would remain",
            case=case,
            hint="shorten 'spinup' for this case in the case sheet or the config",
        )
    tol = 1e-6 * max(1.0, abs(t1))
    return np.nonzero(times >= t0 + spinup_s - tol)[0]


def segment_indices(
    times: np.ndarray,
    wanted: Sequence[float],
    segment: str,
    *,
    case: str,
    file: str | Path | None = None,
) -> np.ndarray:
    """Indices in ``times`` of the output times ``wanted`` of a segment (each must be
    there)."""
    want = np.asarray(wanted, dtype=np.float64)
    tol = 1e-6 * max(1.0, float(np.abs(times).max()))
    idx = np.searchsorted(times, want - tol)
    ok = (idx < times.size) & (np.abs(times[np.minimum(idx, times.size - 1)] - want) <= tol)
    if not np.all(ok):
        missing = want[~ok][:5].tolist()
        raise TimeAxisError(
            f"segment {segment} expects output times {missing} s, which its files do "
            "not hold (the archive changed after the workflow was planned)",
            case=case,
            file=None if file is None else str(file),
            hint="run the workflow again: it plans the segments from the current files",
        )
    return idx


@dataclass
class _ConversionLog:
    items: dict[tuple[str, str, str], Conversion] = field(default_factory=dict)

    def get(
        self,
        *,
        name: str,
        raw: str,
        found: str | None,
        spec_units: str | None,
        expected: str,
        case: str,
        file: str,
    ) -> Conversion:
        key = (name, str(found), str(spec_units))
        if key not in self.items:
            self.items[key] = conversion(
                variable=name,
                raw_variable=raw,
                found=found,
                expected=expected,
                assumed=spec_units,
                case=case,
                file=file,
            )
        return self.items[key]

    def records(self) -> list[dict[str, Any]]:
        return [c.to_dict() for c in self.items.values()]


@dataclass
class _ClipLog:
    """Negative values within the tolerance that were set to zero, per variable and time."""

    case: str = ""
    records: list[dict[str, Any]] = field(default_factory=list)

    def clip(
        self, values: np.ndarray, extent: tuple[float, float], *, name: str, tol: float, t: float
    ) -> tuple[tuple[float, float], np.ndarray | None]:
        """Set values in ``[-tol, 0)`` to zero in place; return the new extent and the
        clipped amounts (None when nothing was clipped). Values below ``-tol`` stay: the
        range check refuses them."""
        lo, hi = extent
        if lo >= 0.0 or lo < -tol:
            return extent, None
        neg = values < 0
        amounts = np.where(neg, -values.astype(np.float64), 0.0)
        cells = int(np.count_nonzero(neg))
        np.maximum(values, 0, out=values)
        self.records.append(
            {"variable": name, "time_s": t, "cells": cells, "min": lo, "tolerance": tol}
        )
        return (0.0, max(hi, 0.0)), amounts

    def add_mass(self, amounts: dict[str, np.ndarray], rho: np.ndarray, dz: np.ndarray) -> None:
        """Record the clipped mass of this time step as a domain-mean column (kg m-2)."""
        n = len(amounts)
        for rec, a in zip(self.records[-n:], amounts.values(), strict=True):
            column = np.tensordot(dz, (a * rho).sum(axis=(1, 2)), axes=(0, 0))
            rec["mass_kg_m2"] = float(column) / (a.shape[1] * a.shape[2])
            log.warning(
                "case %s: %s had %d cell(s) below zero at t = %g s (min %.3g, within the "
                "tolerance %.3g); set to zero, %.3g kg m-2 of the domain-mean column",
                self.case,
                rec["variable"],
                rec["cells"],
                rec["time_s"],
                rec["min"],
                rec["tolerance"],
                rec["mass_kg_m2"],
            )


def _quantity(
    vm: VariableMap, name: str, units: str | None, *, case: str, file: str
) -> catalogue.Quantity:
    """What the raw field of ``name`` is converted to: the catalogue's quantity for a known
    variable, the field's own units for one the map adds."""
    spec = vm.variables[name]
    if catalogue.known(name):
        return catalogue.get(name).quantities[spec.quantity]
    own = units if units is not None and str(units).strip() else spec.units
    if own is None:
        raise UnitError(
            "has no units attribute and the variable map assumes none; a variable the "
            f"catalogue does not know ({name!r}) keeps its own units, so they must be known",
            hint=f"add 'units: <unit>' to {name!r} in the variable map",
            case=case,
            file=file,
            variable=spec.raw,
        )
    return catalogue.Quantity(units=str(own))


def _destagger_horizontal(
    cat: ArchiveIndex, name: str, values: np.ndarray, *, axis: int, face_axis: str, file: str
) -> np.ndarray:
    """Centre values of a field on the faces of a periodic horizontal axis: the side the
    faces lie on comes from the face coordinate or the variable map's ``faces:``
    (:func:`lesprep.raw.grid.face_side`), never from a guess."""
    spec = cat.varmap.variables[name]
    base = face_axis.removesuffix("_face")
    centres = getattr(cat.grid, base)
    where = {"variable": spec.raw, "file": file, "case": cat.case}
    side = face_side(
        stated=spec.faces.get(base),
        face_coord=getattr(cat.grid, face_axis),
        centre_coord=centres,
        axis_name=base,
        **where,
    )
    return destagger_horizontal(
        values, axis=axis, faces=side, n_centres=centres.size, axis_name=base, **where
    )


def _to_canonical_axes(values: np.ndarray, axes: tuple[str, ...]) -> tuple[np.ndarray, list[str]]:
    """Drop time (already selected) and transpose to (z, y, x) order."""
    axes = tuple(a for a in axes if a != "time")
    order = sorted(range(len(axes)), key=lambda i: "zyx".index(axes[i][0]))
    return np.transpose(values, order), [axes[i] for i in order]


def canonical_step(
    cat: ArchiveIndex,
    time_index: int,
    *,
    faces: np.ndarray,
    settings: IngestSettings,
    conversions: _ConversionLog,
    clipped: _ClipLog,
    deviations: frozenset[str] = frozenset(),
) -> dict[str, np.ndarray]:
    """Canonical fields of one output time, checked and derived, in the store dtype.

    For each variable in ``deviations`` two more arrays come back: ``<v>_ref``, the
    horizontal mean of every level computed in float64 before rounding, and ``<v>_dev``,
    the float64 value minus that reference, rounded once to the store dtype: the sub-grid
    spread of a near-constant field survives in it (see
    :func:`lesprep.canonical.nearconstant.quantized_levels`).

    Returns ``qc, qv, T, w, rh`` (z, y, x), ``cloud_mask`` (int8 0/1), ``lwp`` (y, x,
    float64) and ``p`` as (z, y, x) or, for a profile, (z,). Every value is computed in
    float64 from the raw value and rounded once per operation to ``settings.dtype``
    (unit conversion, then destaggering or a quantity change); the derived fields are
    computed from the rounded (stored) values, so they agree with what a reader of the
    store recomputes (:mod:`lesprep.canonical.derived`).
    """
    vm: VariableMap = cat.varmap
    t = float(cat.times[time_index])
    z = cat.grid.z
    dtype = np.dtype(settings.dtype)
    out: dict[str, np.ndarray] = {}
    files: dict[str, str] = {}
    extents: dict[str, tuple[float, float]] = {}
    names = mapped_names(vm)
    clipped_now: dict[str, np.ndarray] = {}
    fractions: list[str] = []  # water species given as mass fractions: converted together
    exact: dict[str, np.ndarray] = {}  # their float64 values, for deviation fields

    def clip(name: str) -> None:
        if name in settings.negative_tolerance:
            extents[name], amounts = clipped.clip(
                out[name], extents[name], name=name, tol=settings.negative_tolerance[name], t=t
            )
            if amounts is not None:
                clipped_now[name] = amounts

    for name in names:
        spec = vm.variables[name]
        raw, file, units, raw_extent = read_field(cat, name, time_index)
        files[name] = file
        quantity = _quantity(vm, name, units, case=cat.case, file=file)
        axes = tuple(a for a in spec.axes(vm.dims) if a != "time")
        raw_dims = [d for d in spec.dims if vm.dims[d] != "time"]
        conv = conversions.get(
            name=name,
            raw=spec.raw,
            found=units,
            spec_units=spec.units,
            expected=quantity.units,
            case=cat.case,
            file=file,
        )
        reuse = raw.dtype == dtype and raw.flags.writeable and raw.flags.c_contiguous
        where = {"case": cat.case, "file": file, "time": t}
        if raw_extent[0]:  # NaN/Inf (or fill values): report them where the raw file has them
            check_finite(raw, variable=spec.raw, dims=raw_dims, **where)
        raw_dtype = raw.dtype
        if name in deviations:
            v64, _ = _to_canonical_axes(conv.convert(raw, np.float64), axes)
            if quantity.mass_fraction:  # after the joint conversion below
                if v64.shape[0] == faces.size:
                    v64 = destagger_vertical(np.ascontiguousarray(v64), faces, z, axis=0)
                exact[name] = v64
            else:
                out[f"{name}_dev"], out[f"{name}_ref"] = level_deviation(
                    v64, faces=faces, z=z, quantity=quantity, fields=out, dtype=dtype
                )
            del v64
        values = conv.convert(raw, dtype, out=raw if reuse else None)  # in place if it can
        del raw
        # Rounding is monotonic, so the converted extremes are the converted raw extremes
        # (same kernel, same rounding); an overflow shows as an infinite extreme.
        ends = conv.convert(np.array(raw_extent[1:], dtype=raw_dtype), dtype)
        extent: tuple[float, float] | None = (float(ends.min()), float(ends.max()))
        if not np.all(np.isfinite(ends)):
            check_finite(values, variable=f"{spec.raw} (converted)", dims=raw_dims, **where)
        values, cax = _to_canonical_axes(values, axes)
        for i, a in enumerate(cax):
            if a in ("z_face", "y_face", "x_face"):
                extent = None  # interpolated values: their extremes are measured below
            if a == "z_face":
                values = destagger_vertical(
                    np.ascontiguousarray(values) if i == 0 else values,
                    faces,
                    z,
                    axis=i,
                    dtype=dtype,
                )
            elif a in ("y_face", "x_face"):
                values = _destagger_horizontal(cat, name, values, axis=i, face_axis=a, file=file)
                values = values.astype(dtype)
        if quantity.convert is not None:
            extent = None
            values = quantity.convert(values, out).astype(dtype)
        out[name] = np.ascontiguousarray(values)
        extents[name] = value_extent(out[name])[1:] if extent is None else extent
        if quantity.mass_fraction:
            fractions.append(name)
        else:
            clip(name)
    if fractions:
        ratios = {n: out[n] for n in names if catalogue.known(n) and catalogue.get(n).water}
        given = {n: ratios.pop(n) for n in fractions}
        for name, r in thermo.mixing_ratios_from_mass_fractions(given, ratios).items():
            out[name] = r.astype(dtype)
            extents[name] = value_extent(out[name])[1:]
            clip(name)
        if exact:
            given = {n: exact.get(n, given[n]) for n in given}
            for name, r in thermo.mixing_ratios_from_mass_fractions(given, ratios).items():
                if name in exact:
                    ref = r.mean(axis=(1, 2))
                    out[f"{name}_dev"] = (r - ref[:, None, None]).astype(dtype)
                    out[f"{name}_ref"] = ref
    for name in names:
        spec = vm.variables[name]
        if name not in settings.ranges:
            continue  # no plausible range is known for this variable
        check_range(
            out[name],
            name=name,
            bounds=settings.ranges[name],
            units=vm.entry(name).units,
            case=cat.case,
            file=files[name],
            raw_variable=spec.raw,
            raw_units=str(
                conversions.items
                and next((c.from_units for k, c in conversions.items.items() if k[0] == name), "?")
            ),
            time=t,
            extent=extents[name],
        )
    if clipped_now:
        p = out["p"] if out["p"].ndim == 3 else out["p"][:, None, None]
        rho = thermo.dry_air_density(p, out["T"], out["qv"])
        clipped.add_mass(clipped_now, np.asarray(rho, dtype=np.float64), layer_thickness(faces))
    diag = cell_diagnostics(
        out["p"],
        out["T"],
        out["qv"],
        out["qc"],
        layer_thickness(faces),
        settings.threshold,
        threshold_units=settings.threshold_units,
        dtype=dtype,
    )
    out["rh"] = diag.rh
    out["cloud_mask"] = diag.cloud_mask
    out["lwp"] = diag.lwp
    return out


def _z_chunk(nz: int, ny: int, nx: int, itemsize: int, chunk_mib: float) -> int:
    per_level = ny * nx * itemsize
    return int(max(1, min(nz, (chunk_mib * 2**20) // per_level)))


def _layout(
    cat: ArchiveIndex,
    keep: np.ndarray,
    faces: np.ndarray,
    settings: IngestSettings,
    p_profile: bool,
    units: dict[str, str],
) -> dict[str, ArraySpec]:
    nt, nz, ny, nx = keep.size, cat.grid.z.size, cat.grid.y.size, cat.grid.x.size
    dtype = np.dtype(settings.dtype)
    zc = _z_chunk(nz, ny, nx, dtype.itemsize, settings.chunk_mib)
    dims4 = ("time", "z", "y", "x")
    out: dict[str, ArraySpec] = {}
    vm = cat.varmap
    for name in fields_3d(vm):
        is_mask = name == "cloud_mask"
        attrs = (
            vm.entry(name, units=units.get(name)) if name in vm.variables else catalogue.get(name)
        ).cf_attrs()
        if is_mask:
            attrs["long_name"] = (
                "cloudy cell ("
                + describe_threshold(settings.threshold, settings.threshold_units)
                + ")"
            )
        out[name] = ArraySpec(
            dims=dims4,
            shape=(nt, nz, ny, nx),
            chunks=(1, zc, ny, nx),
            dtype="int8" if is_mask else dtype,
            attrs=attrs,
            fill_value=0 if is_mask else (0.0 if name == "qc" else None),
        )
    for name in fields_2d(vm):
        out[name] = ArraySpec(
            dims=("time", "y", "x"),
            shape=(nt, ny, nx),
            chunks=(1, ny, nx),
            dtype=dtype,
            attrs=vm.entry(name, units=units.get(name)).cf_attrs(),
        )
    if p_profile:
        out["p"] = ArraySpec(
            dims=("z",),
            shape=(nz,),
            chunks=(nz,),
            dtype=dtype,
            attrs={
                **catalogue.get("p").cf_attrs(),
                "comment": "1-D reference profile p(z); broadcast over (time, y, x) when used",
            },
        )
    else:
        out["p"] = ArraySpec(
            dims=dims4,
            shape=(nt, nz, ny, nx),
            chunks=(1, zc, ny, nx),
            dtype=dtype,
            attrs=catalogue.get("p").cf_attrs(),
        )
    out["lwp"] = ArraySpec(
        dims=("time", "y", "x"),
        shape=(nt, ny, nx),
        chunks=(1, ny, nx),
        dtype=dtype,
        attrs=catalogue.get("lwp").cf_attrs(),
        fill_value=0.0,
    )
    out["time"] = ArraySpec(
        dims=("time",),
        shape=(nt,),
        chunks=(nt,),
        dtype="float64",
        data=cat.times[keep],
        attrs=cf_time_attrs(cat.origin),
    )
    out["z"] = ArraySpec(
        dims=("z",),
        shape=(nz,),
        chunks=(nz,),
        dtype="float64",
        data=cat.grid.z,
        attrs={
            "units": "m",
            "standard_name": "height",
            "long_name": "height of cell centres above the surface",
            "positive": "up",
            "axis": "Z",
            "bounds": "z_bounds",
        },
    )
    out["z_bounds"] = ArraySpec(
        dims=("z", "nv"),
        shape=(nz, 2),
        chunks=(nz, 2),
        dtype="float64",
        data=np.stack([faces[:-1], faces[1:]], axis=1),
        attrs={"units": "m"},  # CF 7.1: a bounds variable describes its parent
    )
    for axis in ("y", "x"):
        values = getattr(cat.grid, axis)
        out[axis] = ArraySpec(
            dims=(axis,),
            shape=values.shape,
            chunks=values.shape,
            dtype="float64",
            data=values,
            attrs=horizontal_attrs(axis, f"{axis} of cell centres"),
        )
    return out


def ingest_case(
    *,
    case: str,
    raw: str | list[Path],
    varmap: str | Path | VariableMap,
    settings: IngestSettings,
    out: str | Path,
    regime: str = "",
    config_record: dict[str, Any] | None = None,
    segment: Mapping[str, Any] | None = None,
) -> Path:
    """Ingest one case's raw archive into ``out`` (a canonical Zarr store).

    Parameters
    ----------
    case
        Case id.
    raw
        Glob of the raw files, or the list of files.
    varmap
        Variable map (path or parsed).
    settings
        Resolved ingest settings.
    out
        Path of the canonical store to create (replaced atomically).
    regime
        Regime tag (recorded in attrs).
    config_record
        What the job was given (its params), recorded and hashed into provenance.
    segment
        Ingest only this time segment of the case (``Segment.to_dict()`` of
        :mod:`lesprep.segments.plan`: ``name``, ``index``, ``times``, ``first_kept``);
        ``raw`` then lists the segment's files. The first-time decisions (which fields get a
        deviation field) are taken at the case's first kept time, as in a whole-case run,
        and the time axis was checked over the whole archive when the plan was made.

    Returns
    -------
    pathlib.Path
        ``out``.

    Raises
    ------
    lesprep.errors.InputError
        Any problem with the archive; nothing is left at ``out``.
    """
    # glibc's default allocator on purpose (no :func:`retain_freed_memory`): measured on
    # the 512 x 512 x 160 x 12 benchmark archive, keeping freed memory gave a 5.0 GB peak
    # against 4.1-4.2 GB without (the float64 working arrays fragment the heap), at the
    # same speed (20.8-22.8 s against 22.4-23.2 s); at 256 x 256 x 80 x 6 neither differs.
    warming = threading.Thread(
        target=warm_kernels, args=(np.dtype(settings.dtype),), name="lesprep-warm", daemon=True
    )
    warming.start()
    vm = varmap if isinstance(varmap, VariableMap) else load_varmap(varmap)
    files = resolve_files(raw, case=case) if isinstance(raw, str) else [Path(f) for f in raw]
    cat = index_archive(
        files,
        vm,
        case=case,
        time_gaps=settings.time_gaps,
        duplicate_times=settings.duplicate_times,
        restart_order=settings.restart_order,
        # a segment's files skip the times between the case's first file and the segment
        check_gaps=segment is None,
    )
    try:
        if segment is not None and len(segment["times"]) > 1:  # the segment's own axis
            cat.time_report = check_intervals(segment["times"])
        for note in cat.warnings:
            log.warning("%s", note)
        dx = horizontal_spacing(cat.grid.x, cat.grid.y, case=case, file=str(files[0]))
        faces = vertical_faces(
            cat.grid.z, z_face=cat.grid.z_face, z_bounds=cat.grid.z_bounds, case=case
        )
        if segment is None:
            keep = kept_times(cat.times, settings.spinup_s, case=case)
            dropped = [float(t) for t in np.delete(cat.times, keep)]
            decide = keep
        else:
            name = str(segment["name"])
            keep = segment_indices(cat.times, segment["times"], name, case=case, file=files[0])
            decide = segment_indices(cat.times, [segment["first_kept"]], name, case=case)
            dropped = [] if segment["index"] else [float(t) for t in cat.times[: decide[0]]]
        p_profile = vm.variables["p"].axes(vm.dims) == ("z",)
        conversions = _ConversionLog()
        clipped = _ClipLog(case=case)
        dtype = np.dtype(settings.dtype)

        def step_fields(ti: int, deviations: frozenset[str]) -> dict[str, np.ndarray]:
            return canonical_step(
                cat,
                ti,
                faces=faces,
                settings=settings,
                conversions=conversions,
                clipped=clipped,
                deviations=deviations,
            )

        n_clipped = len(clipped.records)
        progress = StepProgress(f"ingest {case}", int(keep.size), cat.time_step_bytes(), logger=log)
        first, deviations, quantized = first_step(
            cat, decide, step_fields, clipped, mapped_names(cat.varmap)
        )
        if decide[0] != keep[0]:  # a later segment: decided at the case's first kept time
            first = step_fields(int(keep[0]), deviations)
            del clipped.records[n_clipped:]
        units = {c.variable: c.to_units for c in conversions.items.values()}
        layout = _layout(cat, keep, faces, settings, p_profile, units)
        layout.update(deviation_layout(deviations, keep.size, layout, dtype))
        out = Path(out)
        with provenance.FileRecords(files) as hashes, atomic_path(out) as tmp:
            group = create_store(tmp, layout, codecs=compressors(settings.store))
            writer = TimeWriter(group)
            for j, ti in enumerate(keep):
                fields = first if j == 0 else step_fields(int(ti), deviations)
                first = {}
                step = {
                    n: fields[n].astype("int8" if n == "cloud_mask" else dtype, copy=False)
                    for n in (*fields_3d(vm), *fields_2d(vm), "lwp")
                }
                for n in deviations:
                    step[f"{n}_dev"] = fields[f"{n}_dev"]
                    step[f"{n}_ref"] = fields[f"{n}_ref"]
                if not p_profile:
                    step["p"] = fields["p"].astype(dtype, copy=False)
                elif j == 0:
                    group["p"][:] = fields["p"].astype(dtype)
                del fields
                writer.add(j, step)
                del step
                progress.done(j)
            writer.flush()
            raw_records = hashes.result()
            conv_records = conversions.records()
            for name, spec in vm.variables.items():
                operation = vm.entry(name).quantities[spec.quantity].description
                if operation:
                    conv_records.append(
                        {"variable": name, "raw_variable": spec.raw, "operation": operation}
                    )
                for axis in spec.staggered(vm.dims):
                    how = (
                        "in height"
                        if axis == "z"
                        else f"along {axis} (faces on the {spec.faces.get(axis, 'coordinate')}"
                        " side)"
                    )
                    conv_records.append(
                        {
                            "variable": name,
                            "raw_variable": spec.raw,
                            "operation": f"interpolated linearly {how} from cell faces to "
                            "cell centres",
                        }
                    )
            step = provenance.new_step(
                "ingest",
                case=case,
                regime=regime,
                raw_files=raw_records,
                variable_map=vm.to_dict(),
                conversions=conv_records,
                times_dropped_s=dropped,
                warnings=cat.warnings,
                times_kept=int(keep.size),
                time_axis=None if cat.time_report is None else cat.time_report.to_dict(),
                quantized_levels=quantized,
                deviation_fields=sorted(deviations),
                restart_overlaps=cat.overlaps,
                negatives_clipped=clipped.records,
                time_origin=cat.origin,
                segment=None
                if segment is None
                else {k: v for k, v in segment.items() if k != "files"},
                settings=settings.to_dict(),
                saturation_formula=thermo.SATURATION_FORMULA,
                config_sha256=None
                if config_record is None
                else provenance.config_sha(config_record),
                config=config_record,
            )
            attrs = provenance.extend(
                {
                    "Conventions": CONVENTIONS,
                    "title": f"lesprep canonical fields of case {case}",
                    "summary": "Fine-grid LES fields in canonical names, units and grid, spin-up "
                    "removed, with derived relative humidity, cloud mask and liquid water path.",
                    "source": cat.attrs.get("source", "unknown LES output"),
                    "references": "Bolton (1980), Mon. Wea. Rev. 108, 1046-1053 (saturation "
                    "vapour pressure)",
                    "case": case,
                    "regime": regime,
                    "dx": dx,
                    "dy": dx,
                    "cloud_threshold": settings.threshold,
                    "cloud_threshold_units": settings.threshold_units,
                    "spinup_s": settings.spinup_s,
                    "time_origin": cat.origin,
                },
                step,
                f"ingested {len(files)} raw file(s) of case {case}; kept {keep.size} of "
                f"{cat.times.size} output times",
            )
            group.attrs.update(attrs)
            consolidate(tmp)
        log.info(
            "case %s: wrote %s (%d times kept, %d dropped)", case, out, keep.size, len(dropped)
        )
    finally:
        cat.close()
    return out

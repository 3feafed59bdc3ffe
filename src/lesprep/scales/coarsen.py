"""Multi-scale coarsening of one case: sub-grid moments, GCM-view inputs, fine patches.

For every kept output time the canonical fine fields are read once, one z-slab (one chunk
height) at a time, and every scale of the job's group is computed from each slab in one
pass: the finest factor from the fine field, each coarser factor from the moments of the
finest computed factor dividing it (:func:`lesprep.scales.moments.hierarchical_moments`). Only
``drh_dz`` and the column quantities need the whole column; they are added when a time
step's last slab is done (:class:`StepCoarsener`). Per coarse cell ``(time, z, y, x)``:

``<v>_mean``, ``<v>_var``, ``<v>_skew``
    block mean, population variance (``M2 / n``) and skewness ``g1 = (M3/n) / var**1.5``
    (0 where the block is constant, see :mod:`lesprep.scales.moments`) of each moment variable.
``cloud_fraction``
    block mean of the fine cloud mask (the training target).
``rh_of_means``
    relative humidity computed from the coarse means of qv, T and p (what a coarse model
    knows), beside ``rh_mean``, the block mean of the fine relative humidity.
``drh_dz``
    vertical derivative of ``rh_of_means`` on the (possibly stretched) z grid: second-order
    differences for non-uniform spacing inside, second-order one-sided at the ends
    (``numpy.gradient(..., edge_order=2)``).
``cf_sundqvist``
    the Sundqvist et al. (1989) cloud fraction from ``rh_of_means`` (a classical baseline).
``lwp_mean``, ``lwp_var``, ``cloud_cover``
    column quantities: block mean and population variance of the liquid water path, and
    the fraction of fine columns with any cloudy cell.
``<v>_patch``
    the fine field under each coarse cell (:mod:`lesprep.scales.patches`).

Arithmetic is float64; stored values are float32 unless the config says otherwise.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from lesprep import provenance
from lesprep._memory import retain_freed_memory
from lesprep.errors import ScaleError
from lesprep.progress import StepProgress
from lesprep.scales.cflayout import layer_layout, scale_layout
from lesprep.scales.layers import LayerGrid, resolve_layers, split_store_label
from lesprep.scales.patches import patch_geometry
from lesprep.scales.reader import FineReader
from lesprep.scales.settings import CoarsenSettings
from lesprep.scales.spec import Scale
from lesprep.scales.step import QUANTUM_STEPS_BLOCK, StepCoarsener
from lesprep.store import (
    TimeWriter,
    atomic_path,
    compressors,
    consolidate,
    create_store,
    open_store,
)

log = logging.getLogger(__name__)

WRITE_BUFFER_BYTES = 256 * 2**20
"""Time steps buffered for writing, over all scales of a job (one large step is never
split)."""


def resolve_for_case(
    settings: CoarsenSettings, dx: float, nx: int, ny: int, *, case: str
) -> tuple[list[Scale], list[dict[str, str]]]:
    """Resolve the settings' scales for a grid; misfits raise or are skipped (recorded)."""
    scales: list[Scale] = []
    skipped: list[dict[str, str]] = []
    for spec in settings.scales:
        try:
            s = spec.resolve(dx, nx, ny, case=case)
        except ScaleError as exc:
            if settings.on_misfit != "skip":
                raise
            skipped.append({"scale": spec.text, "reason": str(exc)})
            continue
        assert s is not None
        if s.label in settings.patch_scales:
            patch_geometry(s.factor, settings.patch_size, settings.patch_halo, scale=spec.text)
        scales.append(s)
    return scales, skipped


def case_layers(settings: CoarsenSettings, canon: Any, case: str) -> dict[str, LayerGrid]:
    """The configured layer sets resolved for a case (name -> grid).

    Heights come from the canonical store's cell faces (``z_bounds``); pressure sets are
    mapped with the horizontal-mean pressure profile at the case's first kept output time
    (fixed per case, so appending output times never moves the layers).
    """
    if not settings.layers:
        return {}
    zb = np.asarray(canon.z_bounds.values, dtype=np.float64)
    faces = np.append(zb[:, 0], zb[-1, 1])
    z = np.asarray(canon.z.values, dtype=np.float64)
    p = canon["p"]
    profile = None
    if any(g.kind == "pressure" for g in settings.layers):
        first = p if "time" not in p.dims else p.isel(time=0)
        other = [d for d in first.dims if d != "z"]
        profile = np.asarray(first.astype(np.float64).mean(other).values)
    return {
        g.name: resolve_layers(g, faces, z=z, p_profile=profile, case=case) for g in settings.layers
    }


def coarsen_case(
    canonical: str | Path,
    outputs: Mapping[str, str | Path],
    settings: CoarsenSettings,
    *,
    config_record: Mapping[str, Any] | None = None,
    reference: str | Path | None = None,
) -> dict[str, Path]:
    """Coarsen one case's canonical store to every scale of ``outputs`` in one pass.

    Parameters
    ----------
    canonical
        The case's canonical store.
    outputs
        Store label -> store path to write (:attr:`CoarsenSettings.store_labels`: the
        scales' stores and their layer stores). A skipped scale (``on_misfit: skip``) gets
        stores with no data variables whose provenance records why.
    settings
        Coarsening settings (their scales must cover the labels of ``outputs``).
    config_record
        Resolved config, hashed into provenance.
    reference
        For a time segment of a case: the case's first segment, whose first output time
        (the case's first kept one) gives the pressure profile of pressure layer sets.

    Returns
    -------
    dict
        Scale label -> written store.
    """
    retain_freed_memory()
    canon = open_store(canonical)
    case = str(canon.attrs.get("case", Path(canonical).parent.name))
    dx = float(canon.attrs["dx"])
    threshold = float(canon.attrs["cloud_threshold"])
    nx, ny = canon.sizes["x"], canon.sizes["y"]
    scales, skipped = resolve_for_case(settings, dx, nx, ny, case=case)
    scales = [s for s in scales if s.label in outputs]
    if reference is not None and settings.layers:
        with open_store(reference) as ref:
            layers = case_layers(settings, ref, case)
    else:
        layers = case_layers(settings, canon, case)
    by_label = {s.label: s for s in scales}
    layer_of: dict[str, tuple[Scale, LayerGrid]] = {}  # layer store label -> scale, layers
    for lab in outputs:
        scale_lab, name = split_store_label(lab)
        if name is not None and scale_lab in by_label:
            layer_of[lab] = (by_label[scale_lab], layers[name])
    z = canon.z.values.astype(np.float64)
    written: dict[str, Path] = {}
    codecs = compressors(settings.store)

    def layout(lab: str, sample: Mapping[str, Any], slab: int) -> Any:
        if lab in layer_of:
            s, grid = layer_of[lab]
            return layer_layout(canon, s, grid, sample, settings, threshold)
        s = next(x for x in scales if x.label == lab)
        return scale_layout(canon, s, sample, settings, threshold, slab)

    def create_all(shapes: Mapping[str, Mapping[str, Any]], slab: int) -> dict[str, zarr.Group]:
        return {
            lab: create_store(tmps[lab], layout(lab, sample, slab), codecs=codecs)
            for lab, sample in shapes.items()
        }

    # The pool is left (and a pending store creation finished) before the outputs are
    # published or removed.
    with (
        _AtomicGroup({lab: Path(p) for lab, p in outputs.items()}) as tmps,
        ThreadPoolExecutor(max_workers=1) as creator,
    ):
        groups: dict[str, zarr.Group] = {}
        writers: dict[str, TimeWriter] = {}
        creating: Future[dict[str, zarr.Group]] | None = None
        # One buffer budget shared by all scales: memory does not grow with their number.
        limit = WRITE_BUFFER_BYTES // max(1, len(scales) + len(layer_of))
        with FineReader(canonical, settings) as reader:
            step = StepCoarsener(
                z,
                (reader.nz, reader.ny, reader.nx),
                scales,
                settings,
                dtype=settings.dtype,
                p_profile=reader.p_profile,
                stream=(settings.chunk_mib, reader.levels),
                stored=reader.stored,
                surface=reader.surface,
                layers=list({g.spec.name: g for _, g in layer_of.values()}.values()),
            )
            last = reader.bounds[-1][0]
            progress = StepProgress(
                f"coarsen {case}", reader.ntimes, reader.time_step_bytes, logger=log
            )
            rows: list[tuple[int, str, int, dict[str, np.ndarray]]] = []
            for j, z0, slab in reader.slabs():
                if z0 == 0:
                    step.begin()
                    if j == 0:  # create the stores (shapes known) while the first step runs
                        creating = creator.submit(create_all, step.out, reader.levels)
                step.add_slab(z0, slab)
                del slab
                # finished z-chunk rows are written now (held until the stores exist)
                rows.extend((j, lab, zs, part) for lab, zs, part in step.take_rows())
                if creating is not None and (z0 == last or creating.done()):
                    groups = creating.result()
                    creating = None
                    writers = {lab: TimeWriter(g, limit_bytes=limit) for lab, g in groups.items()}
                if writers:
                    for jr, lab, zs, part in rows:
                        writers[lab].write_rows(jr, zs, part)
                    rows.clear()
                if z0 != last:
                    continue
                fields = step.finish(reader.lwp(j), reader.surface_fields(j))
                for lab, part in fields.items():
                    if lab in writers:  # a layer store not asked for is not written
                        writers[lab].add(j, part)
                del fields
                progress.done(j)
            quantized = {
                v: {"blocks": n, "of": step.blocks[v], "scale": scales[0].label}
                for v, n in step.quantized.items()
                if n
            }
            for v, q in quantized.items():
                log.warning(
                    "case %s: %d of %d blocks of %s at scale %s have a spread within %d "
                    "float32 steps of their mean: their variance and skewness describe the "
                    "rounding of the stored values, not the field",
                    case,
                    q["blocks"],
                    q["of"],
                    v,
                    q["scale"],
                    QUANTUM_STEPS_BLOCK,
                )
        for w in writers.values():
            w.flush()
        for lab, tmp in tmps.items():
            scale_lab, layer_name = split_store_label(lab)
            s = next((x for x in scales if x.label == scale_lab), None)
            if s is None:
                g = create_store(tmp, {})
                reason = next(
                    (k["reason"] for k in skipped if _label(k["scale"]) == scale_lab),
                    "not computed",
                )
                info = {"scale": scale_lab, "skip_reason": reason}
            else:
                g = groups[lab]
                info = {"scale": scale_lab, "factor": s.factor, "length_m": s.length_m, "dx": dx}
            if layer_name is not None:
                info["layers"] = layer_record(layers.get(layer_name), layer_name)
            step = provenance.new_step(
                "coarsen",
                case=case,
                canonical=str(canonical),
                settings=settings.to_dict(),
                skipped=skipped,
                quantized_blocks=quantized,
                **info,
                config_sha256=None
                if config_record is None
                else provenance.config_sha(config_record),
            )
            attrs = dict(canon.attrs)
            attrs.update(
                {
                    "title": f"lesprep coarse fields of case {case} at scale {lab}",
                    "summary": "Block statistics of the canonical fine fields on coarse "
                    "cells, GCM-view inputs and fine patches.",
                }
            )
            if s is not None:
                attrs.update(
                    {
                        "scale": scale_lab,
                        "factor": s.factor,
                        "length_m": s.length_m,
                        "patch_size": settings.patch_size if lab in settings.patch_scales else 0,
                        "patch_halo": settings.patch_halo,
                        "zero_variance_skewness": 0.0,
                        "variance_convention": "population (M2 / n)",
                    }
                )
                if layer_name is not None:
                    grid = layers[layer_name]
                    attrs.update(
                        {
                            "layers": layer_name,
                            "vertical_weighting": grid.spec.weighting,
                            "cloud_fraction_target": grid.spec.target,
                            "layer_interfaces_m": [float(v) for v in grid.faces],
                            "patch_size": 0,
                        }
                    )
            else:
                attrs["skipped"] = info["skip_reason"]
            g.attrs.update(provenance.extend(attrs, step, f"coarsened case {case} to {lab}"))
            consolidate(tmp)
            written[lab] = Path(outputs[lab])
    canon.close()
    return written


def layer_record(grid: LayerGrid | None, name: str) -> dict[str, Any]:
    """Provenance of a layer store's layers: the set as configured and as resolved."""
    if grid is None:
        return {"name": name}
    rec: dict[str, Any] = {
        **grid.spec.to_dict(),
        "interfaces_m": [float(v) for v in grid.faces],
        "notes": list(grid.notes),
    }
    if grid.pressure_faces is not None:
        rec["interfaces_pa"] = [float(v) for v in grid.pressure_faces]
        rec["pressure_profile"] = "horizontal mean at the first kept output time"
    return rec


def _label(text: str) -> str:
    from lesprep.scales.spec import parse_scale

    return parse_scale(int(text) if text.isdigit() else text).label


class _AtomicGroup:
    """Several atomic outputs published together, only if all succeed."""

    def __init__(self, finals: Mapping[str, Path]) -> None:
        self.finals = dict(finals)
        self._ctx = {k: atomic_path(p) for k, p in self.finals.items()}

    def __enter__(self) -> dict[str, Path]:
        return {k: c.__enter__() for k, c in self._ctx.items()}

    def __exit__(self, *exc: Any) -> None:
        for c in self._ctx.values():
            c.__exit__(*exc)

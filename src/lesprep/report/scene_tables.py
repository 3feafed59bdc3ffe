"""The scene table: descriptors of every kept output time, per case and gathered.

The workflow writes one table per case (:func:`write_case_scenes_tsv`, from that case's
canonical store only) and gathers them into ``results/scenes.tsv``
(:func:`gather_scenes_tsv`), so a new case describes its own scenes and nothing else.
Every table is UTF-8 tab-separated text with a header line, floats written with
``%.9g``, written into a temporary sibling and renamed into place. Columns: ``case``,
``time_s`` (s since the time origin), the fields of
:class:`lesprep.report.scenes.SceneDescriptors` and ``domain_m``.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping, Sequence
from pathlib import Path

import pandas as pd

from lesprep.errors import InputError
from lesprep.report.scenes import SceneDescriptors, describe_case
from lesprep.report.stores import opened_store

__all__ = [
    "SCENE_COLUMNS",
    "case_scenes",
    "gather_scenes_tsv",
    "scenes_for_case",
    "write_case_scenes_tsv",
    "write_scenes_tsv",
]

SCENE_COLUMNS = (
    "case",
    "time_s",
    *(f.name for f in dataclasses.fields(SceneDescriptors)),
    "domain_m",
)
"""Columns of a scene table, in order."""


def scenes_for_case(canonical_path: str | Path) -> pd.DataFrame:
    """Scene descriptors of every kept output time of one case.

    Parameters
    ----------
    canonical_path
        A case's canonical store; ``lwp`` and the column-cloudy field (any
        ``cloud_mask`` over z) are passed to :func:`lesprep.report.scenes.describe_case` with
        the store's ``dx`` (read one time at a time).

    Returns
    -------
    pandas.DataFrame
        Columns ``time`` (s since the time origin), the fields of
        :class:`lesprep.report.scenes.SceneDescriptors` and ``domain_m``, the shorter
        horizontal side of the domain (m; the fundamental wavelength of the spectrum), one
        row per kept time.

    Examples
    --------
    >>> scenes = scenes_for_case("results/cases/sc-ostra-01/canonical.zarr")
    >>> scenes.columns[0], scenes.columns[-1]
    ('time', 'domain_m')
    >>> scenes["time"].tolist(), scenes["domain_m"].tolist()  # 16 points of 50 m
    ([3600.0, 5400.0, 7200.0], [800.0, 800.0, 800.0])
    """
    with opened_store(canonical_path, ("lwp", "cloud_mask"), chunks={}) as ds:
        column_cloudy = (ds["cloud_mask"] > 0).any("z")
        dx = float(ds.attrs["dx"])
        frame = describe_case(ds["lwp"], column_cloudy, dx)
        frame["domain_m"] = min(ds["lwp"].shape[-2:]) * dx
        return frame


def _write_tsv(table: pd.DataFrame, out_tsv: str | Path) -> Path:
    out = Path(out_tsv)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp-{os.getpid()}")
    table.to_csv(tmp, sep="\t", index=False, float_format="%.9g", lineterminator="\n")
    os.replace(tmp, out)
    return out


def case_scenes(canonical_path: str | Path, case: str) -> pd.DataFrame:
    """:func:`scenes_for_case` with the columns of :data:`SCENE_COLUMNS`."""
    frame = scenes_for_case(canonical_path).rename(columns={"time": "time_s"})
    frame.insert(0, "case", case)
    return frame[list(SCENE_COLUMNS)]


def write_case_scenes_tsv(canonical_path: str | Path, case: str, out_tsv: str | Path) -> Path:
    """Scene table of one case.

    Parameters
    ----------
    canonical_path
        The case's canonical store.
    case
        Case id written in the ``case`` column.
    out_tsv
        Table to write (one row per kept time, :data:`SCENE_COLUMNS`).

    Returns
    -------
    pathlib.Path
        ``out_tsv``.
    """
    return _write_tsv(case_scenes(canonical_path, case), out_tsv)


def gather_scenes_tsv(case_tables: Sequence[str | Path], out_tsv: str | Path) -> Path:
    """One scene table from per-case tables, in the order given.

    Parameters
    ----------
    case_tables
        Tables written by :func:`write_case_scenes_tsv`.
    out_tsv
        Table to write.

    Returns
    -------
    pathlib.Path
        ``out_tsv``.

    Raises
    ------
    InputError
        A table's columns are not :data:`SCENE_COLUMNS` (names the file).
    """
    frames = []
    for path in case_tables:
        frame = pd.read_csv(path, sep="\t", dtype={"case": str})
        if list(frame.columns) != list(SCENE_COLUMNS):
            raise InputError(
                f"scene table has columns {list(frame.columns)}; expected {list(SCENE_COLUMNS)}",
                file=str(path),
                hint="delete it so the workflow writes it again",
            )
        frames.append(frame)
    table = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=SCENE_COLUMNS)
    return _write_tsv(table, out_tsv)


def write_scenes_tsv(canonical_paths: Mapping[str, str | Path], out_tsv: str | Path) -> Path:
    """Scene descriptors of several cases as one table (cases in the order given).

    Parameters
    ----------
    canonical_paths
        Case id -> canonical store.
    out_tsv
        Table to write (:data:`SCENE_COLUMNS`, one row per case and kept time).

    Returns
    -------
    pathlib.Path
        ``out_tsv``.

    Examples
    --------
    >>> stores = {
    ...     "sc-ostra-01": "results/cases/sc-ostra-01/canonical.zarr",
    ...     "cu-marro-01": "results/cases/cu-marro-01/canonical.zarr",
    ... }
    >>> table = pd.read_csv(write_scenes_tsv(stores, "scenes.tsv"), sep="\\t")
    >>> tuple(table.columns) == SCENE_COLUMNS
    True
    >>> table.groupby("case", sort=False).size().to_dict()  # one row per kept time
    {'sc-ostra-01': 3, 'cu-marro-01': 2}
    """
    frames = [case_scenes(path, case) for case, path in canonical_paths.items()]
    table = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=SCENE_COLUMNS)
    return _write_tsv(table, out_tsv)

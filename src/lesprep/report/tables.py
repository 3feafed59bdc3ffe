"""Report tables: the baseline skill table and the scene table as reStructuredText.

The baseline table is written atomically as tab-separated text
(:func:`write_baseline_table`); :func:`write_report_tables` writes it and a copy of the
split table. The scene table itself is written per case by
:mod:`lesprep.report.scene_tables`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd

from lesprep.report.skill import BASELINES, baseline_skill
from lesprep.sets.splits import read_assignment_tsv


def _cell(value: float, fmt: str) -> str:
    return "n/a" if not np.isfinite(value) else format(value, fmt)


def scene_table_rst(
    scenes_tsv: str | Path, splits_tsv: str | Path, out_rst: str | Path | None = None
) -> str:
    """A reStructuredText table of every case: split assignment and scene descriptors.

    Parameters
    ----------
    scenes_tsv
        Table written by :func:`lesprep.report.scene_tables.gather_scenes_tsv`.
    splits_tsv
        The split assignment (``results/splits.tsv``).
    out_rst
        File to write the table to, or None to only return it.

    Returns
    -------
    str
        A ``list-table`` with one row per case of the assignment (in its order): regime,
        split and its reason, kept times, and over those times the mean LWP (g m-2), the
        mean population standard deviation of LWP (g m-2), the mean cloud cover, the
        median spectral-peak wavelength (km, over times with a peak) and how many times
        peak at the domain scale. Cases without scene rows show ``n/a``.

    Examples
    --------
    >>> table = scene_table_rst("results/scenes.tsv", "results/splits.tsv")
    >>> print(table)  # doctest: +ELLIPSIS
    .. list-table:: Cases, their split and their liquid-water-path scenes (...)
       :header-rows: 1
    <BLANKLINE>
       * - case
         - regime
         - split (reason)
         - kept times
    ...
       * - sc-ostra-01
         - stratocumulus
         - test (pinned)
         - 3
    ...
       * - cu-marro-01
         - cumulus
         - train (pinned)
    ...
    """
    scenes = pd.read_csv(scenes_tsv, sep="\t")
    assignment = read_assignment_tsv(splits_tsv)
    header = [
        "case",
        "regime",
        "split (reason)",
        "kept times",
        "mean LWP (g m-2)",
        "LWP std (g m-2)",
        "cloud cover (1)",
        "peak wavelength (km)",
        "peak at domain",
    ]
    rows = []
    for a in assignment:
        sub = scenes[scenes["case"] == a.case]
        n = len(sub)
        if n:
            peaks = sub["peak_wavelength_m"].to_numpy(dtype=np.float64)
            peaks = peaks[np.isfinite(peaks)]
            at_domain = sub["peak_at_domain"].astype(str).str.lower().eq("true").sum()
            cells = [
                str(n),
                _cell(1000.0 * float(sub["lwp_mean"].mean()), ".1f"),
                _cell(1000.0 * float(sub["lwp_std"].mean()), ".1f"),
                _cell(float(sub["cloud_cover"].mean()), ".2f"),
                _cell(float(np.median(peaks)) / 1000.0 if peaks.size else math.nan, ".2f"),
                f"{int(at_domain)} of {n}",
            ]
        else:
            cells = ["0", "n/a", "n/a", "n/a", "n/a", "n/a"]
        rows.append([a.case, a.regime or "-", f"{a.split} ({a.reason})", *cells])
    lines = [
        ".. list-table:: Cases, their split and their liquid-water-path scenes "
        "(means over the kept output times)",
        "   :header-rows: 1",
        "",
    ]
    for row in [header, *rows]:
        for i, cell in enumerate(row):
            lines.append(("   * - " if i == 0 else "     - ") + cell)
    text = "\n".join(lines) + "\n"
    if out_rst is not None:
        out = Path(out_rst)
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(text, encoding="utf-8")
    return text


def write_baseline_table(sets: Mapping[str, str | Path], out_tsv: str | Path) -> Path:
    """Skill of the baselines per split and scale, as a TSV.

    One row per split, scale and row of :data:`lesprep.report.skill.BASELINES`: the
    Sundqvist et al. (1989) scheme against ``cloud_fraction``, the Gaussian-PDF scheme
    against ``cloud_fraction`` and against ``cloud_fraction_zero``.

    Parameters
    ----------
    sets
        ``"<split>/<scale>"`` -> training store.
    out_tsv
        Table to write (columns split, scale, baseline, target, rmse, bias, mae, n),
        atomically.
    """
    rows = ["split\tscale\tbaseline\ttarget\trmse\tbias\tmae\tn"]
    for key in sorted(sets):
        split, scale = key.split("/", 1)
        for name, predicted, target in BASELINES:
            skill = baseline_skill(sets[key], predicted=predicted, target=target)
            rows.append(
                f"{split}\t{scale}\t{name}\t{target}\t{skill['rmse']:.6g}\t"
                f"{skill['bias']:.6g}\t{skill['mae']:.6g}\t{int(skill['n'])}"
            )
    out = Path(out_tsv)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp")
    tmp.write_text("\n".join(rows) + "\n")
    tmp.replace(out)
    return out


def write_report_tables(
    sets: Mapping[str, str | Path],
    *,
    splits: str | Path,
    baseline_out: str | Path,
    splits_out: str | Path,
) -> None:
    """Write the report's tables: baseline skill and a copy of the split table.

    Parameters
    ----------
    sets
        ``"<split>/<label>"`` -> training store.
    splits
        The split assignment table to copy.
    baseline_out, splits_out
        Output files.
    """
    import shutil

    write_baseline_table(sets, baseline_out)
    shutil.copyfile(splits, splits_out)

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
    and scale); a layer store (``scale-<L>_layers-<name>.zarr``) records the coarsening
    to scale ``L`` with layer set ``name``.
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
    stores every ``*_mean``, ``*_var``, ``*_skew`` and ``cloud_fraction``, and their lagged
    copies ``*_lag<k>`` (skewness is 0, not NaN, where the block variance is 0).
``consistency``
    a per-case scale store has its canonical store's times and heights (a layer store:
    the midpoints and bounds of the layer interfaces its ``coarsen`` step recorded) and
    ``n // f`` cells across; a set store's sample count equals the per-case cells that pass the
    filters its ``assemble`` step recorded (``z_range_m``, ``time_stride``, the times
    dropped for ``lags``), in total and per case; its features exist in the per-case
    stores with matching shapes; and for a seeded random sample of ``sample_checks``
    samples per set store, the sample's ``(case, time, z, y, x)`` is a cell of that case's
    store and every feature equals the per-case value cast to the set's dtype (exactly;
    NaN equals NaN), a lagged feature ``<f>_lag<k>`` the value of ``f`` ``k`` output
    times earlier.

``VerifyReport.checked`` counts what was examined per check: stores (``open``,
``provenance``), distinct raw files (``raw_files``), set stores plus ``splits.tsv``
(``splits``), train scales (``normalization``), arrays scanned (``nan``), store pairs
compared (``consistency``) and, under ``samples``, set samples compared value by value.
"""

from __future__ import annotations

from pathlib import Path

from lesprep.errors import InputError
from lesprep.verify.consistency import check_consistency
from lesprep.verify.findings import ResultsTree, VerifyReport, discover
from lesprep.verify.lineage import check_open, check_provenance, check_raw_files
from lesprep.verify.nonfinite import check_nan
from lesprep.verify.normalization import check_normalization
from lesprep.verify.splitsets import check_splits, read_splits

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
    A results tree of two cases, one per split, at one scale and on one layer set:

    >>> report = verify_results("results")
    >>> print(report.summary())
    verify results: OK, 0 findings
    checks:
      open: 8 stores checked, 0 failed
      provenance: 8 stores checked, 0 failed
      raw_files: 10 raw files checked, 0 failed
      splits: 3 files (set stores and splits.tsv) checked, 0 failed
      normalization: 1 train scales checked, 0 failed
      nan: 154 arrays checked, 0 failed
      consistency: 6 store pairs checked, 0 failed
        320 set samples compared
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
    tree = ResultsTree(root=root, canonical=canonical, scale=scale, sets=sets)
    check_open(tree)
    check_provenance(tree)
    check_raw_files(tree, Path(workdir).resolve() if workdir is not None else None)
    assigned = read_splits(tree)
    check_splits(tree, assigned)
    check_normalization(tree, assigned)
    check_nan(tree)
    check_consistency(tree, sample_checks, seed)
    return VerifyReport(findings=tree.findings, checked=dict(tree.checked), results=str(results))

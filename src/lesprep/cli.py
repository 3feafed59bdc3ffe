"""The ``lesprep`` command: demo archives, provenance summaries, NetCDF export and checks.

The workflow itself runs with ``snakemake``; this command holds the tools a user runs
by hand.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path

from lesprep import __version__
from lesprep.errors import LesprepError


def _cmd_demo(args: argparse.Namespace) -> int:
    from lesprep.demo import DEMO_CASES, demo_case, write_demo_case

    ids = args.case or [c.case for c in DEMO_CASES]
    size = {k: getattr(args, k) for k in ("nx", "ny", "nz", "ntimes") if getattr(args, k)}
    for cid in ids:
        spec = demo_case(cid)
        if size:
            spec = spec.with_size(**size)
        path = write_demo_case(spec, args.out, compress=args.compress)
        print(f"wrote {path} ({spec.flavour}, {spec.nx}x{spec.ny}x{spec.nz}, {spec.ntimes} times)")
    return 0


def _cmd_provenance(args: argparse.Namespace) -> int:
    from lesprep.provenance import load, summarize
    from lesprep.store import open_store

    ds = open_store(args.store)
    prov = load(ds.attrs)
    if args.json:
        print(json.dumps(prov, indent=2, sort_keys=True, default=str))
    else:
        print(summarize(prov, attrs=dict(ds.attrs), path=str(args.store)))
    return 0


def _cmd_export(args: argparse.Namespace) -> int:
    from lesprep.store import export_netcdf

    print(f"wrote {export_netcdf(args.store, args.out)}")
    return 0


def _cmd_verify(args: argparse.Namespace) -> int:
    from lesprep.verify import verify_results

    report = verify_results(args.results, sample_checks=args.samples, workdir=args.workdir)
    print(report.summary())
    return 0 if report.ok else 1


def _cmd_inspect(args: argparse.Namespace) -> int:
    from lesprep.raw.survey import draft_varmap, inspect_files

    report = inspect_files(args.paths)
    print(report.summary())
    if args.draft:
        args.draft.write_text(draft_varmap(report, flavour=args.flavour))
        print(f"wrote draft variable map {args.draft}: edit it, then name it in the case sheet")
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``lesprep``."""
    p = argparse.ArgumentParser(
        prog="lesprep",
        description="Turn LES output into multi-scale ML training data. The workflow runs "
        "with `snakemake`; these are the tools around it.",
    )
    p.add_argument("--version", action="version", version=f"lesprep {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    d = sub.add_parser("demo", help="write the synthetic demo LES archives (invented cases)")
    d.add_argument("--out", default="resources/demo", help="folder to write into")
    d.add_argument("--case", action="append", help="demo case id (repeatable; default all)")
    for k in ("nx", "ny", "nz", "ntimes"):
        d.add_argument(f"--{k}", type=int, help=f"override the demo grid's {k}")
    d.add_argument("--compress", action="store_true", help="zlib-compress the NetCDF files")
    d.set_defaults(func=_cmd_demo)

    pr = sub.add_parser("provenance", help="print the lineage recorded in a store")
    pr.add_argument("store", type=Path, help="a lesprep Zarr store")
    pr.add_argument("--json", action="store_true", help="print the full record as JSON")
    pr.set_defaults(func=_cmd_provenance)

    e = sub.add_parser("export", help="write a store as one CF NetCDF-4 file")
    e.add_argument("store", type=Path, help="a lesprep Zarr store")
    e.add_argument("out", type=Path, help="the NetCDF file to write")
    e.set_defaults(func=_cmd_export)

    v = sub.add_parser("verify", help="check a results tree; exit 1 on any failure")
    v.add_argument("results", type=Path, help="the results folder (e.g. results)")
    v.add_argument(
        "--samples",
        type=int,
        default=200,
        help="set samples compared with their per-case cells (default 200)",
    )
    v.add_argument(
        "--workdir",
        type=Path,
        default=None,
        help="folder the recorded raw paths are relative to (default: inferred)",
    )
    v.set_defaults(func=_cmd_verify)

    i = sub.add_parser("inspect", help="describe an unseen LES archive and draft a variable map")
    i.add_argument("paths", type=Path, nargs="+", help="NetCDF files or folders of them")
    i.add_argument("--draft", type=Path, help="write a draft variable map (YAML) here")
    i.add_argument("--flavour", default="draft", help="flavour name in the draft map")
    i.set_defaults(func=_cmd_inspect)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``lesprep`` command."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except LesprepError as exc:
        print(f"lesprep {args.command}: error: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

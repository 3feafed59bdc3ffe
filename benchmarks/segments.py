"""Per-segment throughput and memory of ingest and coarsening, and the cost of the gather.

Runs on the benchmark archive that ``benchmarks/run.py`` generates (default: 512 x 512 x
160, 12 output times, ``<out>/data/<size>/raw/``): plans it into time segments of
``--times`` output times, ingests and coarsens every segment in a fresh process each
(wall time, peak resident memory), then joins the segments into the per-case stores as
the workflow's gather jobs do, and prints a table (also written as JSON).

    .venv/bin/python benchmarks/segments.py --out /tmp/benchfull --times 4
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from helpers import power_factors  # noqa: E402


def _peak_mib() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def child(args: argparse.Namespace) -> None:
    """One measured step in this (fresh) process; prints a JSON record."""
    from workers import _coarsen_settings, _ingest_settings

    from lesprep.segments.plan import Segment

    spec = json.loads(Path(args.spec).read_text())
    seg = Segment.from_dict(spec["segment"])
    t0 = time.perf_counter()
    if args.child == "ingest":
        from lesprep.canonical.ingest import ingest_case

        ingest_case(
            case="bench",
            raw=list(seg.files),
            varmap=spec["varmap"],
            settings=_ingest_settings(),
            out=spec["canonical"],
            segment=seg.to_dict(),
        )
        nbytes = sum(os.path.getsize(f) for f in seg.files)
    else:
        from lesprep.scales.coarsen import coarsen_case

        settings = _coarsen_settings(spec["scales"], spec["patch_scales"])
        coarsen_case(spec["canonical"], spec["outputs"], settings)
        nbytes = sum(f.stat().st_size for f in Path(spec["canonical"]).rglob("*") if f.is_file())
    dt = time.perf_counter() - t0
    print(json.dumps({"time_s": dt, "peak_mib": _peak_mib(), "input_bytes": nbytes}))


def run_child(kind: str, spec: dict[str, Any], work: Path) -> dict[str, Any]:
    path = work / f"{kind}-{spec['segment']['name']}.json"
    path.write_text(json.dumps(spec))
    out = subprocess.run(
        [sys.executable, __file__, "--child", kind, "--spec", str(path)],
        capture_output=True,
        text=True,
        check=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(HERE / "out"))
    ap.add_argument("--size", default="512x512x160x12")
    ap.add_argument("--times", type=int, default=4, help="output times per segment")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--spec", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args)
        return
    from workers import _ingest_settings

    from lesprep.segments.gather import gather_stores
    from lesprep.segments.plan import SegmentSettings, plan_case

    data = Path(args.out) / "data" / args.size
    raw = sorted((data / "raw").rglob("*.nc"))
    varmap = str(HERE.parent / "config/varmaps/flavour-alpha.yaml")
    nx = int(args.size.split("x")[0])
    scales = [f"{f * 50:g} m" for f in power_factors(nx, nx)]
    patch_scales = [scales[4]] if len(scales) > 4 else []
    plan = plan_case(
        "bench", raw, varmap, _ingest_settings(), SegmentSettings(times=args.times, settle_s=0)
    )
    work = data / "segments"
    work.mkdir(exist_ok=True)
    rows = []
    canon, scale_out = [], {}
    for seg in plan.segments:
        d = work / seg.name
        spec = {
            "segment": seg.to_dict(),
            "varmap": varmap,
            "canonical": str(d / "canonical.zarr"),
            "scales": scales,
            "patch_scales": patch_scales,
        }
        ing = run_child("ingest", spec, work)
        labels = [s.replace(" ", "") for s in scales]
        spec["outputs"] = {lab: str(d / f"scale-{lab}.zarr") for lab in labels}
        co = run_child("coarsen", spec, work)
        canon.append(d / "canonical.zarr")
        for lab, p in spec["outputs"].items():
            scale_out.setdefault(lab, []).append(p)
        rows.append({"segment": seg.name, "times": len(seg.times), "ingest": ing, "coarsen": co})
        print(
            f"{seg.name}: {len(seg.times)} times; ingest {ing['time_s']:.1f} s, "
            f"{ing['input_bytes'] / 1e6 / ing['time_s']:.0f} MB/s, peak {ing['peak_mib']:.0f} "
            f"MiB; coarsen {co['time_s']:.1f} s, peak {co['peak_mib']:.0f} MiB",
            flush=True,
        )
    gathers = []
    for n in range(1, len(canon) + 1):  # the gather after each new segment
        t0 = time.perf_counter()
        facts = gather_stores(canon[:n], work / "gathered" / "canonical.zarr")
        for lab, paths in scale_out.items():
            f = gather_stores(paths[:n], work / "gathered" / f"scale-{lab}.zarr")
            facts["linked"] += f["linked"]
            facts["bytes_written"] += f["bytes_written"]
        dt = time.perf_counter() - t0
        gathers.append({"segments": n, "time_s": dt, **facts})
        print(
            f"gather of {n} segment(s): {dt:.2f} s, {facts['linked']} chunk files linked, "
            f"{facts['bytes_written']} bytes written",
            flush=True,
        )
    result = {"size": args.size, "times_per_segment": args.times, "rows": rows, "gathers": gathers}
    (work / "segments.json").write_text(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()

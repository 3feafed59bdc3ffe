"""The suite: which comparisons run, in which order, and the summary table."""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from helpers import (
    BALLAST,
    CASE,
    MIB,
    PATCH_LENGTHS_M,
    PATCH_SIZE,
    SPINUP,
    STORE,
    TARGETS,
    THRESHOLD,
    ballast_file,
    comparison,
    label_of,
    meminfo_bytes,
    power_factors,
    remove,
    scale_texts,
)
from runner import Runner, code_identity, fmt, machine_info, print_table
from workers import raw_files

# ------------------------------------------------------------------------------- comparisons


@dataclass
class Job:
    """One measured worker run: result key, worker, parameters, inputs to warm, scratch."""

    key: str
    worker: str
    params: dict[str, Any]
    warm: list[Path]
    cleanup: list[Path] = field(default_factory=list)
    prepare: list[Path] = field(default_factory=list)


RUN_FIELDS = ("time_s", "peak_rss_mib", "user_s", "system_s", "minor_faults", "process_wall_s")


class Suite:
    """The comparisons of one run, sharing paths and results."""

    def pair(self, a: Job, b: Job) -> tuple[dict[str, Any], dict[str, Any]]:
        """Run ``a`` and ``b`` side by side ``--repeat`` times (order a b, b a, a b, ...).

        Each side keeps its fastest run, with every run's numbers under ``runs``.
        """
        runs: dict[str, list[dict[str, Any]]] = {a.key: [], b.key: []}
        for i in range(max(1, self.args.repeat)):
            for job in (a, b) if i % 2 == 0 else (b, a):
                res = self.r.step(
                    job.key,
                    job.worker,
                    job.params,
                    warm_paths=job.warm,
                    record=False,
                    prepare=job.prepare,
                )
                for path in job.cleanup:
                    remove(path)
                runs[job.key].append(res)
        out = []
        for job in (a, b):
            best = dict(min(runs[job.key], key=lambda x: x["time_s"]))
            best["runs"] = [{k: x.get(k) for k in RUN_FIELDS} for x in runs[job.key]]
            self.r.results["steps"][job.key] = best
            out.append(best)
        self.r.save()
        return out[0], out[1]

    def __init__(self, args: argparse.Namespace) -> None:
        self.args = args
        key = f"{args.nx}x{args.ny}x{args.nz}x{args.ntimes}"
        self.data = Path(args.out) / "data" / key
        self.raw_root = self.data / "raw"
        self.raw_dir = self.raw_root / CASE
        self.canonical = self.data / "canonical.zarr"
        self.lesprep_dir = self.data / "lesprep"
        env = dict(kv.split("=", 1) for kv in args.worker_env)
        self.r = Runner(Path(args.out), Path(args.json), args.step_timeout, env)
        if args.settle_free > 0:  # every step starts with little free memory
            self.r.settle_paths = [self.raw_root, self.canonical, self.data / BALLAST]
            self.r.settle_free = int(args.settle_free * 2**30)
        self.dx = 50.0  # the demo cases' spacing (lesprep.demo.DemoCase.dx)
        self.scales = scale_texts(args.nx, args.ny, self.dx)
        self.labels = [label_of(float(s.split()[0])) for s in self.scales]
        factors = power_factors(args.nx, args.ny)
        self.patch_scales = [
            f"{L:g} m"
            for L in PATCH_LENGTHS_M
            if round(L / self.dx) in factors and round(L / self.dx) % PATCH_SIZE == 0
        ]
        self.r.results["config"] = {
            "case": CASE,
            "size": {"nx": args.nx, "ny": args.ny, "nz": args.nz, "ntimes": args.ntimes},
            "float32_3d_variable_gb": args.nx * args.ny * args.nz * args.ntimes * 4 / 1e9,
            "scales": self.scales,
            "patch_scales": self.patch_scales,
            "patch_size": PATCH_SIZE,
            "store": STORE,
            "spinup": SPINUP,
            "cloud_threshold": THRESHOLD,
            "data": str(self.data),
            "argv": sys.argv[1:],
            "worker_env": env,
            "repeat": args.repeat,
        }

    # ------------------------------------------------------------------ setup
    def setup(self) -> None:
        a = self.args
        self.r.results["machine"] = machine_info(Path(a.out))
        self.r.results["code"] = code_identity()
        c = self.r.results["code"]
        print(
            f"lesprep code: git {c.get('git_head', '?')}, src sha256 {c['src_sha256'][:12]}, "
            f"uncommitted in src: {c.get('src_uncommitted') or 'none'}"
        )
        info = self.r.step("info", "info", {}, record=False)
        self.r.results["versions"] = {k: v for k, v in info.items() if isinstance(v, str)}
        self.r.results["machine"]["numba_threads"] = info.get("numba_threads")
        time.sleep(20)  # let freed pages go back to the host, as between real jobs
        touch = self.r.step("touch", "touch", {"gib": 2.0}, record=False)
        for k in ("first_touch_gbps", "second_touch_gbps", "rewrite_gbps"):
            self.r.results["machine"][f"memory_{k}"] = touch[k]
        m, v = self.r.results["machine"], self.r.results["versions"]
        print(
            f"machine: {m.get('nproc')} CPUs ({m.get('cpu', '?')}), {m.get('ram_gib')} GiB RAM, "
            f"disk {m.get('disk_free_gb', 0):.0f} GB free, sequential write "
            f"{m.get('page_cache_write_gbps', 0):.2f} GB/s to the page cache, "
            f"{m.get('fsync_write_gbps', 0):.2f} GB/s with fsync; fresh memory first touched at "
            f"{m.get('memory_first_touch_gbps', 0):.2f} GB/s, touched again at "
            f"{m.get('memory_second_touch_gbps', 0):.2f} GB/s; free page reporting to the "
            f"host: {({True: 'yes', False: 'no'}).get(m.get('free_page_reporting'), 'not seen')}"
        )
        print("versions: " + ", ".join(f"{k} {val}" for k, val in v.items()), flush=True)
        res = self.r.step(
            "generate",
            "generate",
            {
                "nx": a.nx,
                "ny": a.ny,
                "nz": a.nz,
                "ntimes": a.ntimes,
                "root": str(self.raw_root),
                "skip": a.skip_generate,
            },
            timeout=max(3600.0, 80.0 * a.ntimes * (a.nx * a.ny * a.nz) / (512 * 512 * 160)),
        )
        print(f"     archive {'reused' if res.get('cached') else 'generated'}: {self.raw_dir}")
        self.files = raw_files(self.raw_dir)
        self.raw_size = sum(Path(f).stat().st_size for f in self.files)
        self.r.results["config"]["raw_files"] = len(self.files)
        self.r.results["config"]["raw_gb"] = self.raw_size / 1e9
        if self.r.settle_paths:  # so that settling reaches its target whatever the RAM
            need = meminfo_bytes("MemTotal") - self.r.settle_free - self.raw_size + 2**30
            made = ballast_file(self.data / BALLAST, max(0, need))
            self.r.results["config"].update(made)
            print(f"     settling ballast: {made['ballast_gib']:.1f} GiB", flush=True)
        self.r.step("jit_warm", "jit_warm", {})

    # ------------------------------------------------------------------ 3: ingest
    def ingest(self) -> None:
        r = self.r
        floor_out = self.data / "floor-canonical.zarr"
        les, floor = self.pair(
            Job(
                "ingest_lesprep",
                "ingest",
                {"files": self.files, "out": str(self.canonical)},
                [self.raw_dir],
            ),
            Job(
                "ingest_floor",
                "ingest_floor",
                {"files": self.files, "canonical": str(self.canonical), "out": str(floor_out)},
                [self.raw_dir],
                cleanup=[floor_out],
            ),
        )
        r.results["comparisons"]["ingest_vs_floor"] = comparison(
            les["time_s"] / floor["time_s"], "<=", TARGETS["ingest_floor"]
        )
        r.save()

    # ------------------------------------------------------------------ 1, 2: coarsen
    def coarsen(self) -> None:
        r = self.r
        if not (self.canonical / "zarr.json").exists():
            raise RuntimeError(f"no canonical store at {self.canonical}; run the ingest step")
        floor_dir = self.data / "floor-scales"
        les, floor = self.pair(
            Job(
                "coarsen_lesprep",
                "coarsen",
                {
                    "canonical": str(self.canonical),
                    "outdir": str(self.lesprep_dir),
                    "scales": self.scales,
                    "patch_scales": self.patch_scales,
                },
                [self.canonical],
                prepare=[self.lesprep_dir],  # removed before settling, not in the worker
            ),
            Job(
                "coarsen_floor",
                "coarsen_floor",
                {
                    "canonical": str(self.canonical),
                    "lesprep_dir": str(self.lesprep_dir),
                    "labels": self.labels,
                    "out": str(floor_dir),
                },
                [self.canonical],
                cleanup=[floor_dir],
            ),
        )
        r.results["comparisons"]["coarsen_vs_floor"] = comparison(
            les["time_s"] / floor["time_s"], "<=", TARGETS["coarsen_floor"]
        )
        r.save()

    def xarray(self) -> None:
        r = self.r
        a = self.args
        les = r.results["steps"].get("coarsen_lesprep")
        if les is None or "error" in les:
            raise RuntimeError("needs the lesprep coarsening step of this run")
        xdir = self.data / "xarray"
        params = {
            "canonical": str(self.canonical),
            "outdir": str(xdir),
            "scales": self.scales,
            "patch_scales": self.patch_scales,
        }
        nt = a.ntimes
        k = min(nt, a.xr_times or 1)
        key = "coarsen_xarray" if a.xr_times or k == nt else "coarsen_xarray_pilot"
        runs = [
            r.step(key, "coarsen_xarray", {**params, "ntimes": k}, warm_paths=[self.canonical])
            for _ in range(max(1, a.repeat) if k < nt else 1)
        ]
        res = dict(min(runs, key=lambda x: x["time_s"]))
        if len(runs) > 1:
            res["runs"] = [{f: x.get(f) for f in RUN_FIELDS} for x in runs]
        r.results["steps"][key] = res
        if key == "coarsen_xarray_pilot":
            if res["time_s"] * nt / k <= a.xr_budget:
                res = r.step(
                    "coarsen_xarray",
                    "coarsen_xarray",
                    {**params, "ntimes": nt},
                    warm_paths=[self.canonical],
                )
            else:
                r.results["steps"]["coarsen_xarray"] = res
        k = res["ntimes"]
        full = res["time_s"] * nt / k
        res["time_full_s"] = full
        res["extrapolated"] = k < nt
        res["note"] = (
            f"measured on {k} of {nt} times, scaled x{nt / k:g}" if k < nt else "all times"
        )
        chk = r.step(
            "check_xarray_vs_lesprep",
            "check",
            {
                "lesprep_dir": str(self.lesprep_dir),
                "xarray_dir": str(xdir),
                "labels": sorted(
                    {
                        self.labels[0],
                        self.labels[-1],
                        *(label_of(float(s.split()[0])) for s in self.patch_scales),
                    },
                    key=lambda s: float(s[:-1]),
                ),
                "ntimes": k,
            },
        )
        if not a.keep:
            remove(xdir)
        speedup = full / les["time_s"]
        r.results["comparisons"]["xarray_vs_lesprep"] = comparison(
            speedup, ">=", TARGETS["xarray_speedup"], same_numbers=chk["ok"], note=res["note"]
        )
        r.save()
        self._print_check(chk)

    def _print_check(self, chk: Mapping[str, Any]) -> None:
        by_var: dict[str, list[tuple[str, dict[str, Any]]]] = {}
        for lab, res in chk["scales"].items():
            for name, c in res.items():
                by_var.setdefault(name, []).append((lab, c))
        rows = []
        for name, items in sorted(by_var.items()):
            cs = [c for _, c in items]
            bad = [lab for lab, c in items if not c.get("ok")]
            rows.append(
                [
                    name,
                    " ".join(lab for lab, _ in items),
                    "yes" if not bad else "NO at " + " ".join(bad),
                    sum(c.get("compared", 0) for c in cs),
                    sum(c.get("mismatched", 0) for c in cs),
                    fmt(max(c.get("max_abs", 0.0) for c in cs), ".2e"),
                    fmt(max(c.get("max_rel", 0.0) for c in cs), ".2e"),
                    f"rtol {cs[0].get('rtol')}"
                    + (
                        f"; incl. {sum(c['constant'] for c in cs)} constant and "
                        f"{sum(c['near_constant'] for c in cs)} near-constant blocks"
                        if "constant" in cs[0]
                        else ""
                    ),
                ]
            )
        print(f"\nlesprep vs xarray script on the first {chk.get('ntimes', '?')} time(s):")
        text = print_table(
            ["variable", "scales", "same", "cells", "differ", "max |diff|", "max rel", "test"],
            rows,
        )
        self.r.results["check_table"] = text

    # ------------------------------------------------------------------ 4: memory
    def memory(self) -> None:
        r = self.r
        a = self.args
        mode = a.memory_mode
        if mode == "auto":
            free = shutil.disk_usage(self.data).free
            extra = 3 * self.raw_size
            mode = "extend" if extra <= a.mem_extend_max_gb * 1e9 and 4 * extra < free else "subset"
        mdir = self.data / "memory"
        remove(mdir)
        mdir.mkdir(parents=True)
        steps = r.results["steps"]
        if "ingest_lesprep" not in steps or "coarsen_lesprep" not in steps:
            raise RuntimeError("needs the ingest and coarsening steps of this run")
        cparams = {"scales": self.scales, "patch_scales": self.patch_scales}
        if mode == "extend":
            ext = r.step(
                "memory_extend_archive",
                "extend",
                {
                    "files": self.files,
                    "out": str(mdir / "raw"),
                    "copies": 4,
                },
            )
            other_files = ext["files"]
        else:
            other_files = self.files[: max(1, len(self.files) // 4)]
        canon2 = mdir / "canonical.zarr"
        ing = r.step(
            "memory_ingest",
            "ingest",
            {"files": other_files, "out": str(canon2)},
            warm_paths=other_files,
        )
        co = r.step(
            "memory_coarsen",
            "coarsen",
            {"canonical": str(canon2), "outdir": str(mdir / "scales"), **cparams},
            warm_paths=[canon2],
        )
        n_main, n_other = len(self.files), len(other_files)
        out = {}
        for what, main, other in (
            ("ingest", steps["ingest_lesprep"], ing),
            ("coarsen", steps["coarsen_lesprep"], co),
        ):
            small, big = (main, other) if n_other > n_main else (other, main)
            nsmall, nbig = (n_main, n_other) if n_other > n_main else (n_other, n_main)
            growth = big["peak_rss_mib"] / small["peak_rss_mib"] - 1
            out[what] = comparison(
                1 + growth,
                "<",
                1 + TARGETS["memory_growth"],
                suffix=" for 4x times",
                ntimes=[nsmall, nbig],
                peak_rss_mib=[small["peak_rss_mib"], big["peak_rss_mib"]],
                time_s=[small["time_s"], big["time_s"]],
                growth=growth,
                mode=mode,
                note=f"{nsmall} vs {nbig} times ({mode})",
            )
            r.results["comparisons"][f"memory_{what}"] = out[what]
            steps[f"memory_{what}"]["note"] = f"{n_other} times (main runs: {n_main})"
        r.save()
        if not a.keep:
            remove(mdir)

    # ------------------------------------------------------------------ 5: storage
    def storage(self) -> None:
        r = self.r
        finest = self.lesprep_dir / f"scale-{self.labels[0]}.zarr"
        res = r.step(
            "storage",
            "storage",
            {
                "canonical": str(self.canonical),
                "scale_store": str(finest),
                "tmp": str(self.data / "storage-tmp"),
                "n_samples": self.args.samples,
                "chunk_mib": 8.0,
            },
            warm_paths=[self.canonical],
        )
        self._print_storage(res)

    def _print_storage(self, res: Mapping[str, Any]) -> None:
        print("\nCodecs (chunks as the stage writes them; GB/s of uncompressed bytes)")
        rows = [
            [
                c["field"],
                c["codec"],
                fmt(c["ratio"], ".2f"),
                fmt(c["stored_bytes"] / MIB, ".1f"),
                fmt(c["write_s"], ".3f"),
                fmt(c["read_s"], ".3f"),
                fmt(c["write_gbps"], ".2f"),
                fmt(c["read_gbps"], ".2f"),
            ]
            for c in res["codecs"]
        ]
        t1 = print_table(
            ["field", "codec", "ratio", "MiB", "write s", "read s", "write GB/s", "read GB/s"],
            rows,
        )
        print("\nChunk shapes (blosc-lz4 5)")
        rows = [
            [
                c["stage"] + (f" {c['field']}" if "field" in c else ""),
                c["chunks"],
                fmt(c["ratio"], ".2f"),
                c["files"],
                fmt(c["write_s"], ".3f"),
                fmt(c["read_s"], ".3f"),
                fmt(c.get("read_level_s"), ".4f"),
            ]
            for c in res["chunks"]
        ]
        t2 = print_table(
            ["stage", "chunks", "ratio", "files", "write s", "read all s", "read 1 level s"],
            rows,
        )
        print("\nSample store layouts (1-D, blosc-lz4 5, random 8192-sample batches)")
        rows = [
            [
                c["layout"],
                c["files"],
                fmt(c["ratio"], ".2f"),
                fmt(c["write_s"], ".3f"),
                fmt(c["read_s"], ".3f"),
                fmt(c.get("read_batches_s"), ".3f"),
                c.get("batches", "-"),
            ]
            for c in res["sharding"]
        ]
        t3 = print_table(
            ["layout", "files", "ratio", "write s", "read all s", "batches s", "batches"], rows
        )
        self.r.results["storage_tables"] = "\n\n".join((t1, t2, t3))
        self.r.save()

    # ------------------------------------------------------------------ profiles
    def profile(self) -> None:
        r = self.r
        pdir = self.data / "profile"
        remove(pdir)
        for kind, params, warm_paths in (
            ("ingest", {"files": self.files, "out": str(pdir / "canonical.zarr")}, [self.raw_dir]),
            (
                "coarsen",
                {
                    "canonical": str(self.canonical),
                    "outdir": str(pdir / "scales"),
                    "scales": self.scales,
                    "patch_scales": self.patch_scales,
                },
                [self.canonical],
            ),
        ):
            res = r.step(
                f"profile_{kind}",
                "profile",
                {"kind": kind, "params": params},
                warm_paths=warm_paths,
                timeout=2 * self.r.timeout,
            )
            text = res["profile"]["cumulative"]
            (Path(self.args.out) / f"profile-{kind}.txt").write_text(
                text + "\n\n" + res["profile"]["tottime"]
            )
            print(f"\nprofile of {kind}_case under cProfile ({res['time_s']:.1f} s):")
            phases = sorted(res["phases_cumulative_s"].items(), key=lambda kv: -kv[1])
            print_table(
                ["function (cumulative, main thread)", "s", "share"],
                [[k, fmt(v, ".2f"), fmt(v / res["time_s"], ".0%")] for k, v in phases],
            )
            remove(pdir)

    # ------------------------------------------------------------------ summary
    def summary(self) -> None:
        r = self.r
        steps = r.results["steps"]
        comps = r.results["comparisons"]

        def row(key: str, label: str, ref: str | None, time_key: str = "time_s") -> list:
            s = steps.get(key)
            if not s or "error" in s:
                return [label, "failed" if s else "not run", "-", "-", "-", "-", "-", ""]
            t = s.get(time_key, s["time_s"])
            ratio = "1.00"
            if ref and ref in steps and "error" not in steps[ref]:
                ratio = fmt(t / steps[ref]["time_s"], ".2f")
            gbps = s["bytes"] / 1e9 / s["time_s"] if s.get("bytes") else None
            parts = [s["note"]] if s.get("note") else []
            if "read_s" in s:
                parts.append(f"read {s['read_s']:.1f} s + write {s['write_s']:.1f} s")
            if len(s.get("runs", [])) > 1:
                times = ", ".join(f"{x['time_s']:.1f}" for x in s["runs"])
                peaks = ", ".join(f"{x['peak_rss_mib']:.0f}" for x in s["runs"])
                parts.append(f"fastest of {len(s['runs'])} runs: {times} s; peaks {peaks} MiB")
            note = "; ".join(parts)
            return [
                label,
                fmt(t, ".1f"),
                ratio,
                fmt(s["peak_rss_mib"], ".0f"),
                fmt(gbps, ".3f"),
                fmt(s.get("user_s"), ".0f"),
                fmt(s.get("system_s"), ".0f"),
                note,
            ]

        nt = self.args.ntimes
        rows = [
            row("generate", "generate demo archive", None),
            row("ingest_lesprep", "ingest: lesprep ingest_case", None),
            row("ingest_floor", "ingest: I/O floor", "ingest_lesprep"),
            row("coarsen_lesprep", f"coarsen: lesprep ({len(self.scales)} scales)", None),
            row("coarsen_floor", "coarsen: I/O floor", "coarsen_lesprep"),
            row("coarsen_xarray", "coarsen: xarray script", "coarsen_lesprep", "time_full_s"),
            row("memory_ingest", "memory: ingest, other length", "ingest_lesprep"),
            row("memory_coarsen", "memory: coarsen, other length", "coarsen_lesprep"),
            row("storage", "storage trials", None),
            row("profile_ingest", "ingest under cProfile", "ingest_lesprep"),
            row("profile_coarsen", "coarsen under cProfile", "coarsen_lesprep"),
        ]
        c = r.results["config"]
        print(
            f"\n==== Results: {c['size']['nx']} x {c['size']['ny']} x {c['size']['nz']}, "
            f"{nt} times ({c['float32_3d_variable_gb']:.2f} GB per float32 3-D variable; raw "
            f"archive {c.get('raw_gb', float('nan')):.2f} GB)"
        )
        print("ratio = time / time of the lesprep step of the same group; GB/s = uncompressed")
        print("input bytes (raw variables for ingest, canonical variables read for coarsening)")
        print("per second; user/sys = CPU seconds of the worker (all threads) in user code and in")
        print("the kernel (mostly page faults of freshly allocated memory).")
        t1 = print_table(
            ["step", "time s", "ratio", "peak RSS MiB", "GB/s", "user s", "sys s", "note"], rows
        )
        trows = []
        names = {
            "xarray_vs_lesprep": "xarray script time / lesprep coarsen time",
            "coarsen_vs_floor": "lesprep coarsen / coarsen I/O floor",
            "ingest_vs_floor": "lesprep ingest / ingest I/O floor",
            "memory_ingest": "ingest peak RSS, 4x times / 1x",
            "memory_coarsen": "coarsen peak RSS, 4x times / 1x",
        }
        for key, label in names.items():
            cmp_ = comps.get(key)
            if cmp_ is None:
                trows.append([label, "-", "-", "not measured", ""])
                continue
            note = cmp_.get("note", "")
            if key == "xarray_vs_lesprep":
                note += "; same numbers: " + ("yes" if cmp_.get("same_numbers") else "NO")
            if key.startswith("memory"):
                p = cmp_["peak_rss_mib"]
                note += f"; {p[0]:.0f} -> {p[1]:.0f} MiB"
                if cmp_["ntimes"][1] != 4 * cmp_["ntimes"][0]:
                    note += f" (times x{cmp_['ntimes'][1] / cmp_['ntimes'][0]:g})"
            trows.append(
                [
                    label,
                    fmt(cmp_["ratio"], ".2f"),
                    cmp_["target"],
                    "MET" if cmp_["met"] else "MISSED",
                    note,
                ]
            )
        print()
        t2 = print_table(["target", "ratio", "target", "result", "note"], trows)
        if r.results["errors"]:
            print(
                "\nfailures: "
                + "; ".join(f"{k}: {v[:200]}" for k, v in r.results["errors"].items())
            )
        r.results["tables"] = {"steps": t1, "targets": t2}
        r.save()
        print(f"\nJSON: {r.json_path}")

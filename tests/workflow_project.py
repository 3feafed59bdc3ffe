"""A throwaway lesprep project in a temporary folder, run with the repository's Snakefile."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

REPO = Path(__file__).resolve().parents[1]
SNAKEMAKE = str(Path(sys.executable).parent / "snakemake")
TINY = {"nx": 24, "ny": 24, "nz": 24, "ntimes": 5}
FLAVOUR = {
    "sc-ostra-01": "alpha",
    "sc-ostra-02": "beta",
    "sc-pelle-01": "alpha",
    "cu-marro-01": "alpha",
    "cu-marro-02": "beta",
    "cu-varnix-01": "alpha",
}
REGIME = {c: ("cumulus" if c.startswith("cu") else "stratocumulus") for c in FLAVOUR}


def base_config() -> dict[str, Any]:
    return {
        "cases": "config/cases.tsv",
        "results": "results",
        "demo": {"root": "resources/demo", "size": dict(TINY)},
        "ingest": {"spinup": "1 h", "cloud_threshold": "1e-5 kg/kg"},
        "coarsen": {
            "scales": ["200 m", "600 m", "1200 m"],
            "patches": {"variables": ["qc", "w"], "scales": ["600 m"], "size": 6},
        },
        "splits": {"seed": 3, "fractions": {"train": 0.5, "validation": 0.0, "test": 0.5}},
        "sets": {"shuffle": True, "shuffle_seed": 1, "chunk_mib": 1},
        "segments": {"settle_s": 0},  # archives are copied just before a run
    }


@dataclass
class Project:
    root: Path
    config: dict[str, Any] = field(default_factory=base_config)
    rows: list[dict[str, str]] = field(default_factory=list)

    def add_demo_case(self, case: str, **extra: str) -> None:
        self.rows.append(
            {
                "case": case,
                "regime": REGIME[case],
                "varmap": f"{REPO}/config/varmaps/flavour-{FLAVOUR[case]}.yaml",
                "raw": f"resources/demo/{case}/*.nc",
                "split": "",
                "spinup": "",
                "demo": "yes",
                **extra,
            }
        )

    def add_case(self, case: str, raw: str, flavour: str, regime: str, **extra: str) -> None:
        self.rows.append(
            {
                "case": case,
                "regime": regime,
                "varmap": f"{REPO}/config/varmaps/flavour-{flavour}.yaml",
                "raw": raw,
                "split": "",
                "spinup": "",
                "demo": "no",
                **extra,
            }
        )

    def write(self) -> None:
        (self.root / "config").mkdir(parents=True, exist_ok=True)
        (self.root / "config/config.yaml").write_text(yaml.safe_dump(self.config))
        cols = ["case", "regime", "varmap", "raw", "split", "spinup", "demo"]
        cols += sorted({c for r in self.rows for c in r} - set(cols))  # group, attributes
        lines = ["\t".join(cols)] + ["\t".join(r.get(c, "") for c in cols) for r in self.rows]
        (self.root / "config/cases.tsv").write_text("\n".join(lines) + "\n")

    def snakemake(
        self, *args: str, timeout: float = 900, check: bool = True, src: Path | None = None
    ) -> subprocess.CompletedProcess[str]:
        self.write()
        cmd = [
            SNAKEMAKE,
            "-s",
            str(REPO / "Snakefile"),
            "--directory",
            str(self.root),
            "--configfile",
            str(self.root / "config/config.yaml"),
            "--cores",
            "2",
            *args,
        ]
        env = {**os.environ, "PYTHONWARNINGS": "ignore"}
        if src is not None:  # run another copy of the package (an edited one)
            env["PYTHONPATH"] = os.pathsep.join([str(src), env.get("PYTHONPATH", "")])
        res = subprocess.run(
            cmd, capture_output=True, text=True, timeout=timeout, env=env, stdin=subprocess.DEVNULL
        )
        if check and res.returncode != 0:
            raise AssertionError(
                f"snakemake failed ({res.returncode}):\n{res.stdout[-4000:]}\n{res.stderr[-6000:]}"
            )
        return res

    def planned_jobs(self, src: Path | None = None) -> dict[str, int]:
        """Jobs a dry run would execute, by rule (from Snakemake's job stats table)."""
        res = self.snakemake("--dry-run", src=src)
        return parse_job_stats(res.stdout + res.stderr)


def parse_job_stats(text: str) -> dict[str, int]:
    """The 'Job stats' table of a Snakemake dry run as {rule: count}."""
    if "Nothing to be done" in text:
        return {}
    m = re.search(r"Job stats:\s*\n(.*?)\n\s*\n", text, re.S)
    if not m:
        raise AssertionError(f"no job stats in snakemake output:\n{text[-3000:]}")
    out: dict[str, int] = {}
    for line in m.group(1).splitlines():
        parts = line.split()
        if len(parts) == 2 and parts[1].isdigit() and parts[0] not in ("job", "total"):
            out[parts[0]] = int(parts[1])
    return out

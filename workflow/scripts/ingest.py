from lesprep.jobs.steps import run

run("ingest", snakemake)  # noqa: F821 (injected by Snakemake)

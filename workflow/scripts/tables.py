from lesprep.jobs.steps import run

run("tables", snakemake)  # noqa: F821 (injected by Snakemake)

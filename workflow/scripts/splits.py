from lesprep.jobs.steps import run

run("splits", snakemake)  # noqa: F821 (injected by Snakemake)

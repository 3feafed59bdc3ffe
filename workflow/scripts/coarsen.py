from lesprep.jobs.steps import run

run("coarsen", snakemake)  # noqa: F821 (injected by Snakemake)

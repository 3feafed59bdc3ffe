from lesprep.jobs.steps import run

run("gather", snakemake)  # noqa: F821 (injected by Snakemake)

from lesprep.jobs.steps import run

run("assemble", snakemake)  # noqa: F821 (injected by Snakemake)

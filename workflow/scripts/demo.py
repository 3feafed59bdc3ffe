from lesprep.jobs.steps import run

run("demo", snakemake)  # noqa: F821 (injected by Snakemake)

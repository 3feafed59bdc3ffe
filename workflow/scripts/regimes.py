from lesprep.jobs.steps import run

run("regimes", snakemake)  # noqa: F821 (injected by Snakemake)

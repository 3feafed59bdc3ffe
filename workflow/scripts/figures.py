from lesprep.jobs.steps import run

run("figures", snakemake)  # noqa: F821 (injected by Snakemake)

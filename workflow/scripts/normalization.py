from lesprep.steps import run

run("normalization", snakemake)  # noqa: F821 (injected by Snakemake)

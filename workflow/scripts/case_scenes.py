from lesprep.jobs.steps import run

run("case_scenes", snakemake)  # noqa: F821 (injected by Snakemake)

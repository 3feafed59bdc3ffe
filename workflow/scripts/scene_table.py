from lesprep.jobs.steps import run

run("scene_table", snakemake)  # noqa: F821 (injected by Snakemake)

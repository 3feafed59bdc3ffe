# lesprep: LES output -> multi-scale machine-learning training data.
# This file is a table of contents; helpers live in workflow/rules/common.smk,
# computation in the lesprep package (src/lesprep).
from snakemake.utils import min_version

min_version("9.0")


configfile: "config/config.yaml"


report: "workflow/report/workflow.rst"


include: "workflow/rules/common.smk"
include: "workflow/rules/demo.smk"
include: "workflow/rules/ingest.smk"
include: "workflow/rules/coarsen.smk"
include: "workflow/rules/sets.smk"
include: "workflow/rules/report.smk"


rule all:
    input:
        final_outputs(),
    default_target: True

# Whole-case splits, training stores per split and scale, train-only normalization.


rule assign_splits:
    output:
        str(LAYOUT.splits_tsv()),
    params:
        settings=split_params,
    log:
        "logs/splits.log",
    resources:
        mem_mb=500,
        runtime=5,
    script:
        "../scripts/splits.py"


rule assemble_train:
    input:
        stores=set_inputs_of("train"),
    output:
        store=directory(set_store("train", "{scale}")),
        stats=str(LAYOUT.normalization("{scale}")),
    params:
        settings=set_params_of("train"),
    benchmark:
        "logs/benchmarks/sets/train-{scale}.tsv"
    log:
        "logs/sets/train-{scale}.log",
    threads: threads_for("sets")
    resources:
        mem_mb=mem_mb("sets"),
        runtime=runtime("sets"),
    script:
        "../scripts/assemble.py"


rule assemble_heldout:
    input:
        stores=set_inputs_of(None),
    output:
        store=directory(set_store("{split}", "{scale}")),
    wildcard_constraints:
        split="validation|test",
    params:
        settings=set_params_of(None),
    benchmark:
        "logs/benchmarks/sets/{split}-{scale}.tsv"
    log:
        "logs/sets/{split}-{scale}.log",
    threads: threads_for("sets")
    resources:
        mem_mb=mem_mb("sets"),
        runtime=runtime("sets"),
    script:
        "../scripts/assemble.py"

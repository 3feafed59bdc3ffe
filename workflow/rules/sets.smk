# Whole-case splits, training stores per split and scale, train-only normalization.


rule assign_splits:
    output:
        f"{RESULTS}/splits.tsv",
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
        stores=train_set_inputs,
    output:
        store=directory(f"{RESULTS}/sets/train/scale-{{scale}}.zarr"),
        stats=f"{RESULTS}/sets/normalization-{{scale}}.json",
    params:
        settings=train_set_params,
    benchmark:
        "logs/benchmarks/sets/train-{scale}.tsv"
    log:
        "logs/sets/train-{scale}.log",
    resources:
        mem_mb=mem_mb("sets"),
        runtime=runtime("sets"),
    script:
        "../scripts/assemble.py"


rule assemble_heldout:
    input:
        stores=set_inputs,
    output:
        store=directory(f"{RESULTS}/sets/{{split}}/scale-{{scale}}.zarr"),
    wildcard_constraints:
        split="validation|test",
    params:
        settings=set_params,
    benchmark:
        "logs/benchmarks/sets/{split}-{scale}.tsv"
    log:
        "logs/sets/{split}-{scale}.log",
    resources:
        mem_mb=mem_mb("sets"),
        runtime=runtime("sets"),
    script:
        "../scripts/assemble.py"

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


rule assemble_set:
    input:
        stores=set_inputs,
        splits=f"{RESULTS}/splits.tsv",
    output:
        store=directory(f"{RESULTS}/sets/{{split}}/scale-{{scale}}.zarr"),
    params:
        settings=set_params,
    log:
        "logs/sets/{split}-{scale}.log",
    threads: 1
    resources:
        mem_mb=mem_mb("sets"),
        runtime=runtime("sets"),
    script:
        "../scripts/assemble.py"


rule normalization:
    input:
        train=f"{RESULTS}/sets/train/scale-{{scale}}.zarr",
    output:
        f"{RESULTS}/sets/normalization-{{scale}}.json",
    params:
        scale="{scale}",
        code=CODE_VERSION,
    log:
        "logs/sets/normalization-{scale}.log",
    resources:
        mem_mb=mem_mb("sets"),
        runtime=runtime("sets"),
    script:
        "../scripts/normalization.py"

# The built-in synthetic demo archives (invented cases, not real simulations).


rule demo_archive:
    output:
        directory(f"{DEMO_ROOT}/{{case}}"),
    params:
        size=config["demo"]["size"],
        code=CODE_VERSION,
    benchmark:
        "logs/benchmarks/demo/{case}.tsv"
    log:
        "logs/demo/{case}.log",
    resources:
        mem_mb=mem_mb("demo"),
        runtime=runtime("demo"),
    script:
        "../scripts/demo.py"

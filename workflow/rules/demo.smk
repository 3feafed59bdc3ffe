# The built-in synthetic demo archives (invented cases, not real simulations).


rule demo_archive:
    output:
        directory(demo_archive("{case}")),
    params:
        size=dict(SETTINGS.demo.size),
        code=CODE["demo"],
    benchmark:
        "logs/benchmarks/demo/{case}.tsv"
    log:
        "logs/demo/{case}.log",
    resources:
        mem_mb=mem_mb("demo"),
        runtime=runtime("demo"),
    script:
        "../scripts/demo.py"

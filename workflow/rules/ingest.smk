# Raw archive -> canonical per-case store (units, staggering, spin-up, cloud mask).


rule ingest:
    input:
        raw=raw_inputs,
        varmap=varmap_of,
    output:
        store=directory(canonical_store("{case}")),
    params:
        settings=ingest_params,
    benchmark:
        "logs/benchmarks/ingest/{case}.tsv"
    log:
        "logs/ingest/{case}.log",
    threads: 1
    resources:
        mem_mb=mem_mb("ingest"),
        runtime=runtime("ingest"),
    script:
        "../scripts/ingest.py"

# Raw archive -> canonical per-case store (units, staggering, spin-up, cloud mask).
# Demo cases: one job per case. Cases with a raw archive: one job per time segment, and a
# gather that joins the segments into the per-case store by hard links (no data copied).


rule ingest:
    input:
        raw=raw_inputs,
        varmap=varmap_of,
    output:
        store=directory(canonical_store("{case}")),
    wildcard_constraints:
        case=cases_pattern(WHOLE_CASES),
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


rule ingest_segment:
    input:
        raw=segment_raw_inputs,
        varmap=varmap_of,
    output:
        store=directory(segment_store("{case}", "{segment}")),
    params:
        settings=ingest_segment_params,
    benchmark:
        "logs/benchmarks/ingest/{case}-{segment}.tsv"
    log:
        "logs/ingest/{case}-{segment}.log",
    threads: 1
    resources:
        mem_mb=mem_mb("ingest"),
        runtime=runtime("ingest"),
    script:
        "../scripts/ingest.py"


rule gather_canonical:
    input:
        segments=canonical_segments,
    output:
        stores=directory([canonical_store("{case}")]),
    wildcard_constraints:
        case=cases_pattern(PLANS),
    params:
        settings=gather_canonical_params,
    log:
        "logs/gather/{case}-canonical.log",
    resources:
        mem_mb=500,
        runtime=10,
    script:
        "../scripts/gather.py"

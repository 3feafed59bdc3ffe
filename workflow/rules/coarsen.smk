# Canonical store -> one store per scale (sub-grid moments, GCM-view inputs, patches).
# One job per case and scale group; a group computes all its scales in one pass.

for _group, _labels in SCALE_GROUPS.items():

    rule:
        name:
            f"coarsen_{_group}"
        input:
            canonical=canonical_store("{case}"),
        output:
            stores=directory([scale_store("{case}", lab) for lab in _labels]),
        params:
            settings=coarsen_params(_group),
        benchmark:
            f"logs/benchmarks/coarsen/{{case}}-{_group}.tsv"
        log:
            f"logs/coarsen/{{case}}-{_group}.log",
        threads: threads_for("coarsen")
        resources:
            mem_mb=mem_mb("coarsen"),
            runtime=runtime("coarsen"),
        script:
            "../scripts/coarsen.py"

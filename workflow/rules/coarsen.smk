# Canonical store -> one store per scale (sub-grid moments, GCM-view inputs, patches) and
# per scale and layer set. One job per case and scale group (a group computes all its
# scales in one pass); for a case with a raw archive, one job per time segment and group,
# and a gather per group that joins the segments by hard links.

for _group, _labels in SCALE_GROUPS.items():

    rule:
        name:
            f"coarsen_{_group}"
        input:
            canonical=canonical_store("{case}"),
        output:
            stores=directory([scale_store("{case}", lab) for lab in _labels]),
        wildcard_constraints:
            case=cases_pattern(WHOLE_CASES),
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

    rule:
        name:
            f"coarsen_segment_{_group}"
        input:
            canonical=segment_store("{case}", "{segment}"),
            reference=coarsen_reference,
        output:
            stores=directory([segment_store("{case}", "{segment}", lab) for lab in _labels]),
        params:
            settings=coarsen_params(_group),
        benchmark:
            f"logs/benchmarks/coarsen/{{case}}-{{segment}}-{_group}.tsv"
        log:
            f"logs/coarsen/{{case}}-{{segment}}-{_group}.log",
        threads: threads_for("coarsen")
        resources:
            mem_mb=mem_mb("coarsen"),
            runtime=runtime("coarsen"),
        script:
            "../scripts/coarsen.py"

    rule:
        name:
            f"gather_{_group}"
        input:
            segments=scale_segments_of(_labels),
        output:
            stores=directory([scale_store("{case}", lab) for lab in _labels]),
        wildcard_constraints:
            case=cases_pattern(PLANS),
        params:
            settings=gather_scales_params(_labels),
        log:
            f"logs/gather/{{case}}-{_group}.log",
        resources:
            mem_mb=500,
            runtime=10,
        script:
            "../scripts/gather.py"

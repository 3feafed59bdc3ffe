# Figures and tables for `snakemake --report report.html` (and for a look at the data).


rule figures:
    input:
        canonical=canonical_stores(),
        sets=set_stores_only(),
    output:
        case_figures=[
            report(
                f"{RESULTS}/figures/cases/{case}/{kind}.png",
                caption=f"../report/case_{kind}.rst",
                category="Cases",
                subcategory=case,
            )
            for case in case_ids()
            for kind in ("timeseries", "profiles", "lwp_map")
        ],
        scale_figures=[
            report(
                f"{RESULTS}/figures/scales/{label}/{kind}.png",
                caption=f"../report/scale_{kind}.rst",
                category="Scales",
                subcategory=label,
            )
            for label in report_scales()
            for kind in ("target_distribution", "cf_vs_rh")
        ],
    params:
        cases=case_ids(),
        scales=report_scales(),
        results=RESULTS,
        code=CODE_VERSION,
    log:
        "logs/report/figures.log",
    resources:
        mem_mb=2000,
        runtime=30,
    script:
        "../scripts/figures.py"


rule tables:
    input:
        canonical=canonical_stores(),
        sets=set_stores_only(),
        splits=f"{RESULTS}/splits.tsv",
    output:
        scenes=report(
            f"{RESULTS}/scenes.tsv", caption="../report/scene_table.rst", category="Tables"
        ),
        baseline=report(
            f"{RESULTS}/baseline.tsv", caption="../report/baseline_table.rst", category="Tables"
        ),
        splits=report(
            f"{RESULTS}/report/splits.tsv", caption="../report/splits_table.rst", category="Tables"
        ),
    params:
        cases=case_ids(),
        sets={f"{s}/{lab}": f"{RESULTS}/sets/{s}/scale-{lab}.zarr" for s in SPLITS for lab in SCALE_LABELS},
        code=CODE_VERSION,
    log:
        "logs/report/tables.log",
    resources:
        mem_mb=2000,
        runtime=30,
    script:
        "../scripts/tables.py"

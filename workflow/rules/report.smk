# Figures and tables for `snakemake --report report.html` (and for a look at the data).


rule figures:
    input:
        canonical=canonical_stores(),
        sets=set_stores_only(),
        layers=layer_figure_inputs(),
    output:
        case_figures=[
            report(
                str(LAYOUT.case_figure(case, kind)),
                caption=f"../report/case_{kind}.rst",
                category="Cases",
                subcategory=case,
            )
            for case in case_ids()
            for kind in CASE_FIGURES
        ],
        scale_figures=[
            report(
                str(LAYOUT.scale_figure(label, kind)),
                caption=f"../report/scale_{kind}.rst",
                category="Scales",
                subcategory=label,
            )
            for label in report_scales()
            for kind in SCALE_FIGURES
        ],
        layer_figures=[
            report(
                str(LAYOUT.layer_figure(case, scale, layers)),
                caption="../report/case_layers.rst",
                category="Cases",
                subcategory=case,
            )
            for case, scale, layers in layer_figure_specs()
        ],
    params:
        settings={
            "results": str(LAYOUT.root),
            "cases": case_ids(),
            "scales": report_scales(),
            "layer_figures": [list(t) for t in layer_figure_specs()],
            "code": CODE["report"],
        },
    log:
        "logs/report/figures.log",
    resources:
        mem_mb=2000,
        runtime=30,
    script:
        "../scripts/figures.py"


rule case_scenes:
    # One case's scenes from its canonical store only: a new case describes only itself.
    input:
        canonical=canonical_store("{case}"),
    output:
        case_scenes("{case}"),
    params:
        settings=case_scenes_params,
    log:
        "logs/report/scenes-{case}.log",
    resources:
        mem_mb=mem_mb("scenes"),
        runtime=runtime("scenes"),
    script:
        "../scripts/case_scenes.py"


rule scene_table:
    input:
        cases=[case_scenes(c) for c in case_ids()],
    output:
        scenes=report(
            str(LAYOUT.scenes_tsv()), caption="../report/scene_table.rst", category="Tables"
        ),
    params:
        settings={"cases": case_ids(), "code": CODE["scenes"]},
    log:
        "logs/report/scene_table.log",
    resources:
        mem_mb=500,
        runtime=5,
    script:
        "../scripts/scene_table.py"


rule tables:
    input:
        sets=set_stores_only(),
        splits=str(LAYOUT.splits_tsv()),
    output:
        baseline=report(
            str(LAYOUT.baseline_tsv()), caption="../report/baseline_table.rst", category="Tables"
        ),
        splits=report(
            str(LAYOUT.report_splits_tsv()),
            caption="../report/splits_table.rst",
            category="Tables",
        ),
    params:
        settings={
            "sets": {
                f"{s}/{lab}": set_store(s, lab) for s in ACTIVE_SPLITS for lab in SCALE_LABELS
            },
            "code": CODE["report"],
        },
    log:
        "logs/report/tables.log",
    resources:
        mem_mb=2000,
        runtime=30,
    script:
        "../scripts/tables.py"


rule regimes:
    # Only the scene table and the split table: the labels are descriptive and no set
    # store depends on them, so a new train case re-runs the labelling, not other sets.
    input:
        scenes=str(LAYOUT.scenes_tsv()),
        splits=str(LAYOUT.splits_tsv()),
    output:
        table=report(
            str(LAYOUT.regimes_tsv()), caption="../report/regimes_table.rst", category="Regimes"
        ),
        fit=report(
            str(LAYOUT.regimes_json()), caption="../report/regimes_fit.rst", category="Regimes"
        ),
        silhouette=report(
            str(LAYOUT.regime_figure("silhouette")),
            caption="../report/regimes_silhouette.rst",
            category="Regimes",
        ),
        descriptors=report(
            str(LAYOUT.regime_figure("descriptors")),
            caption="../report/regimes_descriptors.rst",
            category="Regimes",
        ),
        timeline=report(
            str(LAYOUT.regime_figure("timeline")),
            caption="../report/regimes_timeline.rst",
            category="Regimes",
        ),
    params:
        settings={"regimes": SETTINGS.regimes.to_dict(), "code": CODE["regimes"]},
    log:
        "logs/report/regimes.log",
    resources:
        mem_mb=1000,
        runtime=10,
    script:
        "../scripts/regimes.py"

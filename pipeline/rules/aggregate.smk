# Stage 4: the grid (statistics), the shift diagnostics (data only) and the report (figures and page).
# Three rules so that a plot option re-renders the page without recomputing statistics, and new runs
# re-aggregate without recomputing the city-to-city shift.


def report_slice_json(keys=None):
    from pipeline.canonical import canonical_json, to_container

    options = to_container(PLAN.cfg.report)  # (`report` is a Snakemake keyword: not a variable name here)
    return canonical_json({k: v for k, v in options.items() if keys is None or k in keys})


def ground_truth_json():
    from pipeline.canonical import canonical_json

    return canonical_json(PLAN.cfg.data.ground_truth)  # null when the scenario declares none


rule aggregate_grid:
    input:
        records=PLAN.all_run_records(),
    output:
        runs=f"{RESULTS}/grid.parquet",
        summary=f"{RESULTS}/grid.csv",
        dm=f"{RESULTS}/grid_dm.csv",
        intervals=f"{RESULTS}/grid_intervals.csv",
        trials=f"{RESULTS}/grid_trials.csv",
        meta=f"{RESULTS}/grid_meta.json",
    log:
        f"{RESULTS}/logs/aggregate_grid.log",
    params:
        report=report_slice_json(("metric", "bootstrap_samples")),
        code=PLAN.code_digest("aggregate_grid"),
        versions=PLAN.versions("aggregate_grid"),
    script:
        "../scripts/aggregate_grid.py"


rule diagnose_shift:
    input:
        clean=[PLAN.clean_path(city) for city in PLAN.cities],
        stations=PLAN.cfg.data.stations,
    output:
        f"{RESULTS}/shift.csv",
    log:
        f"{RESULTS}/logs/diagnose_shift.log",
    params:
        cities=PLAN.cities,
        exclude=sorted(PLAN.cfg.forecast.exclude_features),
        code=PLAN.code_digest("diagnose_shift"),
        versions=PLAN.versions("diagnose_shift"),
    script:
        "../scripts/diagnose_shift.py"


rule render_report:
    input:
        runs=f"{RESULTS}/grid.parquet",
        summary=f"{RESULTS}/grid.csv",
        trials=f"{RESULTS}/grid_trials.csv",
        meta=f"{RESULTS}/grid_meta.json",
        shift=f"{RESULTS}/shift.csv",
        qc=[f"{PLAN.cfg.data.qc_dir}/{city}.json" for city in PLAN.cities],
        splits=[f"{RESULTS}/splits/{split_id}.json" for split_id in PLAN.splits],
    output:
        f"{RESULTS}/report.html",
    log:
        f"{RESULTS}/logs/render_report.log",
    params:
        report=report_slice_json(),
        ground_truth=ground_truth_json(),
        code=PLAN.code_digest("render_report"),
        versions=PLAN.versions("render_report"),
    script:
        "../scripts/render_report.py"

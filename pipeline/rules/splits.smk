# Stage 2: tracking store and split records. Both are cheap; the split list itself comes from config.
# No param may depend on where the project folder sits (a copied or moved project must stay up to date):
# the store is passed as configured (empty: the default SQLite store under results_dir), not resolved.
# Configured means tracking.uri, else MLFLOW_TRACKING_URI; credentials redacted (params are stored in
# .snakemake/ and shown), the job takes them back from its environment (pipeline.tracking).

from pipeline.tracking import configured_uri, redact


rule setup_tracking:
    output:
        f"{RESULTS}/tracking.json",
    log:
        f"{RESULTS}/logs/setup_tracking.log",
    params:
        uri=redact(configured_uri(PLAN.cfg.tracking.uri) or ""),
        experiment=PLAN.cfg.tracking.experiment,
        results_dir=RESULTS,
        code=PLAN.code_digest("setup_tracking"),
        versions=PLAN.versions("setup_tracking"),
    script:
        "../scripts/setup_tracking.py"


def clean_inputs_of_split(wildcards):
    return {city: PLAN.clean_path(city) for city in PLAN.split_cities(wildcards.split_id)}


def split_plan_json(wildcards):
    from pipeline.canonical import canonical_json

    return canonical_json(PLAN.splits[wildcards.split_id])


rule build_split:
    input:
        unpack(clean_inputs_of_split),
    output:
        f"{RESULTS}/splits/{{split_id}}.json",
    log:
        f"{RESULTS}/logs/build_split/{{split_id}}.log",
    params:
        plan=split_plan_json,
        lookback=PLAN.cfg.forecast.lookback_hours,
        horizon=PLAN.cfg.forecast.horizon_hours,
        code=PLAN.code_digest("build_split"),
        versions=PLAN.versions("build_split"),
    script:
        "../scripts/build_split.py"

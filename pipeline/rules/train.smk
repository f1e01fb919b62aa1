# Stage 3: training. One job per split x gradient-trained model runs every penalty and seed of it
# (start-up is paid once per job); one job per split fits every closed-form baseline of it (penalty "na",
# shown as n/a, seed 0), so new data for one city re-fits only its splits' baselines and no single
# baselines job grows with the number of splits. Within a job, a run whose inputs are unchanged is
# reused from MLflow, so a re-run job retrains only what changed (pipeline.train_job).

PENALTIES = list(PLAN.cfg.sweep.penalties)
SEEDS = list(PLAN.cfg.sweep.seeds)
# Several forecast variables: each job's records and log sit under its variable; one keeps today's paths.
VARIABLE = "{variable}/" if PLAN.several_targets else ""


def job_of(wildcards):
    return PLAN.job(wildcards.split_id, wildcards.model, wildcards.get("variable"))


def job_units(wildcards):
    return job_of(wildcards).params_json


def job_code(wildcards):
    return job_of(wildcards).code_digest


def job_versions(wildcards):
    return job_of(wildcards).versions


rule train_model:
    input:
        unpack(clean_inputs_of_split),
        split=f"{RESULTS}/splits/{{split_id}}.json",
        tracking=f"{RESULTS}/tracking.json",
    output:
        [f"{RESULTS}/runs/{VARIABLE}{{split_id}}/{{model}}/{penalty}/{seed}.json" for penalty in PENALTIES
         for seed in SEEDS],
    log:
        f"{RESULTS}/logs/train_model/{VARIABLE}{{split_id}}/{{model}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/train_model/{VARIABLE}{{split_id}}/{{model}}.tsv"
    threads: 1
    params:
        units=job_units,
        code=job_code,
        versions=job_versions,
    script:
        "../scripts/train_model.py"


def baselines_job(wildcards):
    return PLAN.baselines_job(wildcards.split_id)


def baselines_units(wildcards):
    return baselines_job(wildcards).params_json


def baselines_code(wildcards):
    return baselines_job(wildcards).code_digest


def baselines_versions(wildcards):
    return baselines_job(wildcards).versions


if PLAN.baseline_models and PLAN.splits:

    rule fit_baselines:
        input:
            unpack(clean_inputs_of_split),
            split=f"{RESULTS}/splits/{{split_id}}.json",
            tracking=f"{RESULTS}/tracking.json",
        output:
            PLAN.baseline_record_patterns(),  # every closed-form model (x forecast variable) of one split
        log:
            f"{RESULTS}/logs/fit_baselines/{{split_id}}.log",
        benchmark:
            f"{RESULTS}/benchmarks/fit_baselines/{{split_id}}.tsv"
        threads: 1
        params:
            units=baselines_units,
            code=baselines_code,
            versions=baselines_versions,
        script:
            "../scripts/fit_baselines.py"

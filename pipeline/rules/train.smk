# Stage 3: training. One job per split x gradient-trained model runs every penalty and seed of it
# (start-up is paid once per job); one job per split fits all closed-form baselines (penalty "na",
# shown as n/a, seed 0). Within a job, a run whose inputs are unchanged is reused from MLflow, so a
# re-run job retrains only what changed (pipeline.train_job).

PENALTIES = list(PLAN.cfg.sweep.penalties)
SEEDS = list(PLAN.cfg.sweep.seeds)


def job_of(wildcards):
    return PLAN.jobs[(wildcards.split_id, getattr(wildcards, "model", "baselines"))]


def job_units(wildcards):
    return job_of(wildcards).params_json


def job_code(wildcards):
    return job_of(wildcards).code_digest


rule train_model:
    input:
        unpack(clean_inputs_of_split),
        split=f"{RESULTS}/splits/{{split_id}}.json",
        tracking=f"{RESULTS}/tracking.json",
    output:
        [f"{RESULTS}/runs/{{split_id}}/{{model}}/{penalty}/{seed}.json" for penalty in PENALTIES for seed in SEEDS],
    log:
        f"{RESULTS}/logs/train_model/{{split_id}}/{{model}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/train_model/{{split_id}}/{{model}}.tsv"
    threads: 1
    params:
        units=job_units,
        code=job_code,
    script:
        "../scripts/train_model.py"


if PLAN.baseline_models:

    rule fit_baselines:
        input:
            unpack(clean_inputs_of_split),
            split=f"{RESULTS}/splits/{{split_id}}.json",
            tracking=f"{RESULTS}/tracking.json",
        output:
            [f"{RESULTS}/runs/{{split_id}}/{model}/na/0.json" for model in PLAN.baseline_models],
        log:
            f"{RESULTS}/logs/fit_baselines/{{split_id}}.log",
        benchmark:
            f"{RESULTS}/benchmarks/fit_baselines/{{split_id}}.tsv"
        threads: 1
        params:
            units=job_units,
            code=job_code,
        script:
            "../scripts/train_model.py"

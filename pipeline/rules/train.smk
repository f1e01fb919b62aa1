# Stage 3: training. One job per split x gradient-trained model runs every penalty and seed of it
# (start-up is paid once per job); one job fits the closed-form baselines (penalty "na", shown as n/a,
# seed 0) on every split. Within a job, a run whose inputs are unchanged is reused from MLflow, so a
# re-run job retrains only what changed (pipeline.train_job).

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


def baseline_inputs(wildcards):
    """Every split record and every clean table: the baselines job covers all splits."""
    return {"splits": [f"{RESULTS}/splits/{split_id}.json" for split_id in PLAN.splits],
            "clean": [PLAN.clean_path(city) for city in PLAN.cities]}


def baselines_job(wildcards):
    return PLAN.jobs[("all", "baselines")]


if ("all", "baselines") in PLAN.jobs:

    rule fit_baselines:
        input:
            unpack(baseline_inputs),
            tracking=f"{RESULTS}/tracking.json",
        output:
            PLAN.records_of(PLAN.jobs[("all", "baselines")]),
        log:
            f"{RESULTS}/logs/fit_baselines.log",
        benchmark:
            f"{RESULTS}/benchmarks/fit_baselines.tsv"
        threads: 1
        params:
            units=PLAN.jobs[("all", "baselines")].params_json,
            code=PLAN.jobs[("all", "baselines")].code_digest,
            versions=PLAN.jobs[("all", "baselines")].versions,
            results=RESULTS,
        script:
            "../scripts/fit_baselines.py"

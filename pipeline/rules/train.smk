# Stage 3: one job per split x model x penalty trains every seed (start-up is paid once per job).
# Families that are not gradient-trained run once per split, penalty "na" (shown as n/a), seed 0.

SEEDS = list(PLAN.cfg.sweep.seeds)


def job_of(wildcards):
    penalty = getattr(wildcards, "penalty", "na")  # fit_baseline has no penalty wildcard
    return PLAN.jobs[(wildcards.split_id, wildcards.model, penalty)]


def job_params(wildcards):
    return job_of(wildcards).params_json


def job_code(wildcards):
    return job_of(wildcards).code_digest


rule train_model:
    input:
        unpack(clean_inputs_of_split),
        split=f"{RESULTS}/splits/{{split_id}}.json",
        tracking=f"{RESULTS}/tracking.json",
    output:
        [f"{RESULTS}/runs/{{split_id}}/{{model}}/{{penalty}}/{seed}.json" for seed in SEEDS],
    log:
        f"{RESULTS}/logs/train_model/{{split_id}}/{{model}}/{{penalty}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/train_model/{{split_id}}/{{model}}/{{penalty}}.tsv"
    wildcard_constraints:
        penalty=r"(?!na/)[a-z][a-z0-9_]*",  # "na" belongs to fit_baseline
    threads: 1
    params:
        job=job_params,
        code=job_code,
        seeds=SEEDS,
    script:
        "../scripts/train_model.py"


rule fit_baseline:
    input:
        unpack(clean_inputs_of_split),
        split=f"{RESULTS}/splits/{{split_id}}.json",
        tracking=f"{RESULTS}/tracking.json",
    output:
        f"{RESULTS}/runs/{{split_id}}/{{model}}/na/0.json",
    log:
        f"{RESULTS}/logs/fit_baseline/{{split_id}}/{{model}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/fit_baseline/{{split_id}}/{{model}}.tsv"
    threads: 1
    params:
        job=job_params,
        code=job_code,
        seeds=[0],
    script:
        "../scripts/train_model.py"

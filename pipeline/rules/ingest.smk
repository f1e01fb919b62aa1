# Stage 1: one job per city turns its raw dump into the canonical table (on the study's cadence) and a QC report.


def raw_files_of(wildcards):
    from pipeline.ingest import raw_files

    return raw_files(PLAN.cfg.data.raw_dir, wildcards.city, PLAN.city_format(wildcards.city))


def city_format_json(wildcards):
    from pipeline.canonical import canonical_json

    return canonical_json(PLAN.city_format(wildcards.city))


def variables_digest(wildcards):
    """config/variables.yaml is read by the ingestion code, not imported: its content re-runs ingestion."""
    from pipeline.provenance import file_digest
    from pipeline.variables import registry_file

    return file_digest(registry_file())[:16]


rule ingest_city:
    input:
        raw=raw_files_of,
        stations=PLAN.cfg.data.stations,
    output:
        clean=f"{PLAN.cfg.data.clean_dir}/{{city}}.parquet",
        qc=f"{PLAN.cfg.data.qc_dir}/{{city}}.json",
    log:
        f"{RESULTS}/logs/ingest_city/{{city}}.log",
    params:
        city_format=city_format_json,
        raw_dir=PLAN.cfg.data.raw_dir,
        reference_temperature_c=PLAN.cfg.data.reference_temperature_c,
        variables=variables_digest,
        code=PLAN.code_digest("ingest_city"),
        versions=PLAN.versions("ingest_city"),
    script:
        "../scripts/ingest_city.py"

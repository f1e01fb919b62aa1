"""Rule setup_tracking: create the MLflow store and experiment once, before any training job."""

from pipeline.atomic import write_json_atomic
from pipeline.scripts._step import run_step
from pipeline.tracking import artifact_location, project_store_uri, setup_store


def work(snakemake):
    # The store is named relative to the project folder (the job's working directory): tracking.json, which
    # every training job reads, stays byte-identical when the folder is copied or moved.
    uri = project_store_uri(snakemake.params.uri or None, snakemake.params.results_dir)
    experiment_id = setup_store(uri, snakemake.params.experiment, artifact_location(snakemake.params.results_dir))
    write_json_atomic({"tracking_uri": uri, "experiment": snakemake.params.experiment,
                       "experiment_id": experiment_id}, snakemake.output[0])


run_step(snakemake, work)  # noqa: F821

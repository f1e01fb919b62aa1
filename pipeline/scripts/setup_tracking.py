"""Rule setup_tracking: create the MLflow store and experiment once, before any training job."""

from pipeline.scripts._step import run_step
from pipeline.tracking import artifact_location, setup_store
from pipeline.atomic import write_json_atomic


def work(snakemake):
    experiment_id = setup_store(snakemake.params.uri, snakemake.params.experiment,
                                artifact_location(snakemake.params.results_dir))
    write_json_atomic({"tracking_uri": snakemake.params.uri, "experiment": snakemake.params.experiment,
                       "experiment_id": experiment_id}, snakemake.output[0])


run_step(snakemake, work)  # noqa: F821

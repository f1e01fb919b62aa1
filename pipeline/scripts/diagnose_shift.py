"""Rule diagnose_shift: clean Parquet of every city + station table -> results/shift.csv."""

from pipeline.atomic import write_csv_atomic
from pipeline.report.shift_data import compute_shift
from pipeline.scripts._step import run_step


def work(snakemake):
    clean = dict(zip(snakemake.params.cities, snakemake.input.clean))
    shift = compute_shift(clean, snakemake.input.stations, exclude=snakemake.params.exclude)
    write_csv_atomic(shift, snakemake.output[0])
    print(f"shift: {len(shift)} city pairs")


run_step(snakemake, work)  # noqa: F821

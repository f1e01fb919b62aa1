"""Rule diagnose_shift: clean Parquet of every city + station table -> results/shift.csv."""

from pipeline.report.shift_data import compute_shift
from pipeline.scripts._step import run_step


def work(snakemake):
    clean = dict(zip(snakemake.params.cities, snakemake.input.clean))
    shift = compute_shift(clean, snakemake.input.stations, exclude=snakemake.params.exclude)
    shift.to_csv(snakemake.output[0], index=False)
    print(f"shift: {len(shift)} city pairs")


run_step(snakemake, work)  # noqa: F821

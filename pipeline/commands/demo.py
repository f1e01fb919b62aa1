"""`shiftgrid demo [--days N] [--run] [OVERRIDES...]`: write the invented scenario's raw dumps.

Reads `data.generator` (start, days, seed) and `data.cities` (each city's dump format) from the config;
writes raw dumps under `data.raw_dir`. With --run it then runs the whole DAG and prints a summary: cities,
stations, rows kept and dropped per reason, the top of the grid and where the report is.
"""

import json
from pathlib import Path

from pipeline.caution import CAUTION
from pipeline.config import compose_config, expand_sweep_overrides, to_container
from pipeline.errors import InputError
from pipeline.ingest.qc import summary_row
from pipeline.sweep_guard import project_lock, run_guarded
from pipeline.tracking import resolve_tracking_uri
from pipeline.stations import load_stations


def add_arguments(parser) -> None:
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, e.g. experiment=demo")
    parser.add_argument("--days", type=int, help="length of the generated record (default: data.generator.days)")
    parser.add_argument("--run", action="store_true", help="then run the whole DAG and print a summary")


def _invented_scenario(cfg, root: Path, generator: dict, days: int | None) -> dict:
    from pipeline.demo import generate_demo

    stations = load_stations(root / cfg.data.stations)
    return generate_demo(root / cfg.data.raw_dir, stations, to_container(cfg.data.cities), generator["start"],
                         days or generator["days"], generator["seed"], cfg.data.reference_temperature_c)


def _airports(cfg, root: Path, generator: dict, days: int | None) -> dict:
    from pipeline.demo.airports import write_airports_dump

    return {"written": str(write_airports_dump(root / cfg.data.raw_dir)), "days": "all (real data)"}


def _sem(cfg, root: Path, generator: dict, days: int | None) -> dict:
    from pipeline.demo.sem import write_sem_dump

    return write_sem_dump(root / cfg.data.raw_dir, load_stations(root / cfg.data.stations), generator, days)


def _swiss_nox(cfg, root: Path, generator: dict, days: int | None) -> dict:
    from pipeline.demo.swiss_nox import write_swiss_nox_dump

    return {"written": str(write_swiss_nox_dump(root / cfg.data.raw_dir)), "days": "all (real data)"}


# data.generator.kind -> writer(cfg, root, generator settings, days) -> summary
GENERATORS = {"demo": _invented_scenario, "airports": _airports, "sem": _sem, "swiss_nox": _swiss_nox}


def write_dumps(overrides: list[str], root: Path, days: int | None) -> dict:
    cfg = compose_config(expand_sweep_overrides(overrides), root)
    generator = to_container(cfg.data.generator) or {}
    kind = generator.get("kind", "demo")
    if kind not in GENERATORS:
        raise InputError(f"unknown generator kind {kind!r}; known: {', '.join(GENERATORS)}",
                         field="data.generator.kind")
    return GENERATORS[kind](cfg, root, generator, days)


def qc_summary(qc_dir: Path) -> list[str]:
    lines = []
    for path in sorted(qc_dir.glob("*.json")):
        row = summary_row(json.loads(path.read_text()))
        lines.append(f"  {path.stem:<12} stations {row['stations']:>2}  rows read {row['rows read']:>7}  kept "
                     f"{row['rows kept']:>7}  values flagged {row['values flagged']:>5}  dropped: {row['dropped']}")
    return lines


def run(args) -> int:
    root = Path(args.root)
    with project_lock(root, "shiftgrid demo"):  # never rewrite dumps under a running sweep
        summary = write_dumps(args.overrides, root, args.days)
        print(f"demo dumps written: {json.dumps(summary, default=str)[:400]}")
        if not args.run:
            return 0
        cfg = compose_config(expand_sweep_overrides(args.overrides), root)
        uri = resolve_tracking_uri(cfg.tracking.uri, root / cfg.results_dir)
        status = run_guarded(args.overrides, root, uri, command="demo", quiet=True)
    if status != 0:
        return status
    print("ingestion (rows per city):")
    print("\n".join(qc_summary(root / cfg.data.qc_dir)))
    try:
        from pipeline.commands.grid import top_of_grid
        print(top_of_grid(root / cfg.results_dir, cfg))
    except ImportError:
        pass
    print(f"report: {(root / cfg.results_dir / 'report.html').resolve()}")
    print(CAUTION)
    return 0

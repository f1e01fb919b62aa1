"""One module per `shiftgrid` command: `add_arguments(parser)` and `run(args) -> int`."""


def add_run_filters(parser, *, several: bool) -> None:
    """--target, --variable, --model and --penalty, the filters `grid` and `runs` share; with `several`, each
    takes a comma-separated list. --target is the target city, --variable the forecast variable (the runs'
    logged `forecast.target`). Baselines' penalty is written n/a (pipeline.names.penalty_label reads it)."""
    which = "one of these (comma-separated)" if several else "this one"
    parser.add_argument("--target", help=f"only runs whose target city is {which}")
    parser.add_argument("--variable", help=f"only runs whose forecast variable is {which}: e.g. pm25, no2 "
                                           f"(a sweep over several forecast targets)")
    parser.add_argument("--model", help=f"only runs whose model is {which}: names of the sweep, e.g. lstm")
    parser.add_argument("--penalty", help=f"only runs whose penalty is {which}: erm, irm, vrex, groupdro; n/a "
                                          f"for the closed-form baselines")

"""One module per `shiftgrid` command: `add_arguments(parser)` and `run(args) -> int`."""

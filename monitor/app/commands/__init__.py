"""One module per `rigside` subcommand: `add_arguments(parser)` and `run(args)`."""

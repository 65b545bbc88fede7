"""One module per `hourwatch` subcommand: each has `add(subparsers)` and `run(args)`."""

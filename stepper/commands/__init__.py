"""One module per subcommand, each with ``handle(args) -> int``; their options are in :mod:`stepper.commands.parsers`."""

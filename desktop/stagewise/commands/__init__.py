"""One module per subcommand of the command line; each has ``run(args) -> int``."""

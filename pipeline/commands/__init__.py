"""One module per `wavebook` subcommand (see pipeline/cli.py for the interface each exposes)."""

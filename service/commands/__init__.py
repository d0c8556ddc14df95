"""The `twistrate` command-line programs, one module per subcommand (registered in cli.py).

Imported by nothing else in the package."""

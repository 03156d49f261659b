"""The command-line interface: a thin typer layer over the library recipes."""

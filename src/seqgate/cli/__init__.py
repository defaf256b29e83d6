"""The ``seqgate`` command line (typer): ``app`` holds the root and registers one module per
command. Nothing outside this package imports it."""

"""The typer command line: one thin module per command, heavy imports lazy."""

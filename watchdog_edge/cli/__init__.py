"""The command line: typer commands, tables and the demo."""

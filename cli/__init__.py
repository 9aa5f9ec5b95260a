"""Command-line interface (typer).  Each ``cmd_*.py`` module registers commands."""

"""Typer command line: thin adapters over the library API (STYLE items 15-17)."""

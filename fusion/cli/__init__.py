"""Typer command line: thin adapters over the library API (docs/conventions.md items 15-17)."""

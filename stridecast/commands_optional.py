"""Parsers of the commands whose parts need optional extras (torch, FastAPI)."""

from __future__ import annotations


def register(subparsers, add) -> None:
    """Add the parsers of demo, train, export, serve and bench (filled in as parts land)."""

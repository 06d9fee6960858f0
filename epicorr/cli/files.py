"""File-level commands for one series, without a BIDS dataset (filled in below)."""
from __future__ import annotations

__all__ = ["register"]


def register(subparsers) -> None:
    """Add the file-level sub-commands."""

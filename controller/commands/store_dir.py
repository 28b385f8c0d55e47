"""The --store argument of the commands that read a model store (models, predict,
report, serve): a directory that must exist — a missing one is "no such directory",
told apart from a store that lacks the model asked for."""

from __future__ import annotations

from pathlib import Path

from ratefit.models.errors import InputError

__all__ = ["existing_store"]


def existing_store(path: str, flag: str = "--store") -> Path:
    """``path`` as a Path; InputError naming the flag when it is missing or not a directory."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"{flag} {path}: no such directory (ratefit train --store DIR writes a model store)")
    if not p.is_dir():
        raise InputError(f"{flag} {path}: not a directory")
    return p

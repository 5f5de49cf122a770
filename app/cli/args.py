"""Argument types the commands share: a value that cannot be right is refused by argparse,
which names the option and exits with status 2 (bad input)."""

from __future__ import annotations

import argparse

from app.ingest import parse


def unit_code(text: str) -> str:
    """A unit code as imports accept it (README, "Unit codes")."""
    try:
        return parse.unit_code(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"{text!r}: {exc}") from None

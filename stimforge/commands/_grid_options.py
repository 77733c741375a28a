"""The grid given by plain numbers, as `check`, `analyze` and `plan` take it on the command line:
``--unit-duration S --level NAME=SIZE [--level ...] [--unit-name NAME]``."""

from __future__ import annotations

import argparse


def level_arg(text: str) -> tuple[str, int]:
    """Parse ``NAME=SIZE`` (a level above the unit; SIZE a whole number >= 2)."""
    name, sep, size = text.partition("=")
    try:
        n = int(size)
    except ValueError:
        n = -1
    if not sep or not name.strip() or n < 2:
        raise argparse.ArgumentTypeError(
            f"{text!r}: expected NAME=SIZE with a whole SIZE >= 2, e.g. line=4")
    return name.strip(), n


def add_grid_options(p: argparse.ArgumentParser, *, when: str) -> None:
    """Add ``--unit-duration``, ``--level`` and ``--unit-name``; ``when`` says when they apply."""
    p.add_argument("--unit-duration", type=float, metavar="S",
                   help=f"slot duration of the lowest unit, seconds ({when})")
    p.add_argument("--level", action="append", type=level_arg, default=None, metavar="NAME=SIZE",
                   help=f"a level above the unit, lowest first; repeat for each level ({when})")
    p.add_argument("--unit-name", default="unit",
                   help=f"name of the lowest unit (default: unit; {when})")

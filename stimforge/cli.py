"""Command-line entry point: a thin argparse layer over the public API.

Each subcommand lives in ``stimforge/commands/<name>.py`` and exposes ``add_parser(sub)`` and
``run(args) -> int``.  Exit codes: 0 success / no cue found, 1 a cue found (check), 2 bad input.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys
import warnings

from ._version import __version__
from .errors import StimforgeError

COMMANDS = ["demo", "build", "check", "inspect", "tts", "rates", "schema", "init", "epoch", "analyze",
            "plan", "simulate"]

CAUTION = (
    "Caution: digital level (dBFS) is not sound pressure. Calibrate the presentation level on the "
    "real transducer with a sound level meter, keep fades on, and run experiments on people only "
    "with ethics approval; local rules and your lab's licensed practice decide."
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="stimforge",
        description="Build and verify frequency-tagging speech stimuli from one YAML recipe.",
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"stimforge {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="log debug messages")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        try:
            mod = importlib.import_module(f".commands.{name}", __package__)
        except ModuleNotFoundError as exc:  # a stage not written yet
            if exc.name and exc.name.endswith(f"commands.{name}"):
                continue
            raise
        mod.add_parser(sub)
    return parser


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """Warnings from stimforge read as one plain line on stderr, without Python source lines."""
    print(f"warning: {message}", file=file or sys.stderr)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    warnings.showwarning = _show_warning
    logging.basicConfig(
        level=logging.DEBUG if args.verbose else logging.INFO,
        format="%(levelname)s: %(message)s",
    )
    if not getattr(args, "run", None):
        parser.print_help()
        return 2
    try:
        return int(args.run(args))
    except StimforgeError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())

"""Command-line entry point: a thin argparse layer over the public API.

Each subcommand lives in ``stimforge/commands/<name>.py`` and exposes ``add_parser(sub)`` and
``run(args) -> int``.

Exit statuses (the README's table lists them per command):

* 0 success (``check``: no cue found); 1 ``check``/``build``: a cue found (``epoch``: the
  recorded codes disagree with the plan); 3 ``check``, ``build``, ``demo``: inconclusive
  (no cue, but a reference cue could not have been revealed; see stimforge/verify_report.py);
* 2 bad input or an unusable environment (a full disk, a folder that cannot be written): the
  message names the file, field or value and what would fix it;
* 70 an internal error, i.e. a bug: one line on stderr says so and where the traceback was
  written (``EX_SOFTWARE`` of sysexits.h);
* 130 interrupted (SIGINT, Ctrl-C), 143 terminated (SIGTERM): both clean up first (128 + the
  signal number, as a shell reports a process killed by it); 141 the output pipe was closed.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import logging
import os
import signal
import sys
import tempfile
import time
import traceback
import warnings

from ._version import __version__
from .errors import StimforgeError

EXIT_OK = 0
EXIT_CUE = 1
EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 70
EXIT_INTERRUPTED = 130
EXIT_PIPE = 141
EXIT_TERMINATED = 143

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


class Terminated(BaseException):
    """Raised in the main thread when the process receives SIGTERM (handled like Ctrl-C)."""


def _on_sigterm(signum, frame) -> None:
    raise Terminated()


# errno values that describe the machine, not a bug: the user can act on them
_ENVIRONMENT_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM,
                       errno.EFBIG, errno.EIO, errno.EMFILE, errno.ENFILE}


def _environment_problem(exc: BaseException) -> str | None:
    """A one-line explanation for an OSError caused by the machine (full disk...), else None."""
    if not isinstance(exc, OSError) or exc.errno not in _ENVIRONMENT_ERRNOS:
        return None
    what = f" {exc.filename}" if exc.filename else ""
    fix = {errno.ENOSPC: "free some disk space or choose a folder on another disk",
           errno.EDQUOT: "free some of your disk quota or choose another folder",
           errno.EROFS: "choose a folder on a writable disk",
           errno.EACCES: "choose a folder you may write to, or ask for the permission",
           errno.EPERM: "choose a folder you may write to, or ask for the permission",
           }.get(exc.errno, "check the disk and try again")
    return f"cannot write or read{what}: {exc.strerror or exc}; {fix}"


def _crash_report(exc: BaseException, argv: list[str] | None) -> str:
    """Write the traceback of an unexpected exception to a file; return where (or why not)."""
    stamp = time.strftime("%Y%m%d-%H%M%S")
    path = os.path.join(tempfile.gettempdir(), f"stimforge-crash-{stamp}-{os.getpid()}.txt")
    text = (f"stimforge {__version__}, python {sys.version.split()[0]}, {sys.platform}\n"
            f"command: stimforge {' '.join(sys.argv[1:] if argv is None else argv)}\n\n"
            + "".join(traceback.format_exception(type(exc), exc, exc.__traceback__)))
    try:
        with open(path, "x", encoding="utf-8") as fh:
            fh.write(text)
    except OSError as err:
        sys.stderr.write(text)
        return f"stderr above (the file {path} could not be written: {err.strerror or err})"
    return path


def _internal_error(exc: BaseException, argv: list[str] | None, verbose: bool) -> int:
    where = _crash_report(exc, argv)
    first = (str(exc).splitlines() or [""])[0][:200]
    what = "out of memory" if isinstance(exc, MemoryError) else "internal error"
    print(f"stimforge: {what}, this is a bug: {type(exc).__name__}: {first}; the traceback is "
          f"in {where}; please report it with that file", file=sys.stderr)
    if verbose:
        traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
    return EXIT_INTERNAL


def main(argv: list[str] | None = None) -> int:
    """Run one command; returns the exit status (see the module docstring)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    warnings.showwarning = _show_warning
    logging.basicConfig(
        level=logging.DEBUG if args.verbose else logging.INFO,
        format="%(levelname)s: %(message)s",
    )
    if not getattr(args, "run", None):
        parser.print_help()
        return EXIT_BAD_INPUT
    installed, previous = _in_main_thread(), None
    if installed:  # SIGTERM then unwinds like Ctrl-C: every cleanup handler runs
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        return int(args.run(args))
    except StimforgeError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("interrupted (SIGINT)", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Terminated:
        print("terminated (SIGTERM)", file=sys.stderr)
        return EXIT_TERMINATED
    except BrokenPipeError:
        # the reader went away (e.g. `stimforge schema | head`): say nothing more
        try:
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        except (OSError, ValueError):
            pass
        return EXIT_PIPE
    except Exception as exc:  # noqa: BLE001 - the last line of defence
        problem = _environment_problem(exc)
        if problem is not None:
            print(f"error: {problem}", file=sys.stderr)
            return EXIT_BAD_INPUT
        return _internal_error(exc, argv, args.verbose)
    finally:
        if installed:
            signal.signal(signal.SIGTERM, signal.SIG_DFL if previous is None else previous)


def _in_main_thread() -> bool:
    import threading

    return threading.current_thread() is threading.main_thread()


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())

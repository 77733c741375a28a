"""`stimforge check`: the acoustic-leak check of a build folder or of plain WAV files.

    stimforge check BUILD_DIR [--json PATH] [--report DIR] [--alpha A] [--no-sensitivity]
    stimforge check FILE.wav [FILE.wav ...] --unit-duration S --level NAME=SIZE
                    [--level NAME=SIZE ...] [--offset S]

Exit 0: no cue found; 1: a cue at some level above the unit; 2: bad input.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..defaults import ALPHA


def _level(text: str) -> tuple[str, int]:
    name, sep, size = text.partition("=")
    try:
        n = int(size)
    except ValueError:
        n = -1
    if not sep or not name.strip() or n < 2:
        raise argparse.ArgumentTypeError(
            f"{text!r}: expected NAME=SIZE with a whole SIZE >= 2, e.g. line=4")
    return name.strip(), n


def _is_our_report(path) -> bool:
    """True for a file an earlier `stimforge check` wrote (JSON or HTML report)."""
    try:
        head = path.read_text(encoding="utf-8", errors="replace")[:4000]
    except OSError:
        return False
    return ('"schema_version"' in head and '"stimforge_version"' in head) or (
        "<title>stimforge acoustic" in head)


def add_parser(sub) -> None:
    p = sub.add_parser(
        "check",
        help="check a stimulus set for acoustic cues at the structure's rates",
        description="Check a build folder, or WAV files (one trial each) on a grid, for "
        "acoustic cues at the rates of the structure. Exit 0: no cue; 1: a cue; 2: bad input.",
    )
    p.add_argument("inputs", nargs="+", type=Path, metavar="BUILD_DIR | FILE.wav",
                   help="a stimforge build folder, or one or more WAV files")
    p.add_argument("--unit-duration", type=float, metavar="S",
                   help="(files) slot duration of the lowest unit, seconds")
    p.add_argument("--level", action="append", type=_level, default=None, metavar="NAME=SIZE",
                   help="(files) a level above the unit, lowest first; repeat for each level")
    p.add_argument("--offset", type=float, default=0.0, metavar="S",
                   help="(files) where the grid starts in every file, seconds (default 0)")
    p.add_argument("--unit-name", default="unit", help="(files) name of the lowest unit")
    p.add_argument("--json", type=Path, metavar="PATH", help="write the JSON report here")
    p.add_argument("--report", type=Path, metavar="DIR", help="write check.html into DIR")
    p.add_argument("--alpha", type=float, default=ALPHA,
                   help=f"family-wise error rate, Holm-corrected (default {ALPHA:g})")
    p.add_argument("--no-sensitivity", action="store_true",
                   help="skip the planted-cue sensitivity estimate")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..errors import CheckInputError
    from ..verify import check_build, check_files
    from ..verify_report import CAUTION

    inputs = list(args.inputs)
    # refuse, before the work, to write over a file that is not an earlier stimforge report
    targets = ([args.json] if args.json else []) + (
        [args.report / "check.html"] if args.report else [])
    for target in targets:
        if target.exists() and not _is_our_report(target):
            raise CheckInputError(f"{target} exists and is not a stimforge check report; "
                                  "choose another path (stimforge never overwrites your files)")
    missing = [p for p in inputs if not p.exists()]
    if missing:
        raise CheckInputError("not found: " + ", ".join(map(str, missing))
                              + "; give one build folder or existing WAV files")
    common = dict(alpha=args.alpha, sensitivity=not args.no_sensitivity,
                  progress=not args.quiet)
    if len(inputs) == 1 and inputs[0].is_dir():
        if args.unit_duration is not None or args.level:
            raise CheckInputError(f"{inputs[0]}: a build folder carries its own grid; drop "
                                  "--unit-duration/--level (they are for plain WAV files)")
        report = check_build(inputs[0], **common)
    else:
        dirs = [p for p in inputs if p.is_dir()]
        if dirs:
            raise CheckInputError(f"{dirs[0]}: give either one build folder or WAV files, "
                                  "not both")
        if args.unit_duration is None or not args.level:
            raise CheckInputError("checking WAV files needs --unit-duration SECONDS and at "
                                  "least one --level NAME=SIZE (e.g. --unit-duration 0.25 "
                                  "--level line=4 --level pair=2)")
        report = check_files(inputs, unit_duration=args.unit_duration, levels=args.level,
                             offset=args.offset, unit_name=args.unit_name, **common)
    print(report.format_table())
    print()
    print(report.summary_line())
    print(CAUTION)
    t = report.timings
    print(f"checked {report.design['audio_seconds']:.0f} s of audio in {t['total']:.1f} s "
          f"(measuring {t['measure']:.1f} s, tests {t['tests']:.2f} s, sensitivity "
          f"{t['sensitivity']:.1f} s)")
    if args.json:
        print(f"JSON report: {report.write_json(args.json, timings=True)}")
    if args.report:
        print(f"HTML report: {report.write_html(args.report)}")
    return report.exit_code

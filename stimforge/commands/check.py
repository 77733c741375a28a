"""`stimforge check`: the acoustic-leak check of a build folder or of plain WAV files.

    stimforge check BUILD_DIR [--json PATH] [--report DIR] [--alpha A] [--no-sensitivity]
                    [--table]
    stimforge check FILE.wav [FILE.wav ...] --unit-duration S --level NAME=SIZE
                    [--level NAME=SIZE ...] [--offset S|auto]
    common options: [--jobs N] [--strict] [--ref-level-step DB] [--ref-gap MS]
                    [--ref-pitch-step ST] [--quiet]

Exit status (documented in the README beside every other command's):

* 0 PASS: no cue found, and the set would have revealed every reference cue at every level;
* 1 CUE FOUND: a test of the family is significant after Holm correction;
* 2 bad input: unreadable or inconsistent files, tables that contradict the manifest or each
  other, a grid that does not fit the audio (the message says what was found and the fix);
* 3 INCONCLUSIVE: no cue found, but the set could not have revealed a reference cue at some
  level (the verdict names them); ``--strict`` turns this into 1, for gates that accept only a
  vouched pass.

(An unexpected internal error gets its own status, not 0-3: see the README's exit-status table.)
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..defaults import (ALPHA, REFERENCE_GAP_MS, REFERENCE_LEVEL_STEP_DB,
                        REFERENCE_PITCH_STEP_ST)
from ._grid_options import add_grid_options

#: Exit status of an inconclusive verdict (no cue, but a reference cue not vouched for).
EXIT_INCONCLUSIVE = 3


def _offset(text: str):
    """--offset: seconds >= 0, or 'auto'."""
    if text.strip().lower() == "auto":
        return "auto"
    try:
        v = float(text)
    except ValueError:
        v = float("nan")
    if not (v >= 0 and v < float("inf")):
        raise argparse.ArgumentTypeError(f"{text!r}: expected seconds >= 0 or 'auto'")
    return v


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
        "acoustic cues at the rates of the structure. Exit 0: no cue, every reference cue "
        "would have shown; 1: a cue; 2: bad input; 3: no cue, but the set cannot vouch for a "
        "reference cue (1 with --strict).",
    )
    p.add_argument("inputs", nargs="+", type=Path, metavar="BUILD_DIR | FILE.wav",
                   help="a stimforge build folder, or one or more WAV files")
    add_grid_options(p, when="plain WAV files only")
    p.add_argument("--offset", type=_offset, default=0.0, metavar="S|auto",
                   help="(files) where the grid starts in every file, seconds (default 0); "
                   "'auto' estimates it from the files' first acoustic onsets and says what "
                   "it chose")
    p.add_argument("--json", type=Path, metavar="PATH", help="write the JSON report here")
    p.add_argument("--report", type=Path, metavar="DIR", help="write check.html into DIR")
    p.add_argument("--alpha", type=float, default=ALPHA,
                   help=f"family-wise error rate, Holm-corrected (default {ALPHA:g})")
    p.add_argument("--table", action="store_true",
                   help="also print every test of the family (the JSON has them too)")
    p.add_argument("--no-sensitivity", action="store_true",
                   help="skip the planted-cue sensitivity estimate (then the verdict cannot "
                   "vouch for any cue size)")
    p.add_argument("--strict", action="store_true",
                   help="exit 1 (not 3) when no cue is found but a reference cue could not "
                   "have been revealed")
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="worker processes for measuring (default 1; the report is the same)")
    p.add_argument("--ref-level-step", type=float, metavar="DB", default=None,
                   help=f"reference loudness step on a group's first unit (default "
                   f"{REFERENCE_LEVEL_STEP_DB:g} dB; a build's recipe check.reference)")
    p.add_argument("--ref-gap", type=float, metavar="MS", default=None,
                   help=f"reference silent gap closing a group (default {REFERENCE_GAP_MS:g} ms)")
    p.add_argument("--ref-pitch-step", type=float, metavar="ST", default=None,
                   help=f"reference pitch step on a group's last unit (default "
                   f"{REFERENCE_PITCH_STEP_ST:g} semitones)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..errors import CheckInputError
    from ..verify import check, check_files
    from ..verify_report import CAUTION

    inputs = list(args.inputs)
    # refuse, before the work, to write over a file that is not an earlier stimforge report
    targets = ([args.json] if args.json else []) + (
        [args.report / "check.html"] if args.report else [])
    if args.report and args.report.exists() and not args.report.is_dir():
        raise CheckInputError(f"--report {args.report}: is a file; --report takes a folder "
                              "(check.html and its figures go there): choose a folder")
    if args.json and args.json.is_dir():
        raise CheckInputError(f"--json {args.json}: is a folder; give a file name, e.g. "
                              f"{args.json / 'check.json'}")
    for target in targets:
        if target.exists() and not _is_our_report(target):
            raise CheckInputError(f"{target} exists and is not a stimforge check report; "
                                  "choose another path (stimforge never overwrites your files)")
    missing = [p for p in inputs if not p.exists()]
    if missing:
        raise CheckInputError("not found: " + ", ".join(map(str, missing))
                              + "; give one build folder or existing WAV files")
    if args.strict and args.no_sensitivity:
        raise CheckInputError("--strict needs the sensitivity estimate (it fails a set that "
                              "cannot vouch for a reference cue); drop --no-sensitivity")
    reference = {k: v for k, v in (("level_step", args.ref_level_step), ("gap", args.ref_gap),
                                   ("pitch_step", args.ref_pitch_step)) if v is not None}
    common = dict(alpha=args.alpha, sensitivity=not args.no_sensitivity,
                  progress=not args.quiet, jobs=args.jobs, reference=reference or None)
    if len(inputs) == 1 and inputs[0].is_dir():
        if args.unit_duration is not None or args.level or args.offset != 0.0:
            raise CheckInputError(f"{inputs[0]}: a build folder carries its own grid; drop "
                                  "--unit-duration/--level/--offset (they are for plain WAV "
                                  "files)")
        report = check(inputs[0], **common)
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
    print(report.format_text(table=args.table))
    print(CAUTION)
    t = report.timings
    print(f"checked {report.design['audio_seconds']:.0f} s of audio in {t['total']:.1f} s "
          f"(measuring {t['measure']:.1f} s, tests {t['tests']:.2f} s, sensitivity "
          f"{t['sensitivity']:.1f} s)")
    if args.json:
        print(f"JSON report: {report.write_json(args.json, timings=True)}")
    if args.report:
        print(f"HTML report: {report.write_html(args.report)}")
    code = report.exit_code
    if code == EXIT_INCONCLUSIVE and args.strict:
        print("--strict: an inconclusive verdict fails (exit 1)")
        return 1
    return code

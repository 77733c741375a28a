"""`stimforge analyze`: responses recorded while a set played, at the design's own rates.

    stimforge analyze EPOCHS [EPOCHS ...] (--build DIR | --unit-duration S --level NAME=SIZE ...)
                      [--json PATH] [--report DIR] [--alpha A] [--correction holm|fdr]
                      [--test t2circ|itpc|evoked] [--roi NAME=CH,CH,...] [--seed N]

EPOCHS: ``.npz`` or ``-epo.fif`` files; several files = several participants.
Exit 0: the analysis ran (whether or not it found a response: read the output); 2: bad input.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ._grid_options import add_grid_options


def _roi(text: str) -> tuple[str, list[str]]:
    name, sep, chans = text.partition("=")
    names = [c.strip() for c in chans.split(",") if c.strip()]
    if not sep or not name.strip() or not names:
        raise argparse.ArgumentTypeError(
            f"{text!r}: expected NAME=CH,CH,... e.g. central=Cz,C3,C4")
    return name.strip(), names


def _is_our_json(path: Path) -> bool:
    try:
        head = path.read_text(encoding="utf-8", errors="replace")[:400]
    except OSError:
        return False
    return '"schema_version"' in head and "stimforge response analysis" in head


def add_parser(sub) -> None:
    p = sub.add_parser(
        "analyze",
        help="analyse recorded EEG/MEG epochs at the design's rates (one file per participant)",
        description="Find responses at every level's rate per channel and condition, compare "
        "the phase between first and second hearings, and test across participants. Exit 0 "
        "when the analysis ran, whether or not a response was found; 2: bad input.",
    )
    p.add_argument("epochs", nargs="+", type=Path, metavar="EPOCHS",
                   help=".npz or -epo.fif epochs of the analysed window; one per participant")
    p.add_argument("--build", type=Path, metavar="DIR",
                   help="the stimforge build folder that was played (rates, conditions, hearings)")
    add_grid_options(p, when="without --build")
    p.add_argument("--json", type=Path, metavar="PATH", help="write the JSON results here")
    p.add_argument("--report", type=Path, metavar="DIR",
                   help="write analysis.html and its figures into DIR")
    p.add_argument("--alpha", type=float, default=0.05, help="error rate (default 0.05)")
    p.add_argument("--correction", choices=("holm", "fdr"), default="holm",
                   help="across channels x rates within a condition (default holm)")
    p.add_argument("--test", choices=("t2circ", "itpc", "evoked"), default="t2circ",
                   help="the test behind each finding's p (default t2circ)")
    p.add_argument("--neighbours", type=int, default=4, metavar="N",
                   help="noise bins on each side (default 4)")
    p.add_argument("--skip", type=int, default=1, metavar="N",
                   help="adjacent bins skipped on each side (default 1: bins k+-2..k+-5)")
    p.add_argument("--unit-harmonics", type=int, default=2, metavar="H",
                   help="unit-rate harmonics measured (default 2: unit rate and its double)")
    p.add_argument("--roi", action="append", type=_roi, default=None, metavar="NAME=CH,CH",
                   help="a region of interest (complex spectra averaged); repeat for more")
    p.add_argument("--bootstrap", type=int, default=2000, metavar="N",
                   help="bootstrap resamples for phase intervals (default 2000)")
    p.add_argument("--permutations", type=int, default=2000, metavar="N",
                   help="permutations for phase and contrast tests (default 2000)")
    p.add_argument("--seed", type=int, default=None, help="seed (default: random, written out)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..errors import AnalysisError
    from ..response import CAUTION, analyze
    from ..response_report import REPORT_NAME, is_our_report, write_report

    if args.json and args.json.exists() and not _is_our_json(args.json):
        raise AnalysisError(f"{args.json} exists and is not a stimforge analysis JSON; choose "
                            "another path (stimforge never overwrites your files)")
    if args.report and (args.report / REPORT_NAME).exists() and not is_our_report(
            args.report / REPORT_NAME):
        raise AnalysisError(f"{args.report / REPORT_NAME} exists and is not a stimforge "
                            "analysis report; choose another --report folder")
    missing = [p for p in args.epochs if not p.is_file()]
    if missing:
        raise AnalysisError("not found: " + ", ".join(map(str, missing))
                            + "; give .npz or -epo.fif epoch files")
    if args.build is not None and (args.unit_duration is not None or args.level):
        raise AnalysisError("--build carries the design's rates; drop --unit-duration/--level")
    res = analyze([str(p) for p in args.epochs], build=args.build,
                  unit_duration=args.unit_duration, levels=args.level, unit_name=args.unit_name,
                  alpha=args.alpha, correction=args.correction, test=args.test, skip=args.skip,
                  n_side=args.neighbours, unit_harmonics=args.unit_harmonics,
                  roi=dict(args.roi) if args.roi else None, n_boot=args.bootstrap,
                  n_perm=args.permutations, rng=args.seed, progress=not args.quiet)
    rates = ", ".join(f"{r.name} {r.rate:.4g} Hz" for r in res.grid.rates.rows)
    print(f"rates: {rates} (from {res.settings['rates_from']})")
    print(f"window: {res.grid.describe_dft()}")
    print()
    print(res.format_table())
    print()
    for n in [n for p in res.participants for n in p.notes] + list(res.notes):
        print(f"note: {n}")
    print(res.summary_line() + ".")
    print(CAUTION)
    if args.json:
        print(f"JSON: {res.write_json(args.json)}")
    if args.report:
        print(f"HTML report: {write_report(res, args.report)}")
    return 0

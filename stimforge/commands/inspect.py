"""`stimforge inspect CORPUS`: measure every token of a corpus and flag problems.

Prints one row per token (its file, numbers and QC flags) and a summary.  Exit 0 when every token
loads (flags are warnings); exit 2 when any file is missing, empty, truncated or not audio, after
checking all of them and naming each with its reason.
"""

from __future__ import annotations

import sys
from pathlib import Path

from ..defaults import TRIM_THRESHOLD_DB


def add_parser(sub) -> None:
    p = sub.add_parser(
        "inspect",
        help="measure the tokens of a corpus (durations, levels, F0, QC flags)",
        description="Measure every token listed in a corpus index.csv: durations before and after "
        "trimming, peak/RMS level, noise floor, clipping, Praat voicing and F0, and QC flags. "
        "Exit 0 if every file loads (flags are only warnings), 2 if any file is missing, empty, "
        "truncated or not audio.",
    )
    p.add_argument("corpus", type=Path, help="corpus folder holding index.csv, or the CSV itself")
    p.add_argument("--tsv", type=Path, metavar="PATH", help="also write the table as TSV here")
    p.add_argument(
        "--slot", type=float, metavar="SECONDS",
        help="slot duration: flag tokens longer than this after trimming, and tokens too short "
             "to be stretched to it (shorter than SECONDS / --max-stretch)",
    )
    p.add_argument(
        "--max-stretch", type=float, default=None, metavar="FACTOR",
        help="with --slot: the largest stretch factor allowed (default: the upper end of the "
             "default retime.stretch_range, 1.7; give your recipe's)",
    )
    p.add_argument(
        "--sr", type=int, metavar="HZ",
        help="measure at this sample rate (default: each file's own rate)",
    )
    p.add_argument(
        "--trim-db", type=float, default=None, metavar="DB",
        help=f"trim threshold in dB below each token's peak (default {TRIM_THRESHOLD_DB:g})",
    )
    p.add_argument(
        "--pad", type=float, default=None, metavar="SECONDS",
        help="seconds kept beyond each trim point (default 0)",
    )
    p.set_defaults(run=run)


def run(args) -> int:
    from pydantic import ValidationError

    from ..corpus import inspect_corpus
    from ..errors import CorpusError
    from ..recipe import TrimSpec

    if args.slot is not None and not args.slot > 0:
        raise CorpusError(f"--slot must be a positive number of seconds, got {args.slot}")
    kw = {}
    if args.trim_db is not None:
        kw["threshold_db"] = args.trim_db
    if args.pad is not None:
        kw["pad"] = args.pad
    try:
        trim = TrimSpec(**kw)
    except ValidationError as exc:
        msgs = "; ".join(f"{e['loc'][0]}: {e['msg']}" for e in exc.errors(include_url=False))
        raise CorpusError(f"bad trim option: {msgs}") from None
    if args.sr is not None and not 1000 <= args.sr <= 768000:
        raise CorpusError(f"--sr must be a sample rate from 1000 to 768000 Hz, got {args.sr}")
    if args.tsv is not None and args.tsv.exists() and not _is_inspect_table(args.tsv):
        raise CorpusError(f"--tsv {args.tsv} exists and is not a table stimforge inspect wrote; "
                          "choose another path (stimforge never overwrites your files)")
    if args.tsv is not None:  # before the measuring: a folder on the way must be one
        from .build import file_in_the_way

        blocker = file_in_the_way(args.tsv)
        if blocker is not None:
            raise CorpusError(f"--tsv {args.tsv}: {blocker} is a file, not a folder; choose "
                              "another path")
        try:
            args.tsv.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise CorpusError(f"--tsv {args.tsv}: cannot create its folder "
                              f"({exc.filename or args.tsv.parent}: {exc.strerror or exc}); "
                              "choose another path") from None
    if args.max_stretch is not None and not args.max_stretch > 1:
        raise CorpusError(f"--max-stretch must be a factor > 1, got {args.max_stretch}")
    stretch = {} if args.max_stretch is None else {"max_stretch": args.max_stretch}
    report = inspect_corpus(
        args.corpus, sr=args.sr, slot_duration=args.slot, trim=trim, **stretch,
        progress=sys.stderr.isatty(),
    )
    print(report.format_table(include_bad=False))
    if args.tsv is not None:
        try:
            report.write_tsv(args.tsv)
        except OSError as exc:
            raise CorpusError(f"--tsv {args.tsv}: cannot write it ({exc.strerror or exc}); "
                              "free some disk space or choose another path") from None
        print(f"wrote {args.tsv}")
    if report.bad:
        print(
            f"error: {len(report.bad)} file(s)/row(s) of {report.index} cannot be used:",
            file=sys.stderr,
        )
        for b in report.bad:
            print(f"  {b.describe()}", file=sys.stderr)
        return 2
    return 0


def _is_inspect_table(path: Path) -> bool:
    """True for a TSV an earlier `stimforge inspect --tsv` wrote (same header)."""
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            return fh.readline().startswith("token\tlabel\tstatus\tproblem\t")
    except OSError:
        return False


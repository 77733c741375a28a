"""`stimforge build RECIPE`: build a stimulus set (and check it) into a fresh folder."""

from __future__ import annotations

import argparse
from pathlib import Path


def file_in_the_way(path: Path) -> Path | None:
    """The first existing folder of ``path``'s ancestors if it is a file, not a folder, else None."""
    anc = Path(path).parent
    while not anc.exists() and anc != anc.parent:
        anc = anc.parent
    return anc if anc.exists() and not anc.is_dir() else None


def jobs_arg(text: str) -> int:
    """argparse type of --jobs: a whole number from 1 to 256."""
    from ..build import checked_jobs
    from ..errors import StimforgeError

    try:
        return checked_jobs(int(text))
    except (ValueError, StimforgeError) as exc:
        if not isinstance(exc, StimforgeError):
            exc = f"{text!r}: not a whole number of worker processes"
        raise argparse.ArgumentTypeError(str(exc)) from None


def seed_arg(text: str) -> int:
    """argparse type of --seed: a whole number from 0 to 2**63 - 1."""
    from ..build import checked_seed
    from ..errors import StimforgeError

    try:
        return checked_seed(int(text))
    except (ValueError, StimforgeError) as exc:
        if not isinstance(exc, StimforgeError):
            exc = f"{text!r}: not a whole number (seeds are 0 to 2**63 - 1)"
        raise argparse.ArgumentTypeError(str(exc)) from None


def add_parser(sub) -> None:
    p = sub.add_parser("build", help="build a stimulus set from a recipe")
    p.add_argument("recipe", type=Path, help="YAML recipe")
    p.add_argument("--out", type=Path, default=None,
                   help="build folder (default: <recipe folder>/build/<recipe name>)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace an earlier stimforge build there (other files are kept)")
    p.add_argument("--jobs", type=jobs_arg, default=None,
                   help="worker processes for re-timing (1-256)")
    p.add_argument("--seed", type=seed_arg, default=None,
                   help="override the recipe's seed (0 to 2**63 - 1)")
    p.add_argument("--no-check", action="store_true", help="skip the acoustic check")
    p.add_argument("--allow-large", action="store_true",
                   help="build even a set beyond the sane size limits (see `stimforge rates`)")
    p.add_argument("--dry-run", action="store_true",
                   help="only check what needs no re-timing (corpus, material, labels, "
                   "stretch factors, constraints, lists, size); write nothing")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.set_defaults(run=run)


def report(result) -> int:
    """Print the closing summary; return the check's exit code (0 pass, 1 a cue, 3 inconclusive:
    no cue, but a reference cue could not have been revealed), 0 without a check."""
    print(result.summary)
    print(f"build folder: {result.out}")
    if result.check is None:
        return 0
    verdict = f"{result.check.verdict} ({result.check.verdict_meaning})"
    print(f"acoustic check: {verdict}; report {result.out / 'check' / 'check.html'} "
          f"(processing report beside it); all tests: stimforge check {result.out} --table")
    return result.check.exit_code


def run(args) -> int:
    from ..build import build

    if args.dry_run:
        from ..preflight import preflight

        rep = preflight(args.recipe, out=args.out, overwrite=args.overwrite, seed=args.seed,
                        check=False if args.no_check else None, allow_large=args.allow_large)
        print(rep.format())
        return 0 if rep.ok else 2
    result = build(
        args.recipe,
        out=args.out,
        overwrite=args.overwrite,
        jobs=args.jobs,
        seed=args.seed,
        progress=not args.quiet,
        check=False if args.no_check else None,
        allow_large=args.allow_large,
    )
    return report(result)

"""`stimforge build RECIPE`: build a stimulus set (and check it) into a fresh folder."""

from __future__ import annotations

from pathlib import Path


def add_parser(sub) -> None:
    p = sub.add_parser("build", help="build a stimulus set from a recipe")
    p.add_argument("recipe", type=Path, help="YAML recipe")
    p.add_argument("--out", type=Path, default=None,
                   help="build folder (default: <recipe folder>/build/<recipe name>)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace an earlier stimforge build there (other files are kept)")
    p.add_argument("--jobs", type=int, default=None, help="worker processes for re-timing")
    p.add_argument("--seed", type=int, default=None, help="override the recipe's seed")
    p.add_argument("--no-check", action="store_true", help="skip the acoustic check")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.set_defaults(run=run)


def report(result) -> int:
    """Print the closing summary; return the exit code (1 if the check found a cue)."""
    print(result.summary)
    print(f"build folder: {result.out}")
    if result.check is not None:
        verdict = "PASS: no cue found" if result.check.passed else "FAIL: a cue was found"
        print(f"acoustic check: {verdict}; report {result.out / 'check' / 'check.html'}; "
              f"full table: stimforge check {result.out}")
    if result.check is not None and not result.check.passed:
        return 1
    return 0


def run(args) -> int:
    from ..build import build

    result = build(
        args.recipe,
        out=args.out,
        overwrite=args.overwrite,
        jobs=args.jobs,
        seed=args.seed,
        progress=not args.quiet,
        check=False if args.no_check else None,
    )
    return report(result)

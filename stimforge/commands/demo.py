"""`stimforge demo`: build and check the bundled demo recipe into a fresh folder."""

from __future__ import annotations

from pathlib import Path

from ..errors import BuildError
from .build import jobs_arg


def demo_recipe_path() -> Path:
    """The bundled demo recipe (recipes/demo.yaml beside the package in a source checkout)."""
    here = Path(__file__).resolve().parents[2]
    path = here / "recipes" / "demo.yaml"
    if not path.is_file():
        raise BuildError(
            f"demo recipe not found at {path}; stimforge demo needs the source checkout "
            "(install it with `pip install -e .` from a clone of the repository)"
        )
    return path


def add_parser(sub) -> None:
    p = sub.add_parser("demo", help="build and check the bundled demo (invented verse corpus)")
    p.add_argument("--out", type=Path, default=Path("stimforge-demo"),
                   help="build folder (default: ./stimforge-demo; must be new or empty)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace an earlier demo build there (other files are kept)")
    p.add_argument("--jobs", type=jobs_arg, default=None,
                   help="worker processes for re-timing (1-256)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..build import build
    from .build import report

    path = demo_recipe_path()
    print(f"stimforge demo: building {path}")
    result = build(path, out=args.out, overwrite=args.overwrite, jobs=args.jobs,
                   progress=not args.quiet)
    code = report(result)
    print(f"next: a simulated EEG session through epoch and analyze (README, \"From the build "
          f"to the recording and back\"): stimforge simulate --build {result.out} --list 1 "
          "--sfreq 500 --out sim_raw.fif")
    return code

"""`stimforge init PATH`: write a commented recipe template (never over an existing file)."""

from __future__ import annotations

from pathlib import Path

from ..errors import BuildError


def add_parser(sub) -> None:
    p = sub.add_parser("init", help="write a commented recipe template")
    p.add_argument("path", type=Path, help="where to write the recipe (must not exist)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..recipe import TEMPLATE

    path: Path = args.path
    if path.exists():
        raise BuildError(f"{path} already exists; choose another name (stimforge never overwrites it)")
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "x", encoding="utf-8") as fh:
        fh.write(TEMPLATE)
    print(f"wrote {path}; edit it, then run: stimforge rates {path}")
    return 0

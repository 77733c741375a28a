"""`stimforge init PATH`: write a commented recipe template (never over an existing file)."""

from __future__ import annotations

from pathlib import Path

from ..errors import BuildError
from .build import file_in_the_way


def add_parser(sub) -> None:
    p = sub.add_parser("init", help="write a commented recipe template")
    p.add_argument("path", type=Path, help="where to write the recipe (must not exist)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..recipe import TEMPLATE

    path: Path = args.path
    if path.exists() or path.is_symlink():
        raise BuildError(f"{path} already exists; choose another name (stimforge never overwrites it)")
    blocker = file_in_the_way(path)
    if blocker is not None:
        raise BuildError(f"cannot write {path}: {blocker} is a file, not a folder; choose "
                         "another path")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with open(path, "x", encoding="utf-8") as fh:
            fh.write(TEMPLATE)
    except OSError as exc:
        # a folder on the way that is a file, a read-only disk, no permission, a full disk
        where = exc.filename or path
        raise BuildError(f"cannot write {path}: {where}: {exc.strerror or exc}; choose a path in "
                         "a folder you may write to") from None
    print(f"wrote {path}; edit it, then run: stimforge rates {path}")
    return 0

"""Writing results: BIDS-style TSVs, hashes, the manifest, and the safe output-folder protocol.

Safety protocol
---------------
A build writes into a hidden temporary sibling folder ``.<name>.partial-XXXX`` and only moves
it into place when everything (audio, tables, manifest, check) has been written.  An
interrupted or failed build therefore leaves no folder that looks complete (the partial folder
is removed on failure; a killed process leaves only the hidden ``.partial`` folder).

An output folder that exists and is not empty is refused unless ``overwrite=True``.  Even then
only files that an earlier stimforge build wrote there *and that are unchanged* (their SHA-256
matches that build's manifest) are replaced; every other file is left as it is, and a new output
that would land on such a file stops the build before anything is touched.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Iterable
from pathlib import Path

from .audio_io import MANIFEST, json_dumps, read_tsv, sha256_file, write_tsv
from .errors import BuildError

__all__ = [
    "MANIFEST",
    "write_tsv",
    "read_tsv",
    "sha256_file",
    "prepare_output",
    "commit_output",
    "json_dumps",
]

LOG = "build.log"


def _previous_outputs(out: Path) -> dict[str, str]:
    """Files a previous stimforge build recorded in ``out`` (relative path -> sha256)."""
    mpath = out / MANIFEST
    try:
        man = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(man, dict) or "stimforge_version" not in man:
        return {}
    outputs = dict(man.get("outputs", {}))
    # the manifest itself is ours, and so is the log beside it (its timestamps keep it out of
    # "outputs"): both count as unchanged
    outputs[MANIFEST] = sha256_file(mpath)
    if (out / LOG).is_file():
        outputs[LOG] = sha256_file(out / LOG)
    return outputs


def prepare_output(out: Path, *, overwrite: bool) -> Path:
    """Check the destination and create the temporary sibling folder to build into.

    Raises
    ------
    BuildError
        If ``out`` exists, is not empty and ``overwrite`` is False, or is a file.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise BuildError(f"output {out} exists and is not a folder; choose another --out")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise BuildError(
            f"output folder {out} is not empty; choose a new --out, or pass --overwrite to replace "
            "the files an earlier stimforge build wrote there (other files are never touched)"
        )
    if out.is_dir() and overwrite:
        blocked = _blocking_files(out, _replaceable(out))
        if blocked:
            raise BuildError(_blocked_message(out, blocked))
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o777 & ~umask)  # mkdtemp makes it private; a build folder is for the lab
    return tmp


# Paths a build writes: a file of someone else's there stops --overwrite before any work.
_RESERVED_TOP = {MANIFEST, LOG, "trials.tsv", "units.tsv", "summary.txt"}
_RESERVED_DIRS = {"stimuli", "check", "events", "stimuli-marker"}


def _replaceable(out: Path) -> set[str]:
    """Files an earlier build wrote in ``out`` and that are unchanged since."""
    return {
        rel for rel, digest in _previous_outputs(out).items()
        if (out / rel).is_file() and sha256_file(out / rel) == digest
    }


def _blocking_files(
    out: Path, ours: set[str], new_files: Iterable[str] | None = None
) -> list[str]:
    """Files that a build would land on but that are not in ``ours`` (see :func:`_replaceable`)."""
    if new_files is None:  # before the build: every path a build may write
        present = (p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
        new_files = [
            rel for rel in present
            if rel in _RESERVED_TOP or rel.split("/", 1)[0] in _RESERVED_DIRS
        ]
    return sorted(rel for rel in new_files if (out / rel).exists() and rel not in ours)


def _blocked_message(out: Path, blocked: list[str]) -> str:
    shown = ", ".join(blocked[:5]) + (" ..." if len(blocked) > 5 else "")
    return (
        f"--overwrite: {len(blocked)} file(s) in {out} were not written by stimforge (or were "
        f"changed since): {shown}; move them away or choose another --out. Nothing was changed."
    )


def commit_output(tmp: Path, out: Path, *, overwrite: bool) -> None:
    """Move the finished build from ``tmp`` to ``out`` (see the module's safety protocol)."""
    tmp, out = Path(tmp), Path(out)
    new_files = sorted(p.relative_to(tmp).as_posix() for p in tmp.rglob("*") if p.is_file())
    if not out.exists() or (out.is_dir() and not any(out.iterdir())):
        if out.exists():
            out.rmdir()
        os.replace(tmp, out)
        return
    if not overwrite:  # checked before, but the folder may have filled meanwhile
        raise BuildError(f"output folder {out} is not empty and --overwrite was not given")
    replaceable = _replaceable(out)
    blocked = _blocking_files(out, replaceable, new_files)
    if blocked:  # checked before the build too; the folder may have changed meanwhile
        raise BuildError(_blocked_message(out, blocked))
    for rel in sorted(replaceable):
        (out / rel).unlink()
    # the manifest goes last: a folder whose manifest is new holds a whole new build
    for rel in sorted(new_files, key=lambda r: r == MANIFEST):
        dest = out / rel
        dest.parent.mkdir(parents=True, exist_ok=True)
        os.replace(tmp / rel, dest)
    # remove folders that only the old build's files filled
    parents = {(out / rel).parent for rel in replaceable} - {out}
    for d in sorted(parents, key=lambda p: -len(p.parts)):
        if d.is_dir() and not any(d.iterdir()):
            d.rmdir()
    shutil.rmtree(tmp, ignore_errors=True)

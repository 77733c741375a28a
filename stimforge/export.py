"""Writing results: BIDS-style TSVs, hashes, the manifest, and the safe output-folder protocol.

Safety protocol
---------------
*Building.*  A build writes into a hidden sibling folder ``.<name>.partial-<pid>-XXXX`` that
holds an ``UNFINISHED.txt`` note from its first moment, and moves it into place only when
everything (audio, tables, manifest, check) has been written.  A failed or interrupted
(SIGINT, SIGTERM) build removes that folder; a killed one (SIGKILL, power loss) leaves it, and
the next build into the same ``out`` removes it and says so (unless the process that made it
is still running: then the build is refused).

*A new folder.*  If ``out`` is missing or empty, the finished folder is renamed to ``out`` in
one step.

*--overwrite: a swap.*  An existing, non-empty ``out`` is refused unless ``overwrite=True``.
Even then only the earlier build's own files are replaced: those its ``manifest.json`` lists,
*inside* ``out`` (a listed path that leaves the folder, absolute or through ``..`` or a
symbolic link, is ignored) and unchanged (their SHA-256 matches).  Every other file stays as it
is, and a new output that would land on such a file stops the build before any work.  The new
build completes beside the old one first; then, with SIGINT/SIGTERM held back, the swap

1. writes a journal into a hidden sibling ``.<name>.swap-<pid>-XXXX`` and puts
   ``UNFINISHED.txt`` into ``out``,
2. moves the old build's files into the swap folder, its manifest first,
3. moves the new build's files into ``out``, its manifest last, and removes the note,
4. deletes the swap folder (the old build is retired) and the empty partial folder.

Any failure in 2-3 (a file that cannot be moved, a full disk) moves everything back: ``out``
holds the old build, whole, and the error says what failed.  A kill during 2-3 leaves the
journal; the next build into ``out`` puts the old build back (or, if the new manifest was
already in place, finishes the swap) before doing anything else, and says so.  At every moment
``out`` holds either a whole build with its manifest, or no manifest and ``UNFINISHED.txt``.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import shutil
import signal
import tempfile
import threading
from collections.abc import Iterable, Iterator
from pathlib import Path, PurePosixPath

from .audio_io import MANIFEST, json_dumps, read_tsv, sha256_file, write_tsv
from .errors import BuildError

__all__ = [
    "MANIFEST",
    "LOG",
    "UNFINISHED",
    "write_tsv",
    "read_tsv",
    "sha256_file",
    "prepare_output",
    "commit_output",
    "discard_partial",
    "clean_stale",
    "unfinished_reason",
    "json_dumps",
]

log = logging.getLogger("stimforge")

LOG = "build.log"
UNFINISHED = "UNFINISHED.txt"
JOURNAL = "journal.json"
_UNFINISHED_TEXT = (
    "This folder is an unfinished stimforge build: it was being written when its process "
    "stopped.\nIt is NOT a stimulus set; do not use its files. The next `stimforge build` into "
    "the same output folder\ncleans it up (and restores an earlier build an interrupted "
    "--overwrite was replacing).\n"
)

# folders of this process that clean_stale must leave alone
_ACTIVE: set[Path] = set()


# --------------------------------------------------------------------------- signals
@contextlib.contextmanager
def _signals_held() -> Iterator[None]:
    """Hold SIGINT and SIGTERM back until the block is done, then deliver them.

    The Python-level handlers are swapped for a recorder (a signal mask would not do: the
    kernel hands a process-directed signal to any thread that does not block it, e.g. a BLAS
    thread, and Python runs the handler in the main thread all the same).
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    pending: list[int] = []
    old = {}
    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            old[sig] = signal.signal(sig, lambda signum, frame: pending.append(signum))
        except (ValueError, OSError):  # pragma: no cover - not the main interpreter
            pass
    try:
        yield
    finally:
        for sig, handler in old.items():
            signal.signal(sig, signal.SIG_DFL if handler is None else handler)
        if pending:
            sig = pending[0]
            handler = old.get(sig)
            if callable(handler):
                handler(sig, None)
            elif handler != signal.SIG_IGN:  # the default action (or a handler set in C)
                signal.raise_signal(sig)


# --------------------------------------------------------------------------- names
def _prefix(out: Path, tag: str) -> str:
    return f".{out.name}.{tag}-"


def _owner(folder_name: str, prefix: str) -> int | None:
    """The process id in ``.<name>.<tag>-<pid>-XXXX`` (None for other names)."""
    pid, sep, _ = folder_name[len(prefix):].partition("-")
    return int(pid) if sep and pid.isdigit() else None


def _alive(pid: int | None) -> bool:
    if pid is None or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's process
        return True
    except OSError:
        return False
    try:  # a reused process id: another program now runs under it
        cmd = Path(f"/proc/{pid}/cmdline").read_bytes()
    except OSError:
        return True
    return b"stimforge" in cmd or b"python" in cmd


def _siblings(out: Path, tag: str) -> list[Path]:
    prefix = _prefix(out, tag)
    try:
        names = sorted(os.listdir(out.parent))
    except OSError:
        return []
    return [out.parent / n for n in names if n.startswith(prefix)]


def output_digests(folder: Path) -> dict[str, str]:
    """SHA-256 of every file a build wrote into ``folder`` (relative POSIX path -> digest), for
    the manifest's ``outputs``; the manifest, the log and the unfinished note are left out."""
    return {p.relative_to(folder).as_posix(): sha256_file(p)
            for p in sorted(Path(folder).rglob("*"))
            if p.is_file() and p.name not in (MANIFEST, LOG, UNFINISHED)}


def unfinished_reason(folder: str | Path) -> str | None:
    """Why ``folder`` is not a finished build but an interrupted build's leftover, or None.

    For readers of build folders (``stimforge check``): a folder holding ``UNFINISHED.txt``,
    or a build's hidden temporary folder (``.NAME.partial-...`` / ``.NAME.swap-...``).
    """
    folder = Path(folder)
    name = folder.name
    if name.startswith(".") and (".partial-" in name or ".swap-" in name):
        return (f"{folder} is the temporary folder of a stimforge build, not a finished build; "
                "check the build's output folder, or run the build again")
    if (folder / UNFINISHED).is_file():
        return (f"{folder} holds {UNFINISHED}: its build was interrupted and it is not a whole "
                "stimulus set; run the build again (that also restores or completes it)")
    return None


# --------------------------------------------------------------------------- the old build
def _safe_rel(rel: object) -> bool:
    """A manifest path that stays inside the folder: relative, no '..', no backslash."""
    if not isinstance(rel, str) or not rel or len(rel) > 4096 or "\x00" in rel or "\\" in rel:
        return False
    p = PurePosixPath(rel)
    if p.is_absolute() or rel.startswith("/") or ":" in p.parts[0]:
        return False
    return all(part not in ("", ".", "..") for part in rel.split("/"))


def _inside(out: Path, path: Path) -> bool:
    """``path`` is a regular file (not a link) whose real location is inside ``out``."""
    if path.is_symlink() or not path.is_file():
        return False
    root = os.path.realpath(out)
    return os.path.realpath(path).startswith(root.rstrip(os.sep) + os.sep)


def _old_build(out: Path, *, warn: bool = True) -> dict[str, str]:
    """Files an earlier build wrote in ``out`` and that are unchanged since (rel -> sha256).

    Only paths inside ``out`` count: the manifest is input, and a path in it that leaves the
    folder (absolute, ``..``, a symbolic link) is ignored, with a warning.
    """
    mpath = out / MANIFEST
    if not _inside(out, mpath):
        return {}
    try:
        man = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(man, dict) or "stimforge_version" not in man:
        return {}
    listed = man.get("outputs")
    listed = listed if isinstance(listed, dict) else {}
    ours: dict[str, str] = {}
    outside = []
    for rel, digest in listed.items():
        if rel in (MANIFEST, LOG, UNFINISHED):
            continue
        if not _safe_rel(rel):
            outside.append(rel)
            continue
        p = out / rel
        if not (p.exists() or p.is_symlink()):
            continue
        if not _inside(out, p):
            outside.append(rel)
            continue
        if isinstance(digest, str) and sha256_file(p) == digest:
            ours[rel] = digest
    if outside and warn:
        shown = ", ".join(repr(str(r)) for r in outside[:3]) + (" ..." if len(outside) > 3 else "")
        log.warning("%s lists %d path(s) that are not plain files inside %s (%s); they are "
                    "ignored: stimforge never touches a file outside the output folder",
                    mpath, len(outside), out, shown)
    # the manifest itself is ours, and so is the log beside it (its timestamps keep it out of
    # "outputs"): both count as unchanged
    ours[MANIFEST] = sha256_file(mpath)
    if _inside(out, out / LOG):
        ours[LOG] = sha256_file(out / LOG)
    return ours


# Paths a build writes: a file of someone else's there stops --overwrite before any work.
_RESERVED_TOP = {MANIFEST, LOG, "trials.tsv", "units.tsv", "summary.txt", UNFINISHED}
_RESERVED_DIRS = {"stimuli", "check", "events", "stimuli-marker"}


def _is_our_note(path: Path) -> bool:
    try:
        return path.is_file() and not path.is_symlink() and \
            path.read_text(encoding="utf-8", errors="replace") == _UNFINISHED_TEXT
    except OSError:
        return False


def _blocking_files(
    out: Path, ours: Iterable[str], new_files: Iterable[str] | None = None
) -> list[str]:
    """Files that a build would land on but that are not ``ours`` (see :func:`_old_build`)."""
    ours = set(ours)
    linked = sorted(d + "/" for d in _RESERVED_DIRS if (out / d).is_symlink())
    note = out / UNFINISHED
    if (note.exists() or note.is_symlink()) and not _is_our_note(note):
        linked.append(UNFINISHED)  # a file of the user's under the name of our note
    else:
        ours.add(UNFINISHED)
    if new_files is None:  # before the build: every path a build may write
        present = (p.relative_to(out).as_posix() for p in out.rglob("*")
                   if p.is_file() or p.is_symlink())
        new_files = [
            rel for rel in present
            if rel in _RESERVED_TOP or rel.split("/", 1)[0] in _RESERVED_DIRS
        ]
    taken = [rel for rel in new_files
             if (out / rel).exists() or (out / rel).is_symlink()]
    return linked + sorted(rel for rel in taken if rel not in ours)


def _blocked_message(out: Path, blocked: list[str]) -> str:
    shown = ", ".join(blocked[:5]) + (" ..." if len(blocked) > 5 else "")
    return (
        f"--overwrite: {len(blocked)} file(s) in {out} were not written by stimforge (or were "
        f"changed since, or are symbolic links): {shown}; move them away or choose another "
        "--out. Nothing was changed."
    )


# --------------------------------------------------------------------------- stale folders
def clean_stale(out: str | Path) -> list[str]:
    """Clean up what interrupted builds into ``out`` left beside it; one line per thing done.

    An interrupted swap is undone first (the old build put back, or the swap finished if the
    new manifest was already in place); then leftover partial folders are removed; then a
    stray ``UNFINISHED.txt`` in a whole build is removed.

    Raises
    ------
    BuildError
        If a leftover folder belongs to a process that is still running (another build into
        ``out``), or an interrupted swap cannot be undone.
    """
    out = Path(out)
    done: list[str] = []
    with _signals_held():
        for tag in ("swap", "partial"):
            for folder in _siblings(out, tag):
                if folder in _ACTIVE or folder.is_symlink() or not folder.is_dir():
                    continue
                pid = _owner(folder.name, _prefix(out, tag))
                if pid != os.getpid() and _alive(pid):
                    raise BuildError(
                        f"another stimforge build (process {pid}) is writing into {out} "
                        f"({folder.name}); wait for it to finish, or, if no such build is "
                        f"running, delete {folder}")
                if tag == "swap":
                    done.append(_recover_swap(folder, out))
                else:
                    n = sum(1 for p in folder.rglob("*") if p.is_file())
                    shutil.rmtree(folder, ignore_errors=True)
                    done.append(f"removed {folder}: an unfinished build folder ({n} file(s)) "
                                f"left by an interrupted run"
                                + (f" (process {pid})" if pid else ""))
        marker = out / UNFINISHED
        if _is_our_note(marker) and _whole(out):
            marker.unlink()
            done.append(f"removed {marker}: the build in {out} is whole (its run was "
                        "interrupted just after finishing it)")
    return done


def _whole(out: Path) -> bool:
    """``out`` holds a manifest whose every listed output is present and unchanged."""
    try:
        man = json.loads((out / MANIFEST).read_text(encoding="utf-8"))
        outputs = man["outputs"]
    except (OSError, ValueError, KeyError, TypeError):
        return False
    return isinstance(outputs, dict) and all(
        _safe_rel(rel) and _inside(out, out / rel) and sha256_file(out / rel) == digest
        for rel, digest in outputs.items())


def _recover_swap(swap: Path, out: Path) -> str:
    """Undo (or finish) a swap that a killed process left; return what was done."""
    try:
        journal = json.loads((swap / JOURNAL).read_text(encoding="utf-8"))
        old, new = dict(journal["old"]), dict(journal["new"])
    except (OSError, ValueError, KeyError, TypeError):
        # the journal is written before anything moves: without it nothing was moved
        shutil.rmtree(swap, ignore_errors=True)
        return f"removed {swap}: an --overwrite interrupted before it changed {out}"
    keep = swap / "old"
    mpath = out / MANIFEST
    if new.get(MANIFEST) and _inside(out, mpath) and sha256_file(mpath) == new[MANIFEST]:
        # the new manifest went in last: the new build is whole, the old one was retired
        (out / UNFINISHED).unlink(missing_ok=True)
        shutil.rmtree(swap, ignore_errors=True)
        _remove_empty_dirs(out, old)
        return (f"finished an --overwrite of {out} that was interrupted at its very end: the new "
                "build is whole there; the earlier build's files were retired")
    # remove the new build's files (only those that are, by hash, what the new build wrote),
    # then put the old ones back, the manifest last
    for rel, digest in new.items():
        p = out / rel
        if _safe_rel(rel) and _inside(out, p) and sha256_file(p) == digest and \
                (rel not in old or (keep / rel).is_file()):
            p.unlink()
    stuck = []
    for rel in sorted(old, key=lambda r: r == MANIFEST):
        src, dst = keep / rel, out / rel
        if not _safe_rel(rel) or not src.is_file():
            continue
        if dst.exists() or dst.is_symlink():
            stuck.append(rel)
            continue
        dst.parent.mkdir(parents=True, exist_ok=True)
        os.replace(src, dst)
    _remove_empty_dirs(out, new)
    if stuck:
        raise BuildError(
            f"an interrupted --overwrite of {out} cannot be undone: {', '.join(stuck[:5])} "
            f"exist(s) both there and in {keep}; compare them, keep the right ones, then delete "
            f"{swap}")
    (out / UNFINISHED).unlink(missing_ok=True)
    shutil.rmtree(swap, ignore_errors=True)
    return (f"restored the earlier build in {out}: an --overwrite that was replacing it had "
            "been interrupted")


def _remove_empty_dirs(out: Path, rels: Iterable[str]) -> None:
    """Remove folders inside ``out`` that the given files filled and that are now empty."""
    parents = {(out / rel).parent for rel in rels if _safe_rel(rel)} - {out}
    for d in sorted(parents, key=lambda p: -len(p.parts)):
        with contextlib.suppress(OSError):
            if d.is_dir() and not d.is_symlink() and not any(d.iterdir()):
                d.rmdir()


# --------------------------------------------------------------------------- the protocol
def _check_out_path(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise BuildError(f"output {out} exists and is not a folder; choose another --out")
    anc = out.parent
    while not anc.exists() and anc != anc.parent:
        anc = anc.parent
    if anc.exists() and not anc.is_dir():
        raise BuildError(f"output {out}: {anc} is a file, not a folder; choose another --out")


def prepare_output(out: Path, *, overwrite: bool) -> Path:
    """Check the destination, clean up after interrupted runs, make the partial folder.

    Returns
    -------
    Path
        The new hidden sibling folder to build into (it holds ``UNFINISHED.txt``).

    Raises
    ------
    BuildError
        If ``out`` is a file or lies inside one; exists, is not empty and ``overwrite`` is
        False; holds files of someone else's where the build writes; or its folder cannot be
        written (permission, read-only disk).  Nothing is changed then.
    """
    out = Path(out)
    _check_out_path(out)
    for line in clean_stale(out):
        log.warning(line)
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise BuildError(
            f"output folder {out} is not empty; choose a new --out, or pass --overwrite to replace "
            "the files an earlier stimforge build wrote there (other files are never touched)"
        )
    if out.is_dir() and overwrite:
        blocked = _blocking_files(out, _old_build(out))
        if blocked:
            raise BuildError(_blocked_message(out, blocked))
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=_prefix(out, "partial") + f"{os.getpid()}-",
                                    dir=out.parent))
    except OSError as exc:
        where = exc.filename or out.parent
        raise BuildError(f"output {out}: cannot write in {where} ({exc.strerror or exc}); "
                         "choose a --out in a folder you may write to, on a writable disk") from None
    _ACTIVE.add(tmp)
    try:
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o777 & ~umask)  # mkdtemp makes it private; a build folder is for the lab
        (tmp / UNFINISHED).write_text(_UNFINISHED_TEXT, encoding="utf-8")
    except OSError as exc:
        discard_partial(tmp)
        raise BuildError(f"output {out}: cannot write in {tmp.parent} ({exc.strerror or exc}); "
                         "free some disk space or choose another --out") from None
    return tmp


def discard_partial(tmp: Path) -> None:
    """Remove a partial folder (after a failure or an interruption), signals held back."""
    tmp = Path(tmp)
    with _signals_held():
        shutil.rmtree(tmp, ignore_errors=True)
        _ACTIVE.discard(tmp)


def commit_output(tmp: Path, out: Path, *, overwrite: bool) -> None:
    """Move the finished build from ``tmp`` to ``out`` (see the module's safety protocol).

    Raises
    ------
    BuildError
        If ``out`` changed since :func:`prepare_output` so that the build may not go there, or
        a file cannot be moved; ``out`` then holds what it held before, whole.
    """
    tmp, out = Path(tmp), Path(out)
    with _signals_held():
        new_files = sorted(p.relative_to(tmp).as_posix() for p in tmp.rglob("*")
                           if p.is_file() and p.relative_to(tmp).as_posix() != UNFINISHED)
        if not out.exists() or (out.is_dir() and not any(out.iterdir())):
            try:
                if out.exists():
                    out.rmdir()
                os.replace(tmp, out)
            except OSError as exc:
                raise BuildError(f"output {out}: cannot move the finished build there "
                                 f"({exc.strerror or exc}); nothing was changed") from None
            _ACTIVE.discard(tmp)
            # a kill before this line leaves a whole build with the note: clean_stale removes it
            (out / UNFINISHED).unlink(missing_ok=True)
            return
        if not overwrite:  # checked before, but the folder may have filled meanwhile
            raise BuildError(f"output folder {out} is not empty and --overwrite was not given")
        _swap(tmp, out, new_files)
        discard_partial(tmp)


def _new_hashes(tmp: Path, new_files: list[str]) -> dict[str, str]:
    """SHA-256 of every new file (the manifest's list, the rest computed)."""
    try:
        listed = json.loads((tmp / MANIFEST).read_text(encoding="utf-8")).get("outputs", {})
    except (OSError, ValueError, AttributeError):
        listed = {}
    return {rel: listed[rel] if isinstance(listed.get(rel), str) else sha256_file(tmp / rel)
            for rel in new_files}


def _swap(tmp: Path, out: Path, new_files: list[str]) -> None:
    old = _old_build(out, warn=False)  # prepare_output has warned already
    blocked = _blocking_files(out, old, new_files)
    if blocked:  # checked before the build too; the folder may have changed meanwhile
        raise BuildError(_blocked_message(out, blocked))
    new = _new_hashes(tmp, new_files)
    try:
        swap = Path(tempfile.mkdtemp(prefix=_prefix(out, "swap") + f"{os.getpid()}-",
                                     dir=out.parent))
    except OSError as exc:
        raise BuildError(f"--overwrite: cannot write in {out.parent} ({exc.strerror or exc}); "
                         f"nothing was changed in {out}") from None
    _ACTIVE.add(swap)
    keep = swap / "old"
    moved_old: list[str] = []
    moved_new: list[str] = []
    step = "writing the swap journal"
    try:
        journal = swap / (JOURNAL + ".tmp")
        journal.write_text(json_dumps({"out": str(out), "partial": tmp.name, "old": old,
                                       "new": new}), encoding="utf-8")
        os.replace(journal, swap / JOURNAL)
        step = f"writing {out / UNFINISHED}"
        (out / UNFINISHED).write_text(_UNFINISHED_TEXT, encoding="utf-8")
        # the old manifest leaves first, the new one arrives last
        for rel in sorted(old, key=lambda r: (r != MANIFEST, r)):
            step = f"moving the earlier build's {rel} aside"
            (keep / rel).parent.mkdir(parents=True, exist_ok=True)
            os.replace(out / rel, keep / rel)
            moved_old.append(rel)
        for rel in sorted(new_files, key=lambda r: (r == MANIFEST, r)):
            step = f"moving the new {rel} into place"
            _make_dirs_inside(out, rel)
            os.replace(tmp / rel, out / rel)
            moved_new.append(rel)
    except BaseException as exc:
        problems = _roll_back(tmp, out, keep, moved_old, moved_new)
        if problems:
            _ACTIVE.discard(swap)  # leave it (and its journal) for the next run's repair
            raise BuildError(
                f"--overwrite failed while {step} ({exc}), and the earlier build could not be "
                f"put back whole ({'; '.join(problems[:3])}); its files are in {keep}. Run the "
                "same build again: it repairs the folder first") from exc
        shutil.rmtree(swap, ignore_errors=True)
        _ACTIVE.discard(swap)
        if not isinstance(exc, Exception):
            raise
        raise BuildError(
            f"--overwrite failed while {step}: {exc}; the earlier build in {out} was put back "
            "unchanged and the new one discarded") from exc
    (out / UNFINISHED).unlink(missing_ok=True)
    shutil.rmtree(swap, ignore_errors=True)
    _ACTIVE.discard(swap)
    _remove_empty_dirs(out, set(old) - set(new_files))


def _make_dirs_inside(out: Path, rel: str) -> None:
    """Create the folders of ``out/rel``, refusing to go through a symbolic link."""
    d = out
    for part in PurePosixPath(rel).parts[:-1]:
        d = d / part
        if d.is_symlink():
            raise BuildError(f"{d} is a symbolic link; stimforge never writes through one")
        d.mkdir(exist_ok=True)


def _roll_back(tmp: Path, out: Path, keep: Path, moved_old: list[str],
               moved_new: list[str]) -> list[str]:
    """Undo a failed swap: new files back to ``tmp``, old ones back to ``out``."""
    problems = []
    for rel in reversed(moved_new):
        try:
            os.replace(out / rel, tmp / rel)
        except OSError as exc:
            problems.append(f"{out / rel}: {exc.strerror or exc}")
    for rel in sorted(moved_old, key=lambda r: (r == MANIFEST, r)):
        if rel == MANIFEST and problems:
            break  # an incomplete old build gets no manifest back; the next run repairs it
        try:
            (out / rel).parent.mkdir(parents=True, exist_ok=True)
            os.replace(keep / rel, out / rel)
        except OSError as exc:
            problems.append(f"{keep / rel}: {exc.strerror or exc}")
    if not problems:
        with contextlib.suppress(OSError):
            (out / UNFINISHED).unlink(missing_ok=True)
        _remove_empty_dirs(out, moved_new)
    return problems

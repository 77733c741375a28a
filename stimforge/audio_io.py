"""Files in and out: audio with truncation checks, hashes, TSV/JSON tables, build folders.

The one room where stimforge touches the disk for data (the build's folder protocol, which
decides *where* files go, lives in :mod:`stimforge.export`):

* :func:`read_audio` reads every channel at the file's own rate and refuses missing, empty,
  non-audio, truncated (libsndfile reads a cut WAV silently short, so the WAV header's data
  chunk size is parsed here) and non-finite files with one plain reason
  (:class:`AudioFileProblem`), which each caller turns into its own error.
* :func:`write_wav` writes PCM WAV (PCM_16/PCM_24 are byte-reproducible; float WAVs carry a
  timestamped PEAK chunk and are not).
* :func:`write_tsv` / :func:`read_tsv`: BIDS-style tab-separated tables (``n/a`` for missing).
* :func:`to_jsonable` / :func:`json_dumps`: the one JSON cleaner (NaN/inf -> null, numpy
  scalars and arrays -> Python, paths -> POSIX strings).
* :func:`read_build` reopens a build folder: its manifest, rate table and tables.
"""

from __future__ import annotations

import hashlib
import json
import math
import struct
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .errors import StimforgeError

__all__ = [
    "AudioFileProblem",
    "BuildTables",
    "sha256_file",
    "wav_header_frames",
    "probe_audio",
    "read_audio",
    "write_wav",
    "write_tsv",
    "read_tsv",
    "to_jsonable",
    "json_dumps",
    "read_build",
    "MANIFEST",
]

MANIFEST = "manifest.json"


class AudioFileProblem(Exception):
    """Why one audio file cannot be used (a plain reason; callers add the path and the fix)."""


# --------------------------------------------------------------------------- hashing
def sha256_file(path: str | Path) -> str:
    """SHA-256 of a file's bytes, hex (the digest every manifest records)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


# --------------------------------------------------------------------------- audio
def wav_header_frames(path: str | Path) -> int | None:
    """Frame count promised by a WAV/RIFX/RF64 header's data chunk, or None if not a WAV
    (or the header does not say, e.g. a streaming writer's 0 / 0xFFFFFFFF size)."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(12)
            if len(head) < 12 or head[8:12] != b"WAVE" or head[:4] not in (b"RIFF", b"RIFX", b"RF64"):
                return None
            end = ">" if head[:4] == b"RIFX" else "<"
            block_align = None
            ds64_data = None
            while True:
                ch = fh.read(8)
                if len(ch) < 8:
                    return None
                cid, size = ch[:4], struct.unpack(end + "I", ch[4:])[0]
                if cid == b"data":
                    if head[:4] == b"RF64" and size == 0xFFFFFFFF:
                        size = ds64_data
                    if not size or size == 0xFFFFFFFF or not block_align:
                        return None
                    return size // block_align
                body_len = size + (size & 1)
                if cid in (b"fmt ", b"ds64"):
                    body = fh.read(body_len)
                    if cid == b"fmt " and len(body) >= 14:
                        block_align = struct.unpack(end + "H", body[12:14])[0]
                    elif cid == b"ds64" and len(body) >= 16:
                        ds64_data = struct.unpack("<Q", body[8:16])[0]
                else:
                    fh.seek(body_len, 1)
    except OSError:
        return None


def _sf_reason(exc: Exception) -> str:
    msg = str(exc).split(": ", 1)[-1] if ": " in str(exc) else str(exc)
    return msg.strip()


def _info(path: Path):
    """soundfile's header info, or the reason a file is not audio at all."""
    import soundfile as sf

    if not path.exists():
        raise AudioFileProblem("file not found")
    if path.is_dir():
        raise AudioFileProblem("is a folder, not an audio file")
    if path.stat().st_size == 0:
        raise AudioFileProblem("empty file (0 bytes)")
    try:
        return sf.info(str(path))
    except Exception as exc:  # soundfile raises LibsndfileError (a RuntimeError) and others
        raise AudioFileProblem(f"not a readable audio file (libsndfile: {_sf_reason(exc)})") from None


def probe_audio(path: str | Path) -> tuple[int, int, int]:
    """(frames, sample rate, channels) from the header, without reading the samples.

    Raises
    ------
    AudioFileProblem
        Missing, a folder, empty, not audio, no samples, or truncated (the WAV header
        promises more frames than the file holds).
    """
    path = Path(path)
    info = _info(path)
    if info.frames <= 0:
        raise AudioFileProblem("holds no samples (0 frames)")
    promised = wav_header_frames(path)
    if promised is not None and promised > info.frames:
        raise AudioFileProblem(
            f"truncated: the header promises {promised} frames but the file holds only "
            f"{info.frames} ({info.frames / info.samplerate:.3f} of "
            f"{promised / info.samplerate:.3f} s); re-export it")
    return int(info.frames), int(info.samplerate), int(info.channels)


def read_audio(path: str | Path) -> tuple[np.ndarray, int]:
    """Read every channel at the file's own rate.

    Returns
    -------
    x : ndarray, float64, shape (n_frames, n_channels)
    sr : int, Hz

    Raises
    ------
    AudioFileProblem
        For missing, empty, non-audio, truncated or non-finite files (the reason in words).
    """
    import soundfile as sf

    path = Path(path)
    info = _info(path)
    try:
        data, fs = sf.read(str(path), dtype="float64", always_2d=True)
    except Exception as exc:
        raise AudioFileProblem(f"truncated or corrupt audio data (libsndfile: {exc})") from None
    promised = wav_header_frames(path)
    if promised is None:
        promised = int(info.frames) if info.frames and info.frames > 0 else None
    if promised is not None and data.shape[0] < promised:
        raise AudioFileProblem(
            f"truncated: the header promises {promised} frames but the file holds only "
            f"{data.shape[0]} ({data.shape[0] / fs:.3f} of {promised / fs:.3f} s); re-export it"
        )
    if data.shape[0] == 0:
        raise AudioFileProblem("holds no samples (0 frames)")
    if not np.all(np.isfinite(data)):
        raise AudioFileProblem("contains NaN or infinite samples")
    return data, int(fs)


def write_wav(path: str | Path, x: np.ndarray, *, sr: int, subtype: str) -> None:
    """Write a WAV file (``subtype`` e.g. ``"PCM_24"``; PCM is byte-reproducible).

    Encoded in memory by libsndfile, then written to disk in one call, so that a failing write
    (a full disk, a quota) raises ``OSError`` with its errno and the file's name, instead of
    whatever libsndfile makes of a short write.
    """
    import io

    import soundfile as sf

    buf = io.BytesIO()
    sf.write(buf, x, sr, subtype=subtype, format="WAV")
    try:
        with open(path, "wb") as fh:
            fh.write(buf.getbuffer())
    except OSError as exc:
        raise OSError(exc.errno, exc.strerror, str(path)) from exc


# --------------------------------------------------------------------------- tables
def _fmt(v: Any) -> str:
    if v is None:
        return "n/a"
    if isinstance(v, bool):
        return "1" if v else "0"
    if isinstance(v, float):
        if math.isnan(v):
            return "n/a"
        if math.isinf(v):
            return "-inf" if v < 0 else "inf"
        return f"{v:.6f}".rstrip("0").rstrip(".") if v != int(v) or abs(v) < 1e15 else repr(v)
    s = str(v)
    if "\t" in s or "\n" in s:
        raise ValueError(f"TSV value contains a tab or newline: {s!r}")
    return s


def write_tsv(path: str | Path, rows: Sequence[dict[str, Any]], columns: Sequence[str]) -> None:
    """Write rows as a tab-separated table with a header; missing values become ``n/a``."""
    lines = ["\t".join(columns)]
    for r in rows:
        lines.append("\t".join(_fmt(r.get(c)) for c in columns))
    Path(path).write_text("\n".join(lines) + "\n", encoding="utf-8")


def read_tsv(path: str | Path) -> list[dict[str, str]]:
    """Read a TSV written by :func:`write_tsv` into a list of dicts of strings."""
    text = Path(path).read_text(encoding="utf-8").splitlines()
    if not text:
        return []
    cols = text[0].split("\t")
    return [dict(zip(cols, ln.split("\t"))) for ln in text[1:] if ln]


def _number(s: str) -> Any:
    """A TSV cell as int, float, None (``n/a``) or the string itself."""
    if s == "n/a":
        return None
    try:
        return int(s)
    except ValueError:
        pass
    try:
        return float(s)
    except ValueError:
        return s


def to_jsonable(obj: Any) -> Any:
    """Plain JSON data: NaN/inf -> None, numpy scalars/arrays -> Python, Path -> POSIX string."""
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, Path):
        return obj.as_posix()
    if isinstance(obj, (np.generic,)):
        return to_jsonable(obj.item())
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    return obj


def json_dumps(obj: Any, *, sort_keys: bool = True) -> str:
    """Deterministic JSON text (indent 2, NaN -> null), keys sorted unless told otherwise."""
    return json.dumps(to_jsonable(obj), indent=2, sort_keys=sort_keys, allow_nan=False) + "\n"


# --------------------------------------------------------------------------- build folders
@dataclass(frozen=True, repr=False)
class BuildTables:
    """A build folder reopened: what the checker, the analysis stage and a notebook need.

    Attributes
    ----------
    root : Path
    manifest : dict
        The content of ``manifest.json``.
    rates : RateTable
        From the manifest's ``rate_table`` (checked against its stored bins).
    trials : list of dict
        Rows of ``trials.tsv`` (numbers as numbers, ``n/a`` as None), one per presentation.
    units : list of dict
        Rows of ``units.tsv``.
    """

    root: Path
    manifest: dict[str, Any]
    rates: Any
    trials: list[dict[str, Any]] = field(default_factory=list)
    units: list[dict[str, Any]] = field(default_factory=list)

    def __repr__(self) -> str:
        n_files = len({r.get("stim_file") for r in self.trials})
        return (f"<BuildTables {self.root}: {n_files} stimulus files, {len(self.trials)} "
                f"presentations>")

    def trial_windows(self) -> list[dict[str, Any]]:
        """Per distinct stimulus file: condition, trial, analysis onset and duration (s)."""
        seen: dict[str, dict[str, Any]] = {}
        for r in self.trials:
            seen.setdefault(r["stim_file"], {k: r.get(k) for k in (
                "stim_file", "condition", "trial", "analysis_onset", "analysis_duration")})
        return list(seen.values())


def read_build(folder: str | Path) -> BuildTables:
    """Reopen a stimforge build folder.

    Raises
    ------
    StimforgeError
        If the folder, its manifest or its tables are missing or unreadable (the error names
        the file and what to do).
    """
    from .grid import RateTable

    root = Path(folder)
    if not root.is_dir():
        raise StimforgeError(f"{root}: not a folder; give a stimforge build folder")
    mpath = root / MANIFEST
    if not mpath.is_file():
        raise StimforgeError(f"{mpath}: missing; is {root} a finished stimforge build folder?")
    try:
        manifest = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise StimforgeError(f"{mpath}: not readable JSON ({exc}); rebuild the set") from exc
    if not isinstance(manifest, dict) or "rate_table" not in manifest:
        raise StimforgeError(f"{mpath}: no 'rate_table'; is this a stimforge build folder?")
    rates = RateTable.from_dict(manifest["rate_table"], source=str(mpath))
    tables = {}
    for name in ("trials.tsv", "units.tsv"):
        p = root / name
        if not p.is_file():
            raise StimforgeError(f"{p}: missing; is {root} a finished stimforge build folder?")
        tables[name] = [{k: _number(v) for k, v in r.items()} for r in read_tsv(p)]
    return BuildTables(root=root, manifest=manifest, rates=rates, trials=tables["trials.tsv"],
                       units=tables["units.tsv"])

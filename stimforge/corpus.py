"""Token ingestion: read, downmix, resample, trim and quality-check syllable tokens.

A corpus comes either from a folder with an ``index.csv`` (one row per token file) or from one
long recording cut by the labelled intervals of a TextGrid tier.  Every token ends up as mono
float64 at the corpus (project) sample rate, trimmed of leading/trailing silence, with QC numbers
and warning flags.

Rules
-----
Channels
    Multi-channel files are downmixed to the **mean of their channels** (a stereo file with the
    same signal on both sides reads as that signal; one silent side halves the level: -6.02 dB).
Resampling
    soxr, quality ``"HQ"`` (band-limited, linear phase), after the downmix.  TextGrid intervals are
    cut from the recording at its own rate first, at sample ``round_half_up(t * fs)`` for both
    edges, and each cut is resampled alone.
Trim
    The envelope is ``|x|`` smoothed by a 5 ms moving average (:func:`stimforge.acoustics.
    active_bounds`); the kept part runs from the first to the last sample whose envelope is within
    ``trim.threshold_db`` of the token's own envelope peak, widened by ``trim.pad`` seconds on each
    side (never past the file's ends).  The trim points (start, end sample at the corpus rate) are
    kept in :attr:`Token.trim`.  A silent token keeps its whole length.
QC (:class:`TokenQC`)
    ``peak_dbfs`` and ``rms_dbfs`` over the trimmed part; ``clipped_fraction`` over the source
    samples (every channel, the file's own rate, |x| >= ``qc.clip_level``); ``voiced_fraction`` and
    ``median_f0`` from Praat (autocorrelation, 75-600 Hz, 5 ms steps) over the trimmed part;
    ``noise_floor_dbfs`` = 10th percentile of the RMS of consecutive 20 ms frames of the
    untrimmed (mono, resampled) token, a rough level of its background.  Flags (warnings only):
    ``clipped`` (clipped_fraction > qc.max_clipped_fraction), ``silent`` (peak below -90 dBFS,
    i.e. under one 16-bit step), ``too_quiet`` (rms_dbfs < qc.quiet_dbfs, not silent),
    ``no_voicing`` (voiced_fraction < qc.min_voiced_fraction), ``longer_than_slot`` (trimmed
    duration > the slot, when a slot is given), ``duplicate_file`` (the same audio bytes as
    another token).

Errors
------
Every file is checked before anything is raised: a single :class:`~stimforge.errors.CorpusError`
lists every missing, empty, non-audio or truncated file (and every bad index row) with its reason.
"""

from __future__ import annotations

import csv
import dataclasses
import difflib
import hashlib
import html
import logging
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path, PurePath
from typing import Any, Iterator, Sequence

import numpy as np

from .acoustics import active_bounds, db, peak_dbfs, praat_f0, rms_dbfs
from .audio_io import AudioFileProblem, sha256_file
from .audio_io import read_audio as _read_native
from .errors import CorpusError
from .recipe import CorpusSpec, QCSpec, RetimeSpec, TrimSpec
from .timing import exact, round_half_up, seconds_to_samples, window_samples

__all__ = [
    "Token",
    "TokenQC",
    "Corpus",
    "BadFile",
    "InspectReport",
    "FLAGS",
    "read_audio",
    "load_index",
    "load_textgrid",
    "load_corpus",
    "inspect_corpus",
    "find_index",
]

log = logging.getLogger("stimforge")

FLAGS = ("clipped", "too_quiet", "silent", "no_voicing", "longer_than_slot",
         "too_short_to_stretch", "duplicate_file")
SILENT_PEAK_DBFS = -90.0  # below one 16-bit step (20*log10(1/32768) = -90.3 dBFS)
NOISE_FRAME = 0.020  # s, frames for the noise-floor estimate
NOISE_PERCENTILE = 10.0
TRIM_SMOOTH = 0.005  # s, envelope smoothing for the trim
END_SLACK = 0.001  # s, interval ends this far past the recording's end are clamped to it
_BAD_LABEL = re.compile(r"[\s|#]")
INDEX_HELP = (
    "a corpus folder needs an index.csv: a comma-separated file with a header row holding at "
    "least the columns 'label' (the unit label used in the material text, no spaces, '|' or "
    "'#') and 'file' (the WAV/FLAC path, relative to the CSV), one row per token; other columns "
    "are kept as metadata, and a label may have several rows (takes)"
)


# --------------------------------------------------------------------------- data classes
@dataclass(frozen=True)
class TokenQC:
    """Quality numbers of one token (see the module docstring for the definitions).

    Durations in seconds, levels in dB re full scale, F0 in Hz (NaN when unvoiced).
    """

    duration_raw: float
    duration_trimmed: float
    peak_dbfs: float
    rms_dbfs: float
    clipped_fraction: float
    voiced_fraction: float
    median_f0: float
    noise_floor_dbfs: float
    flags: tuple[str, ...] = ()
    source_sr: int = 0
    channels: int = 0

    def __repr__(self) -> str:
        return (
            f"TokenQC({self.duration_trimmed:.3f} s of {self.duration_raw:.3f} s, peak "
            f"{self.peak_dbfs:.1f} dBFS, rms {self.rms_dbfs:.1f} dBFS, voiced "
            f"{self.voiced_fraction:.0%}, F0 {self.median_f0:.1f} Hz, flags={self.flags})"
        )


@dataclass(frozen=True, eq=False)
class Token:
    """One syllable token: trimmed mono samples at the corpus rate plus provenance and QC.

    ``samples`` is read-only; copy it before changing it.  ``trim`` is (start, end) of the kept
    part in the untrimmed signal at ``sr`` (for a TextGrid token: in its interval's cut).
    ``id`` is unique and stable: the file
    path relative to the index folder (posix), or ``"<recording file name>#<interval number>"``
    (1-based, counting every interval of the tier) for a TextGrid token.
    """

    id: str
    label: str
    file: Path
    samples: np.ndarray
    sr: int
    trim: tuple[int, int]
    sha256: str
    metadata: dict[str, str]
    qc: TokenQC

    @property
    def duration(self) -> float:
        """Trimmed duration in seconds."""
        return self.samples.size / self.sr

    def __repr__(self) -> str:
        return (
            f"Token({self.id!r}, label={self.label!r}, {self.duration:.3f} s at {self.sr} Hz, "
            f"flags={self.qc.flags})"
        )


@dataclass(frozen=True)
class Corpus:
    """The tokens of a corpus, all mono float64 at ``sr``."""

    tokens: tuple[Token, ...]
    sr: int

    def __len__(self) -> int:
        return len(self.tokens)

    def __iter__(self) -> Iterator[Token]:
        return iter(self.tokens)

    @property
    def labels(self) -> list[str]:
        """Distinct labels, sorted."""
        return sorted({t.label for t in self.tokens})

    def by_label(self) -> dict[str, list[Token]]:
        """Tokens grouped by label (labels sorted, tokens in corpus order)."""
        out: dict[str, list[Token]] = {lab: [] for lab in self.labels}
        for t in self.tokens:
            out[t.label].append(t)
        return out

    def token(self, token_id: str) -> Token:
        """The token with this id."""
        for t in self.tokens:
            if t.id == token_id:
                return t
        raise KeyError(token_id)

    def flagged(self) -> list[Token]:
        """Tokens carrying at least one QC flag."""
        return [t for t in self.tokens if t.qc.flags]

    def median_f0(self) -> float:
        """Median over voiced tokens of each token's Praat median F0, in Hz.

        Raises
        ------
        CorpusError
            If no token has any voiced frame.
        """
        f = [t.qc.median_f0 for t in self.tokens if np.isfinite(t.qc.median_f0)]
        if not f:
            raise CorpusError(
                f"no token of the corpus ({len(self.tokens)} tokens) has voicing that Praat "
                "detects (75-600 Hz), so there is no corpus F0; set pitch.target_hz in the recipe"
            )
        return float(np.median(f))

    def __repr__(self) -> str:
        return (
            f"Corpus({len(self.tokens)} tokens, {len(self.labels)} labels, sr={self.sr} Hz, "
            f"{len(self.flagged())} flagged)"
        )

    def _repr_html_(self) -> str:
        return _html_table(self.tokens, title=html.escape(repr(self)))


@dataclass(frozen=True)
class BadFile:
    """A token that could not be loaded: the file (or index row) and why."""

    file: Path
    reason: str
    row: int | None = None  # CSV line number, or TextGrid interval number
    name: str = ""  # as written in the index (relative path) or the token id

    def describe(self) -> str:
        where = self.name or str(self.file)
        pre = f"row {self.row}: " if self.row is not None else ""
        return f"{pre}{where}: {self.reason}"


class _FileProblem(Exception):
    """Internal: why one file (other than audio, see audio_io.AudioFileProblem) cannot be used."""


def _downmix(data: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(data.mean(axis=1) if data.shape[1] > 1 else data[:, 0])


def _resample(x: np.ndarray, from_sr: int, to_sr: int) -> np.ndarray:
    if from_sr == to_sr:
        return np.ascontiguousarray(x, dtype=np.float64)
    import soxr

    return np.asarray(
        soxr.resample(np.ascontiguousarray(x, dtype=np.float64), from_sr, to_sr, quality="HQ"),
        dtype=np.float64,
    )


def _check_sr(sr: Any, name: str = "sr") -> int:
    if isinstance(sr, bool) or not isinstance(sr, (int, np.integer)) or not 1000 <= int(sr) <= 768000:
        raise CorpusError(f"{name} must be an integer sample rate in Hz (1000-768000), got {sr!r}")
    return int(sr)


def read_audio(path: str | Path, *, sr: int) -> np.ndarray:
    """Read a WAV/FLAC (any rate, any channel count) as mono float64 at ``sr``.

    Parameters
    ----------
    path : path
        Audio file readable by libsndfile.
    sr : int, Hz
        Output sample rate; soxr "HQ" resampling when it differs from the file's.

    Returns
    -------
    ndarray, float64, 1-D
        Mean of the channels, resampled.

    Raises
    ------
    CorpusError
        Naming the file, for a missing, empty, non-audio or truncated file.
    """
    sr = _check_sr(sr)
    path = Path(path)
    try:
        data, fs = _read_native(path)
    except (_FileProblem, AudioFileProblem) as exc:
        raise CorpusError(f"{path}: {exc}") from None
    return _resample(_downmix(data), fs, sr)


# --------------------------------------------------------------------------- processing
def _noise_floor(x: np.ndarray, sr: int) -> float:
    n = window_samples(NOISE_FRAME, sr=sr, minimum=1)
    k = x.size // n
    if k == 0:
        frames = np.sqrt(np.mean(x * x))[None]
    else:
        f = x[: k * n].reshape(k, n)
        frames = np.sqrt(np.mean(f * f, axis=1))
    return float(db(np.percentile(frames, NOISE_PERCENTILE)))


def _process(
    native: np.ndarray,
    native_sr: int,
    *,
    sr: int | None,
    trim: TrimSpec,
    qc: QCSpec,
    slot_duration: float | None,
) -> tuple[np.ndarray, tuple[int, int], TokenQC, int]:
    """Downmix, resample, trim and measure one token. Returns samples, trim, qc, rate."""
    out_sr = native_sr if sr is None else sr
    clipped = float(np.count_nonzero(np.abs(native) >= qc.clip_level)) / native.size
    x = _resample(_downmix(native), native_sr, out_sr)
    n = x.size
    bounds = active_bounds(x, sr=out_sr, threshold_db=trim.threshold_db, smooth=TRIM_SMOOTH)
    if bounds is None:
        a, b = 0, n
    else:
        pad = seconds_to_samples(trim.pad, sr=out_sr)
        a, b = max(0, bounds[0] - pad), min(n, bounds[1] + pad)
    y = x[a:b].copy()
    y.setflags(write=False)
    _, f0 = praat_f0(y, sr=out_sr)
    voiced = np.isfinite(f0)
    vf = float(np.mean(voiced)) if f0.size else 0.0
    mf0 = float(np.median(f0[voiced])) if np.any(voiced) else float("nan")
    peak, rms = peak_dbfs(y), rms_dbfs(y)
    flags = []
    if clipped > qc.max_clipped_fraction:
        flags.append("clipped")
    silent = not peak > SILENT_PEAK_DBFS
    if silent:
        flags.append("silent")
    elif rms < qc.quiet_dbfs:
        flags.append("too_quiet")
    if vf < qc.min_voiced_fraction:
        flags.append("no_voicing")
    if slot_duration is not None and y.size / out_sr > slot_duration:
        flags.append("longer_than_slot")
    q = TokenQC(
        duration_raw=n / out_sr,
        duration_trimmed=y.size / out_sr,
        peak_dbfs=peak,
        rms_dbfs=rms,
        clipped_fraction=clipped,
        voiced_fraction=vf,
        median_f0=mf0,
        noise_floor_dbfs=_noise_floor(x, out_sr),
        flags=tuple(flags),
        source_sr=int(native_sr),
        channels=int(native.shape[1]),
    )
    return y, (int(a), int(b)), q, out_sr


def _flag_duplicates(tokens: list[Token], keys: list[str]) -> list[Token]:
    groups: dict[str, list[int]] = {}
    for i, k in enumerate(keys):
        groups.setdefault(k, []).append(i)
    out = list(tokens)
    for idx in groups.values():
        if len(idx) > 1:
            names = ", ".join(tokens[i].id for i in idx)
            log.warning("identical audio in %d tokens: %s", len(idx), names)
            for i in idx:
                t = out[i]
                qc = dataclasses.replace(t.qc, flags=t.qc.flags + ("duplicate_file",))
                out[i] = dataclasses.replace(t, qc=qc)
    return out


def _check_label(label: str) -> str | None:
    if not label:
        return "empty label"
    if _BAD_LABEL.search(label):
        return (
            f"label {label!r} contains whitespace, '|' or '#', which the material text format "
            "reserves; rename it"
        )
    return None


def _raise_bad(bad: Sequence[BadFile], *, source: Path, what: str) -> None:
    if not bad:
        return
    lines = "\n".join(f"  {b.describe()}" for b in bad)
    raise CorpusError(
        f"{source}: {len(bad)} {what} cannot be used (every file was checked):\n{lines}"
    )


def _progress(it, *, total: int, desc: str, progress: bool):
    from tqdm.auto import tqdm

    return tqdm(it, total=total, desc=desc, unit="file", disable=not progress, leave=False)


# --------------------------------------------------------------------------- index.csv
def find_index(path: str | Path) -> Path:
    """Resolve a corpus folder or CSV path to the index CSV file.

    Raises
    ------
    CorpusError
        If the path does not exist, or a folder holds no ``index.csv``.
    """
    p = Path(path).expanduser()
    if p.is_dir():
        cand = p / "index.csv"
        if not cand.is_file():
            csvs = sorted(q.name for q in p.glob("*.csv"))
            other = f" (CSV files present: {', '.join(csvs)}; pass one of them)" if csvs else ""
            raise CorpusError(f"{p}: no index.csv in this folder{other}; {INDEX_HELP}")
        return cand
    if not p.exists():
        raise CorpusError(f"{p}: no such corpus folder or index file; {INDEX_HELP}")
    return p


def _read_index_rows(index: Path) -> tuple[list[str], list[tuple[int, dict[str, str]]]]:
    try:
        text = index.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise CorpusError(f"{index}: not UTF-8 text ({exc}); save the index as UTF-8 CSV") from None
    except OSError as exc:
        raise CorpusError(f"{index}: cannot read the index: {exc}") from None
    if not text.strip():
        raise CorpusError(f"{index}: the index is empty; {INDEX_HELP}")
    reader = csv.reader(text.splitlines(keepends=True))
    try:
        header = [h.strip() for h in next(reader)]
        raw_rows = [(reader.line_num, r) for r in reader]
    except csv.Error as exc:
        raise CorpusError(f"{index}: not a valid CSV file: {exc}") from None
    problems = []
    dup = sorted({h for h in header if header.count(h) > 1 and h})
    if dup:
        problems.append(f"repeated column name(s): {', '.join(dup)}")
    if any(not h for h in header):
        problems.append("a column has an empty name in the header row")
    missing = [c for c in ("label", "file") if c not in header]
    for c in missing:
        close = difflib.get_close_matches(c, header, n=1, cutoff=0.6)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        problems.append(f"required column {c!r} is missing{hint}")
    if problems:
        raise CorpusError(
            f"{index}: {'; '.join(problems)}; the header row is {header}; {INDEX_HELP}"
        )
    rows = []
    for line, r in raw_rows:
        if not any(v.strip() for v in r):
            continue  # blank line
        if len(r) != len(header):
            rows.append((line, {"__error__": f"has {len(r)} fields but the header has {len(header)}"}))
            continue
        rows.append((line, {h: v.strip() for h, v in zip(header, r)}))
    if not rows:
        raise CorpusError(f"{index}: the index has a header but no token rows; {INDEX_HELP}")
    return header, rows


def _scan_index(
    index_path: str | Path,
    *,
    sr: int | None,
    trim: TrimSpec,
    qc: QCSpec,
    slot_duration: float | None,
    progress: bool,
) -> tuple[Path, list[Token], list[BadFile]]:
    index = find_index(index_path)
    base = index.resolve().parent
    header, rows = _read_index_rows(index)
    bad: list[BadFile] = []
    seen: dict[Path, int] = {}
    todo = []
    for line, row in rows:
        if "__error__" in row:
            bad.append(BadFile(file=index, reason=row["__error__"], row=line, name=index.name))
            continue
        rel = row["file"]
        if not rel:
            bad.append(BadFile(file=index, reason="empty 'file' value", row=line, name=index.name))
            continue
        p = Path(rel).expanduser()
        path = (p if p.is_absolute() else base / p).resolve()
        name = PurePath(os.path.relpath(path, base)).as_posix()
        why = _check_label(row["label"])
        if why:
            bad.append(BadFile(file=path, reason=why, row=line, name=name))
            continue
        if path in seen:
            bad.append(
                BadFile(
                    file=path,
                    reason=f"already listed in row {seen[path]} (one file is one token; copy the "
                    "file to use it twice)",
                    row=line,
                    name=name,
                )
            )
            continue
        seen[path] = line
        todo.append((line, row, path, name))
    tokens: list[Token] = []
    keys: list[str] = []
    for line, row, path, name in _progress(todo, total=len(todo), desc="reading", progress=progress):
        try:
            native, fs = _read_native(path)
        except (_FileProblem, AudioFileProblem) as exc:
            bad.append(BadFile(file=path, reason=str(exc), row=line, name=name))
            continue
        samples, tr, q, out_sr = _process(
            native, fs, sr=sr, trim=trim, qc=qc, slot_duration=slot_duration
        )
        sha = sha256_file(path)
        meta = {k: v for k, v in row.items() if k not in ("label", "file")}
        tokens.append(
            Token(id=name, label=row["label"], file=path, samples=samples, sr=out_sr, trim=tr,
                  sha256=sha, metadata=meta, qc=q)
        )
        keys.append(sha)
    bad.sort(key=lambda b: (b.row or 0))
    return index, _flag_duplicates(tokens, keys), bad


def load_index(
    index_path: str | Path,
    *,
    sr: int,
    trim: TrimSpec = TrimSpec(),
    qc: QCSpec = QCSpec(),
    slot_duration: float | None = None,
    progress: bool = False,
) -> Corpus:
    """Load a corpus described by an index CSV.

    Parameters
    ----------
    index_path : path
        The CSV itself or the folder holding ``index.csv``.  Required columns ``label`` and
        ``file`` (relative to the CSV); other columns become :attr:`Token.metadata`.
    sr : int, Hz
        Corpus sample rate (every token is resampled to it).
    trim, qc : TrimSpec, QCSpec
        Trim and QC settings (the recipe's ``corpus.trim`` / ``corpus.qc``).
    slot_duration : float, seconds, optional
        When given, tokens longer than this after trimming are flagged ``longer_than_slot``.
    progress : bool
        Show a progress bar.

    Raises
    ------
    CorpusError
        For a missing index or columns, and, after checking all rows, one error listing every
        bad row and every missing, empty, non-audio or truncated file with its reason.

    Examples
    --------
    >>> corpus = load_index("demo_corpus", sr=16000)  # doctest: +SKIP
    >>> corpus.labels[:3]  # doctest: +SKIP
    """
    sr = _check_sr(sr)
    index, tokens, bad = _scan_index(
        index_path, sr=sr, trim=trim, qc=qc, slot_duration=slot_duration, progress=progress
    )
    _raise_bad(bad, source=index, what="token row(s)")
    return _finish(tokens, sr)


def _finish(tokens: list[Token], sr: int) -> Corpus:
    corpus = Corpus(tokens=tuple(tokens), sr=sr)
    flagged = corpus.flagged()
    if flagged:
        counts = _flag_counts(corpus.tokens)
        log.warning(
            "%d of %d tokens carry QC flags (%s); run `stimforge inspect` for the details",
            len(flagged), len(corpus), ", ".join(f"{k} {v}" for k, v in counts.items()),
        )
    return corpus


# --------------------------------------------------------------------------- TextGrid
def _read_textgrid_tier(textgrid: Path, tier: str) -> list[tuple[int, float, float, str]]:
    """All intervals (number, start, end, label) of an interval tier, via parselmouth."""
    import parselmouth
    from parselmouth.praat import call

    if not textgrid.is_file():
        raise _FileProblem("TextGrid file not found")
    try:
        tg = parselmouth.read(str(textgrid))
    except parselmouth.PraatError as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else "unknown error"
        raise _FileProblem(f"not a TextGrid Praat can read ({first})") from None
    if not isinstance(tg, parselmouth.TextGrid):
        raise _FileProblem(f"holds a Praat {type(tg).__name__}, not a TextGrid")
    n_tiers = int(call(tg, "Get number of tiers"))
    tiers = []
    for i in range(1, n_tiers + 1):
        tiers.append((call(tg, "Get tier name", i), bool(call(tg, "Is interval tier", i)), i))
    present = ", ".join(f"{n!r} ({'interval' if it else 'point'})" for n, it, _ in tiers) or "none"
    match = [t for t in tiers if t[0] == tier]
    if not match:
        close = difflib.get_close_matches(tier, [t[0] for t in tiers], n=1, cutoff=0.6)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        raise _FileProblem(f"no tier named {tier!r}; tiers present: {present}{hint}")
    if len(match) > 1:
        raise _FileProblem(f"{len(match)} tiers are named {tier!r}; rename all but one")
    _, is_interval, ti = match[0]
    if not is_interval:
        raise _FileProblem(
            f"tier {tier!r} is a point tier; tokens need an interval tier (tiers present: {present})"
        )
    out = []
    for k in range(1, int(call(tg, "Get number of intervals", ti)) + 1):
        out.append(
            (
                k,
                float(call(tg, "Get start time of interval", ti, k)),
                float(call(tg, "Get end time of interval", ti, k)),
                str(call(tg, "Get label of interval", ti, k)).strip(),
            )
        )
    if not any(lab for *_, lab in out):
        raise _FileProblem(f"tier {tier!r} has no labelled (non-empty) intervals")
    return out


def load_textgrid(
    recording: str | Path,
    textgrid: str | Path,
    tier: str,
    *,
    sr: int,
    trim: TrimSpec = TrimSpec(),
    qc: QCSpec = QCSpec(),
    slot_duration: float | None = None,
    progress: bool = False,
) -> Corpus:
    """Cut one recording into tokens at the labelled intervals of a TextGrid tier.

    Each non-empty interval is a token labelled with its text (surrounding spaces removed).
    Its edges are cut at samples ``round_half_up(t * fs)`` of the recording at the recording's
    own rate (downmixed to mono), then the cut is resampled to ``sr``, trimmed and measured
    like a file token.  An end up to 1 ms past the recording's last sample is clamped to it
    (TextGrid times are often rounded up); further is an error.  Token ids are ``"<recording file name>#<interval number>"``.

    Parameters
    ----------
    recording : path
        The long recording (WAV/FLAC, any rate and channel count).
    textgrid : path
        Praat TextGrid (text or short text format, UTF-8 or UTF-16).
    tier : str
        Name of the interval tier.
    sr : int, Hz
        Corpus sample rate.
    trim, qc, slot_duration, progress
        As in :func:`load_index`.

    Raises
    ------
    CorpusError
        Listing every problem at once: unreadable recording or TextGrid, missing tier (naming the
        tiers present), a point tier, no labelled interval, intervals past the recording's end or
        with unusable labels.
    """
    sr = _check_sr(sr)
    recording, textgrid = Path(recording).expanduser(), Path(textgrid).expanduser()
    bad: list[BadFile] = []
    native = fs = None
    intervals: list[tuple[int, float, float, str]] = []
    try:
        native, fs = _read_native(recording)
    except (_FileProblem, AudioFileProblem) as exc:
        bad.append(BadFile(file=recording, reason=str(exc), name=str(recording)))
    try:
        intervals = _read_textgrid_tier(textgrid, tier)
    except (_FileProblem, AudioFileProblem) as exc:
        bad.append(BadFile(file=textgrid, reason=str(exc), name=str(textgrid)))
    if bad:
        _raise_bad(bad, source=textgrid, what="input file(s)")
    assert native is not None and fs is not None
    mono = _downmix(native)
    n_native = mono.size
    rec_name = recording.name
    sha = sha256_file(recording)
    cuts = []
    for k, t0, t1, lab in intervals:
        if not lab:
            continue
        tid = f"{rec_name}#{k}"
        a = round_half_up(exact(max(t0, 0.0)) * fs)
        b = round_half_up(exact(t1) * fs)
        why = _check_label(lab)
        if n_native < b <= n_native + window_samples(END_SLACK, sr=fs, minimum=1):
            b = n_native  # TextGrid end times are often rounded past the last sample
        if why is None and b > n_native:
            why = (
                f"interval {k} ({lab!r}, {t0:.3f}-{t1:.3f} s) runs past the end of the recording "
                f"({n_native / fs:.3f} s); fix the TextGrid or use the matching recording"
            )
        if why is None and b <= a:
            why = f"interval {k} ({lab!r}) is shorter than one sample at {fs} Hz"
        if why:
            bad.append(BadFile(file=textgrid, reason=why, row=k, name=tid))
            continue
        cuts.append((k, t0, t1, lab, tid, a, b))
    _raise_bad(bad, source=textgrid, what="interval(s)")
    tokens, keys = [], []
    for k, t0, t1, lab, tid, a, b in _progress(cuts, total=len(cuts), desc="cutting", progress=progress):
        seg = native[a:b]
        samples, tr, q, out_sr = _process(
            seg, fs, sr=sr, trim=trim, qc=qc, slot_duration=slot_duration
        )
        meta = {
            "textgrid": textgrid.name,
            "tier": tier,
            "interval": str(k),
            "start": repr(t0),
            "end": repr(t1),
        }
        tokens.append(
            Token(id=tid, label=lab, file=recording.resolve(), samples=samples, sr=out_sr,
                  trim=tr, sha256=sha, metadata=meta, qc=q)
        )
        keys.append(hashlib.sha256(np.ascontiguousarray(seg).tobytes()).hexdigest())
    return _finish(_flag_duplicates(tokens, keys), sr)


def load_corpus(
    spec: CorpusSpec, *, sr: int, slot_duration: float | None = None, progress: bool = False
) -> Corpus:
    """Load the corpus a recipe describes (``recipe.corpus``), at the project rate ``sr``.

    Parameters
    ----------
    spec : CorpusSpec
        ``index`` or ``recording`` + ``textgrid`` + ``tier``, with ``trim`` and ``qc``.
    sr : int, Hz
        Output (project) sample rate.
    slot_duration : float, seconds, optional
        The unit slot, for the ``longer_than_slot`` flag.
    """
    if spec.index is not None:
        return load_index(
            spec.index, sr=sr, trim=spec.trim, qc=spec.qc, slot_duration=slot_duration,
            progress=progress,
        )
    return load_textgrid(
        spec.recording, spec.textgrid, spec.tier, sr=sr, trim=spec.trim, qc=spec.qc,
        slot_duration=slot_duration, progress=progress,
    )


# --------------------------------------------------------------------------- inspect
def _flag_counts(tokens: Sequence[Token]) -> dict[str, int]:
    counts = {f: 0 for f in FLAGS}
    for t in tokens:
        for f in t.qc.flags:
            counts[f] = counts.get(f, 0) + 1
    return {k: v for k, v in counts.items() if v}


def _fmt(v: float, spec: str) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "n/a"
    if isinstance(v, float) and math.isinf(v):
        return "-inf" if v < 0 else "inf"
    return format(v, spec)


_COLUMNS = [
    # header, getter, format, width
    ("label", lambda t: t.label, "s", 8),
    ("src_hz", lambda t: t.qc.source_sr, "d", 6),
    ("ch", lambda t: t.qc.channels, "d", 3),
    ("raw_s", lambda t: t.qc.duration_raw, ".3f", 7),
    ("trim_s", lambda t: t.qc.duration_trimmed, ".3f", 7),
    ("peak_db", lambda t: t.qc.peak_dbfs, ".1f", 8),
    ("rms_db", lambda t: t.qc.rms_dbfs, ".1f", 7),
    ("floor_db", lambda t: t.qc.noise_floor_dbfs, ".1f", 9),
    ("clip_%", lambda t: 100 * t.qc.clipped_fraction, ".2f", 7),
    ("voiced_%", lambda t: 100 * t.qc.voiced_fraction, ".0f", 9),
    ("f0_hz", lambda t: t.qc.median_f0, ".1f", 7),
]


def _html_table(tokens: Sequence[Token], *, title: str) -> str:
    head = "".join(f"<th>{h}</th>" for h in ["token"] + [c[0] for c in _COLUMNS] + ["flags"])
    body = []
    for t in tokens:
        cells = [html.escape(t.id)] + [html.escape(_fmt(g(t), f)) for _, g, f, _ in _COLUMNS]
        cells.append(html.escape(", ".join(t.qc.flags)))
        body.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    return f"<p>{title}</p><table><tr>{head}</tr>{''.join(body)}</table>"


@dataclass(frozen=True)
class InspectReport:
    """What :func:`inspect_corpus` found: measured tokens and files that could not be used."""

    index: Path
    tokens: tuple[Token, ...]
    bad: tuple[BadFile, ...]
    sr: int | None = None
    slot_duration: float | None = None
    trim: TrimSpec = field(default_factory=TrimSpec)
    qc: QCSpec = field(default_factory=QCSpec)

    @property
    def ok(self) -> bool:
        """True when every row loaded (flags do not count as failures)."""
        return not self.bad

    def flag_counts(self) -> dict[str, int]:
        """Number of tokens carrying each flag (flags that occur only)."""
        return _flag_counts(self.tokens)

    def summary(self) -> str:
        """A few lines: counts per flag, labels, duration, level and F0 ranges."""
        toks = self.tokens
        lines = [f"{len(toks)} token(s) loaded, {len(self.bad)} bad file(s)/row(s) from {self.index}"]
        if toks:
            per: dict[str, int] = {}
            for t in toks:
                per[t.label] = per.get(t.label, 0) + 1
            lo, hi = min(per.values()), max(per.values())
            lines.append(
                f"labels: {len(per)} ({lo}{'' if lo == hi else f'-{hi}'} token(s) per label)"
            )
            d = [t.qc.duration_trimmed for t in toks]
            dr = [t.qc.duration_raw for t in toks]
            slot = f"; slot {self.slot_duration:g} s" if self.slot_duration is not None else ""
            lines.append(
                f"duration after trim: {min(d):.3f}-{max(d):.3f} s (median {np.median(d):.3f}; "
                f"before trim {min(dr):.3f}-{max(dr):.3f} s){slot}"
            )
            r = [t.qc.rms_dbfs for t in toks if np.isfinite(t.qc.rms_dbfs)]
            if r:
                lines.append(f"RMS level: {min(r):.1f} to {max(r):.1f} dBFS")
            f = [t.qc.median_f0 for t in toks if np.isfinite(t.qc.median_f0)]
            if f:
                lines.append(
                    f"median F0: {min(f):.1f}-{max(f):.1f} Hz over {len(f)} voiced token(s) "
                    f"(corpus median {np.median(f):.1f} Hz)"
                )
            else:
                lines.append("median F0: no voiced token")
            counts = self.flag_counts()
            lines.append(
                "flags: " + (", ".join(f"{k} {v}" for k, v in counts.items()) if counts else "none")
            )
        return "\n".join(lines)

    def format_table(self, *, include_bad: bool = True) -> str:
        """One row per token (its id = file) with its numbers and flags, then the summary and
        (``include_bad``) the bad files with their reasons ("row N" = line N of the CSV, the
        header being row 1)."""
        wid = max([5] + [len(t.id) for t in self.tokens])
        lab = max([5] + [len(t.label) for t in self.tokens])
        cols = [(h, g, f, (lab if h == "label" else w)) for h, g, f, w in _COLUMNS]
        head = f"{'token':<{wid}}  " + " ".join(
            f"{h:<{w}}" if f == "s" else f"{h:>{w}}" for h, _, f, w in cols
        ) + "  flags"
        lines = [head]
        for t in self.tokens:
            cells = []
            for h, g, f, w in cols:
                v = g(t)
                cells.append(f"{v:<{w}}" if f == "s" else f"{_fmt(v, f):>{w}}")
            lines.append(f"{t.id:<{wid}}  " + " ".join(cells) + "  " + (",".join(t.qc.flags) or "-"))
        lines.append("")
        lines.append(self.summary())
        if self.bad and include_bad:
            lines.append(f"{len(self.bad)} file(s)/row(s) cannot be used:")
            lines.extend(f"  {b.describe()}" for b in self.bad)
        return "\n".join(lines)

    def write_tsv(self, path: str | Path) -> Path:
        """Write one tab-separated row per token and per bad file (``n/a`` for missing values).

        Columns: token, label, status (ok/bad), problem, sr, channels, duration_raw,
        duration_trimmed, trim_start, trim_end, peak_dbfs, rms_dbfs, noise_floor_dbfs,
        clipped_fraction, voiced_fraction, median_f0, flags (comma-separated).
        """
        path = Path(path)
        cols = ["token", "label", "status", "problem", "sr", "channels", "duration_raw",
                "duration_trimmed", "trim_start", "trim_end", "peak_dbfs", "rms_dbfs",
                "noise_floor_dbfs", "clipped_fraction", "voiced_fraction", "median_f0", "flags"]
        out = ["\t".join(cols)]
        for t in self.tokens:
            q = t.qc
            vals = [t.id, t.label, "ok", "n/a", str(q.source_sr), str(q.channels),
                    _fmt(q.duration_raw, ".6f"), _fmt(q.duration_trimmed, ".6f"), str(t.trim[0]),
                    str(t.trim[1]), _fmt(q.peak_dbfs, ".3f"), _fmt(q.rms_dbfs, ".3f"),
                    _fmt(q.noise_floor_dbfs, ".3f"), _fmt(q.clipped_fraction, ".6f"),
                    _fmt(q.voiced_fraction, ".4f"), _fmt(q.median_f0, ".3f"),
                    ",".join(q.flags) or "n/a"]
            out.append("\t".join(vals))
        for b in self.bad:
            vals = [b.name or str(b.file), "n/a", "bad", b.reason.replace("\t", " ")]
            out.append("\t".join(vals + ["n/a"] * (len(cols) - len(vals))))
        path.write_text("\n".join(out) + "\n", encoding="utf-8")
        return path

    def __repr__(self) -> str:
        return (
            f"InspectReport({self.index}: {len(self.tokens)} tokens, {len(self.bad)} bad, "
            f"flags {self.flag_counts() or 'none'})"
        )

    def _repr_html_(self) -> str:
        extra = "".join(f"<li>{html.escape(b.describe())}</li>" for b in self.bad)
        return _html_table(self.tokens, title=html.escape(repr(self))) + (
            f"<ul>{extra}</ul>" if extra else ""
        )


def inspect_corpus(
    path: str | Path,
    *,
    sr: int | None = None,
    slot_duration: float | None = None,
    max_stretch: float | None = RetimeSpec().stretch_range[1],
    trim: TrimSpec = TrimSpec(),
    qc: QCSpec = QCSpec(),
    progress: bool = False,
) -> InspectReport:
    """Measure every token of an index corpus without failing on bad files.

    Parameters
    ----------
    path : path
        Corpus folder holding ``index.csv``, or the CSV itself.
    sr : int, Hz, optional
        Rate to measure at; None measures each file at its own rate.
    slot_duration : float, seconds, optional
        Flag tokens longer than this after trimming (``longer_than_slot``).
    max_stretch : float, optional
        With ``slot_duration``: flag tokens shorter than ``slot_duration / max_stretch``
        (``too_short_to_stretch``), which re-timing would have to stretch beyond its range;
        default the upper end of the default ``retime.stretch_range``; None turns it off.

    Returns
    -------
    InspectReport
        Good tokens and bad files/rows with reasons.  A missing index or missing columns still
        raise :class:`~stimforge.errors.CorpusError` (there is nothing to inspect).
    """
    if sr is not None:
        sr = _check_sr(sr)
    index, tokens, bad = _scan_index(
        path, sr=sr, trim=trim, qc=qc, slot_duration=slot_duration, progress=progress
    )
    if slot_duration is not None and max_stretch is not None:
        # a token shorter than slot / max_stretch would need more stretching than the range
        # allows (retime.stretch_range): flag it here, as the build would refuse it
        shortest = float(slot_duration) / float(max_stretch)
        tokens = [dataclasses.replace(t, qc=dataclasses.replace(
                      t.qc, flags=t.qc.flags + ("too_short_to_stretch",)))
                  if t.qc.duration_trimmed < shortest else t for t in tokens]
    return InspectReport(
        index=index, tokens=tuple(tokens), bad=tuple(bad), sr=sr, slot_duration=slot_duration,
        trim=trim, qc=qc,
    )

"""Does the grid fit the audio?  Checked before any test of the acoustic check.

A grid that does not fit the audio (plain files checked with the wrong ``--offset``, a build
folder whose tables were edited) makes every unit's slot hold the end of one syllable and the
start of the next, or silence: the tests would then report a "cue" that is an input error.  So
the check first looks at what it measured anyway and refuses (exit 2), saying what it found and
what would fix it, when:

* **silence at the window's ends**: in at least half of the files the analysed window starts
  with at least half a unit of silence before the first acoustic onset, or ends with at least
  one whole unit of silence after the last acoustic offset (onset and offset: the first and last
  millisecond whose peak is within ``ONSET_THRESHOLD_DB`` (-40 dB) of the file's peak);
* **slot boundaries inside the sound**: units placed on a grid (cut/pad, re-timed, with fades)
  are quiet at their joins.  The mean absolute amplitude in 1-ms bins, folded over the units of
  a file (a profile over one slot), is compared, within +-5 ms of the slot boundary, with its
  quietest 10-ms stretch anywhere in the slot: a boundary that is louder than
  :data:`BOUNDARY_MAX_DB` re the slot's mean *and* more than :data:`BOUNDARY_EXCESS_DB` above the
  quietest stretch means the boundaries fall inside the syllables;
* **digital silence**: a trial whose samples are all zero is refused; one more than
  :data:`QUIET_TRIAL_DB` below the median trial is reported in the warnings.

(The unit rate itself must also show a clear peak: :mod:`stimforge.verify` checks that.)

:func:`estimate_offset` gives the grid start of plain files from their first acoustic onsets
(median over the files, rounded down to 10 ms: a slot starts at or a few ms before its sound,
after a fade or a soft consonant), for ``--offset auto`` and for the fix in the error message.
It assumes that the first unit's sound starts near its slot's start: for units aligned well
into their slots (e.g. on a steepest rise 100 ms in), give ``--offset`` yourself.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from .defaults import ONSET_THRESHOLD_DB
from .errors import CheckInputError
from .timing import table_samples, window_samples

__all__ = ["TrialFit", "trial_fit", "fit_findings", "quick_fit", "estimate_offset", "onset_offset",
           "BOUNDARY_MAX_DB", "BOUNDARY_EXCESS_DB", "QUIET_TRIAL_DB"]

#: A slot boundary louder than this (dB re the slot's mean amplitude) ...
BOUNDARY_MAX_DB = -6.0
#: ... and this many dB above the quietest 10 ms of the slot is inside the sound.
BOUNDARY_EXCESS_DB = 10.0
#: A trial this many dB below the median trial (window RMS) is reported.
QUIET_TRIAL_DB = 30.0
_HALF = 5  # ms either side of the boundary
_OFFSET_STEP = 0.010  # s: resolution of the offset estimate (rounded down)


@dataclass(frozen=True)
class TrialFit:
    """What the grid-fit check keeps of one trial (small)."""

    name: str
    condition: str
    duration: float  # s, the file
    window: tuple[float, float]  # s in the file: analysed window
    onset: float | None  # s in the file: first acoustic onset (None: silent)
    offset: float | None  # s in the file: last acoustic offset
    peak: float  # max |x| over the file
    window_rms_db: float
    boundary_db: float  # dB re the slot mean, +-5 ms around the slot boundary
    quietest_db: float  # dB re the slot mean, quietest 10 ms of the folded slot
    quietest_at: float  # s into the slot of the quietest 10 ms' centre

    @property
    def lead_silence(self) -> float | None:
        return None if self.onset is None else max(0.0, self.onset - self.window[0])

    @property
    def tail_silence(self) -> float | None:
        return None if self.offset is None else max(0.0, self.window[1] - self.offset)


def onset_offset(x: np.ndarray, *, sr: int,
                 threshold_db: float = ONSET_THRESHOLD_DB) -> tuple[float, float] | None:
    """First and last acoustic millisecond of ``x``, seconds; None when it is silent.

    ``x`` is cut into 1-ms bins; a bin is sound when its peak is within ``threshold_db`` of the
    whole signal's peak.  The onset is the first sound bin's start, the offset the last one's end.
    """
    a = np.abs(np.asarray(x, dtype=np.float64))
    ms = window_samples(0.001, sr=sr, minimum=1)
    n = a.size // ms
    if n == 0:
        return None
    peaks = a[: n * ms].reshape(n, ms).max(axis=1)
    top = float(peaks.max())
    if top <= 0:
        return None
    idx = np.flatnonzero(peaks >= top * 10.0 ** (threshold_db / 20.0))
    return float(idx[0] * ms / sr), float((idx[-1] + 1) * ms / sr)


def _db(a: float, ref: float) -> float:
    return 20.0 * math.log10(a / ref) if a > 0 and ref > 0 else float("-inf")


def trial_fit(x: np.ndarray, units: np.ndarray, *, sr: int, window: tuple[float, float],
              name: str, condition: str) -> TrialFit:
    """Grid-fit measurements of one trial.

    Parameters
    ----------
    x : ndarray, shape (n,)
        The whole file (mono).
    units : ndarray, shape (n_units, n_slot)
        The analysed slots, all cut to one length.
    sr : int, Hz
    window : (float, float), seconds in the file
    """
    ms = window_samples(0.001, sr=sr, minimum=1)
    nb = units.shape[1] // ms
    prof = np.abs(units[:, : nb * ms]).reshape(units.shape[0], nb, ms).mean(axis=(0, 2))
    mean = float(prof.mean()) if prof.size else 0.0
    h = min(_HALF, max(1, nb // 8))
    around = np.concatenate([prof[:h], prof[-h:]])
    c = np.convolve(np.concatenate([prof[-h:], prof, prof[:h]]), np.ones(2 * h) / (2 * h),
                    mode="valid")[: nb]  # c[t]: mean over bins t-h .. t+h-1 (circular)
    q = int(np.argmin(c)) if c.size else 0
    oo = onset_offset(x, sr=sr)
    seg = x[table_samples(window[0], sr=sr):table_samples(window[1], sr=sr)]
    rms = float(np.sqrt(np.mean(seg * seg))) if seg.size else 0.0
    return TrialFit(name=name, condition=condition, duration=x.size / sr, window=window,
                    onset=None if oo is None else oo[0], offset=None if oo is None else oo[1],
                    peak=float(np.max(np.abs(x))) if x.size else 0.0,
                    window_rms_db=_db(rms, 1.0), boundary_db=_db(float(around.mean()), mean),
                    quietest_db=_db(float(c[q]), mean) if c.size else float("-inf"),
                    quietest_at=q * ms / sr)


def boundaries_inside_sound(f: TrialFit) -> bool:
    """True when the trial's slot boundaries fall inside the sound (see module docs)."""
    return (np.isfinite(f.boundary_db) and f.boundary_db > BOUNDARY_MAX_DB
            and f.boundary_db - f.quietest_db > BOUNDARY_EXCESS_DB)


def _offset_from_onsets(onsets: Sequence[float | None]) -> dict:
    found = [o for o in onsets if o is not None]
    if not found:
        raise CheckInputError("--offset auto: every file is silent; nothing to place a grid on")
    med = float(np.median(found))
    off = math.floor(med / _OFFSET_STEP + 1e-6) * _OFFSET_STEP
    return {"offset": round(off, 6), "median_onset": med, "onsets": list(onsets),
            "spread": float(max(found) - min(found)), "n_files": len(onsets)}


def estimate_offset(paths: Sequence[str | Path], *, read) -> dict:
    """Grid start of plain files: median first acoustic onset, rounded down to 10 ms.

    Parameters
    ----------
    paths : sequence of path
    read : callable
        ``read(path) -> (mono samples, sr)``.

    Returns
    -------
    dict
        ``offset`` (s), ``onsets`` (s per file, None for a silent file), ``spread``
        (max - min of the onsets, s), ``n_files``.
    """
    onsets: list[float | None] = []
    for p in paths:
        x, sr = read(Path(p))
        oo = onset_offset(x, sr=sr)
        onsets.append(None if oo is None else oo[0])
    return _offset_from_onsets(onsets)


def quick_fit(paths: Sequence[str | Path], *, read, window: tuple[float, float],
              unit_duration: float, offset: float) -> None:
    """The silence checks of :func:`fit_findings` on plain files, before any measuring.

    Reads each file once for its acoustic onset and offset (cheap), so that a grid placed in
    the silence before the units fails at once, naming the offset to pass.
    """
    fits = []
    onsets = []
    for p in paths:
        x, sr = read(Path(p))
        oo = onset_offset(x, sr=sr)
        onsets.append(None if oo is None else oo[0])
        fits.append(TrialFit(name=str(p), condition="all", duration=x.size / sr, window=window,
                             onset=onsets[-1], offset=None if oo is None else oo[1],
                             peak=float(np.max(np.abs(x))) if x.size else 0.0,
                             window_rms_db=0.0, boundary_db=float("nan"),
                             quietest_db=float("nan"), quietest_at=0.0))
    try:
        fit_findings(fits, unit_duration=unit_duration, mode="files", offset=offset)
    except CheckInputError:
        sug = _offset_from_onsets(onsets)["offset"] if any(o is not None for o in onsets) else None
        fit_findings(fits, unit_duration=unit_duration, mode="files", offset=offset,
                     suggested=sug)
        raise


def _fmt_offset(s: float) -> str:
    return f"{s:.3f}".rstrip("0").rstrip(".") if s else "0"


def fit_findings(fits: Sequence[TrialFit], *, unit_duration: float, mode: str,
                 offset: float | None = None, suggested: float | None = None) -> dict:
    """Judge the grid fit of a measured set; raise :class:`CheckInputError` when it does not fit.

    Parameters
    ----------
    fits : sequence of TrialFit
    unit_duration : float, seconds
    mode : {"build", "files"}
    offset : float, seconds
        The grid start used (plain files).
    suggested : float, seconds, optional
        The offset estimated from the files' onsets (plain files), named in the fix.

    Returns
    -------
    dict
        The findings for the report: ``lead_silence`` / ``tail_silence`` (median, s),
        ``boundary_db`` / ``quietest_db`` (median), ``quiet_trials`` (warnings), ``fits``.
    """
    T = float(unit_duration)
    problems: list[str] = []
    warnings: list[str] = []
    silent = [f.name for f in fits if f.peak <= 0]
    if silent:
        problems.append(
            f"{len(silent)} trial(s) are digitally silent (every sample is 0): "
            f"{', '.join(silent[:5])}{' ...' if len(silent) > 5 else ''}; remove or replace them")
    live = [f for f in fits if f.peak > 0]
    med_rms = float(np.median([f.window_rms_db for f in live])) if live else float("nan")
    for f in live:
        if f.window_rms_db < med_rms - QUIET_TRIAL_DB:
            warnings.append(f"{f.name}: {med_rms - f.window_rms_db:.0f} dB below the median "
                            "trial in the analysed window; listen to it (a silent or wrong file?)")
    lead = [f.lead_silence for f in live if f.lead_silence is not None]
    tail = [f.tail_silence for f in live if f.tail_silence is not None]
    lead_med = float(np.median(lead)) if lead else 0.0
    tail_med = float(np.median(tail)) if tail else 0.0
    fix_files = ""
    if mode == "files" and suggested is not None:
        fix_files = (f"units appear to start at {suggested:.3f} s: pass --offset "
                     f"{_fmt_offset(suggested)} (or --offset auto)")
    n_lead = sum(1 for v in lead if v >= 0.5 * T)
    if lead and n_lead * 2 >= len(live):
        what = (f"the analysed window starts with {lead_med:.3f} s of silence (median over "
                f"{len(live)} file(s); {n_lead} start with half a unit or more)")
        if mode == "files":
            problems.append(f"{what}, with --offset {_fmt_offset(offset or 0.0)}: {fix_files}")
        else:
            problems.append(f"{what}: the tables' analysis_onset or units.tsv onsets do not "
                            "match the audio; rebuild the set")
    n_tail = sum(1 for v in tail if v >= T)
    if tail and n_tail * 2 >= len(live):
        what = (f"the analysed window ends with {tail_med:.3f} s of silence (median over "
                f"{len(live)} file(s); {n_tail} end with a whole unit or more)")
        if mode == "files":
            problems.append(f"{what}: trim the silence after the last unit of the files (the "
                            "window is the largest whole number of top-level groups that fits "
                            "after the offset)")
        else:
            problems.append(f"{what}: the tables do not match the audio; rebuild the set")
    inside = [f for f in live if boundaries_inside_sound(f)]
    if inside and (mode == "build" or len(inside) * 2 >= len(live)):
        w = inside[0]
        shift = w.quietest_at if w.quietest_at <= T / 2 else w.quietest_at - T
        what = (f"the slot boundaries fall inside the sound in {len(inside)} of {len(live)} "
                f"file(s) (e.g. {w.name}: {w.boundary_db:+.1f} dB re the slots' mean at the "
                f"boundaries, the quietest 10 ms of a slot at {w.quietest_db:+.1f} dB, "
                f"{shift * 1000:+.0f} ms from the boundary)")
        if mode == "files":
            problems.append(f"{what}: {fix_files or 'check --offset and --unit-duration'}")
        else:
            names = ", ".join(f.name for f in inside[:5]) + (" ..." if len(inside) > 5 else "")
            problems.append(f"{what}: the unit onsets in units.tsv / trials.tsv do not match the "
                            f"audio of {names}; rebuild the set")
    if problems:
        head = "the grid does not fit the audio: "
        raise CheckInputError(head + ("\n  ".join([""] + problems) if len(problems) > 1
                                      else problems[0]))
    return {"lead_silence": lead_med, "tail_silence": tail_med,
            "boundary_db": float(np.median([f.boundary_db for f in live])) if live else None,
            "quietest_db": float(np.median([f.quietest_db for f in live])) if live else None,
            "warnings": warnings}

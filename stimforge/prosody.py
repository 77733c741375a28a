"""Pitch and level policies, the set-wide peak guard, and fades.

These are the pieces of :mod:`stimforge.retime` that do not depend on a re-timing backend:

* pitch policies act on a frame-wise F0 track (Hz, 0 = unvoiced), the form WORLD uses;
  the overlap-add backend applies the same rules to Praat's pitch tier;
* F0 is *measured* with Praat (:func:`stimforge.acoustics.praat_f0`), never with WORLD, so
  that the check does not grade WORLD with WORLD;
* level is the RMS over a token's active part (:func:`stimforge.acoustics.active_mask`),
  because plain RMS counts the silence a short token is padded with;
* the peak guard lowers the *whole set* by one gain, never single tokens, so that relative
  levels (which carry no position information) stay equal.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .acoustics import active_mask, praat_f0, raised_cosine_fade, rms_dbfs, semitones
from .errors import AudioInputError, RetimeError
from .timing import window_samples

__all__ = [
    "F0Summary",
    "f0_summary",
    "geometric_mean",
    "apply_pitch_policy",
    "active_rms_dbfs",
    "level_gain_db",
    "peak_guard_gain_db",
    "apply_fade",
    "PITCH_POLICIES",
    "F0_CONTEXT_S",
]

logger = logging.getLogger("stimforge")

PITCH_POLICIES = ("flat", "contour", "keep")
_OLD_POLICY = {"level": "contour"}  # old spelling, read for one release
#: Seconds of silence put around a clip before Praat reads its F0: Praat's frames cannot reach
#: the first and last ~20 ms of a bare clip, which biases the reading of a contour.
F0_CONTEXT_S = 0.1


@dataclass(frozen=True)
class F0Summary:
    """Praat F0 of one signal.

    Attributes
    ----------
    median_hz : float, Hz
        Median over voiced frames; NaN if none.
    sd_st : float, semitones
        Standard deviation (ddof=0) of the voiced frames in semitones; NaN below 2 frames.
    voiced_fraction : float
        Voiced frames / all frames (0 for signals too short for Praat).
    times : ndarray, s
    f0 : ndarray, Hz, NaN unvoiced
    """

    median_hz: float
    sd_st: float
    voiced_fraction: float
    times: np.ndarray
    f0: np.ndarray

    def __repr__(self) -> str:
        return (
            f"F0Summary(median={self.median_hz:.2f} Hz, sd={self.sd_st:.3f} st, "
            f"voiced={self.voiced_fraction:.2f} of {self.f0.size} frames)"
        )

    @property
    def geometric_mean_hz(self) -> float:
        v = self.f0[np.isfinite(self.f0)]
        return geometric_mean(v) if v.size else float("nan")


def f0_summary(x: np.ndarray, *, sr: int, context: float = 0.0) -> F0Summary:
    """Measure ``x`` with Praat's autocorrelation pitch (75-600 Hz, 5 ms steps).

    Parameters
    ----------
    x : ndarray, (n,)
    sr : int, Hz
    context : float, seconds >= 0
        Silence added on both sides before measuring (times stay relative to the padded
        signal); :data:`F0_CONTEXT_S` is what records and the corpus target use.

    Returns
    -------
    F0Summary
    """
    x = np.asarray(x, dtype=np.float64)
    if context > 0:
        z = np.zeros(window_samples(context, sr=sr))
        x = np.concatenate([z, x, z])
    times, f0 = praat_f0(x, sr=sr)
    voiced = f0[np.isfinite(f0)]
    med = float(np.median(voiced)) if voiced.size else float("nan")
    sd = float(np.std(semitones(voiced, med))) if voiced.size >= 2 else float("nan")
    frac = float(voiced.size / f0.size) if f0.size else 0.0
    return F0Summary(median_hz=med, sd_st=sd, voiced_fraction=frac, times=times, f0=f0)


def geometric_mean(f: np.ndarray) -> float:
    """exp(mean(log f)) of positive values."""
    f = np.asarray(f, dtype=np.float64)
    return float(np.exp(np.mean(np.log(f))))


def apply_pitch_policy(
    f0: np.ndarray, *, policy: str, target_hz: float | None, reference: np.ndarray | None = None
) -> tuple[np.ndarray, list[str]]:
    """Apply a pitch policy to a frame-wise F0 track; unvoiced frames (0) stay 0.

    Parameters
    ----------
    f0 : ndarray, Hz
        0 (or less) marks unvoiced frames.
    policy : {"flat", "contour", "keep"}
        ``flat``: every voiced frame at ``target_hz``.  ``contour`` (old spelling ``level``):
        the track times ``target_hz / geometric_mean(voiced reference)``, so the contour shape
        is kept and its geometric mean lands on the target.  ``keep``: unchanged.
    target_hz : float or None, Hz
        Needed by ``flat`` and ``contour``.
    reference : ndarray or None, Hz
        Voiced values whose geometric mean defines the token's height for ``contour`` (default:
        the voiced values of ``f0``).  Pass the token's own analysis frames so that the
        height does not depend on how the track was resampled.

    Returns
    -------
    f0 : ndarray, Hz
    warnings : list of str
    """
    policy = _OLD_POLICY.get(policy, policy)
    if policy not in PITCH_POLICIES:
        raise RetimeError(f"pitch.policy: unknown policy {policy!r}; use one of {PITCH_POLICIES}")
    out = np.array(f0, dtype=np.float64, copy=True)
    voiced = out > 0
    out[~voiced] = 0.0
    if policy == "keep":
        return out, []
    if target_hz is None or not np.isfinite(target_hz) or target_hz <= 0:
        raise RetimeError(
            f"pitch.policy {policy!r} needs a target F0 (got {target_hz!r}): set pitch.target_hz "
            "or pass target_f0"
        )
    if not np.any(voiced):
        return out, [f"pitch policy {policy!r}: no voiced frame, nothing to change"]
    if policy == "flat":
        out[voiced] = float(target_hz)
        return out, []
    ref = out[voiced] if reference is None else np.asarray(reference, dtype=np.float64)
    ref = ref[ref > 0]
    if ref.size == 0:
        ref = out[voiced]
    out[voiced] *= float(target_hz) / geometric_mean(ref)
    return out, []


def active_rms_dbfs(x: np.ndarray, *, sr: int, threshold_db: float) -> float:
    """RMS (dBFS) over the active part of ``x`` (envelope within ``threshold_db`` of its peak)."""
    x = np.asarray(x, dtype=np.float64)
    m = active_mask(x, sr=sr, threshold_db=threshold_db)
    if not np.any(m):
        return float("-inf")
    return rms_dbfs(x[m])


def level_gain_db(x: np.ndarray, *, sr: int, target_dbfs: float, threshold_db: float) -> float:
    """Gain (dB) that brings the active-part RMS of ``x`` to ``target_dbfs``.

    Raises
    ------
    AudioInputError
        For a silent signal (no active part).
    """
    r = active_rms_dbfs(x, sr=sr, threshold_db=threshold_db)
    if not np.isfinite(r):
        raise AudioInputError("level: the signal is silent, its level cannot be set")
    return float(target_dbfs - r)


def peak_guard_gain_db(peaks_dbfs: Sequence[float], *, ceiling_dbfs: float) -> float:
    """Set-wide gain (<= 0 dB) that keeps every peak at or below ``ceiling_dbfs``.

    Parameters
    ----------
    peaks_dbfs : sequence of float, dBFS
        Each token's peak at its own level gain.
    ceiling_dbfs : float, dBFS

    Returns
    -------
    float, dB
        0 if every peak is already at or below the ceiling, else ``ceiling - max(peaks)``.
    """
    p = np.asarray([v for v in peaks_dbfs if np.isfinite(v)], dtype=np.float64)
    if p.size == 0:
        return 0.0
    return float(min(0.0, ceiling_dbfs - float(np.max(p))))


def apply_fade(x: np.ndarray, *, sr: int, fade: float) -> np.ndarray:
    """Raised-cosine fade in and out of ``fade`` seconds; first and last samples exactly 0."""
    return raised_cosine_fade(x, sr=sr, fade=fade)

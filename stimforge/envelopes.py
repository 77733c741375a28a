"""Amplitude envelopes of audio: broadband Hilbert and a gammatone auditory model (ERB scale).

What the acoustic check measures a trial's rhythm on (see :mod:`stimforge.verify`):

* **broadband**: Hilbert magnitude of the waveform (FFT length ``next_fast_len``), low-passed
  and downsampled in one step by ``scipy.signal.resample_poly`` (its Kaiser FIR is the
  low-pass, cut-off ``env_sr / 2``; ``padtype='line'`` keeps the edges right);
* **auditory**: the waveform at 16 kHz (soxr HQ) through a bank of 32 fourth-order gammatone
  filters (scipy's IIR design; stable at 16 kHz) with centres equally spaced in ERB-number
  from 180 to 7250 Hz; each band's Hilbert magnitude is compressed by a power of 0.6, the
  bands are summed, then downsampled.

Sources: ERB and ERB-number, Glasberg & Moore (1990), Hear Res 47:103-138.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
from scipy import fft as sfft
from scipy import signal as sps

from .errors import CheckInputError, StatsError
from .timing import exact

__all__ = ["erb", "erb_number", "erb_space", "broadband_envelope", "auditory_envelope",
           "gammatone_bank", "choose_env_sr", "AUDITORY_SR", "AUDITORY_BAND", "AUDITORY_N_BANDS",
           "COMPRESSION"]

AUDITORY_SR = 16000
AUDITORY_BAND = (180.0, 7250.0)
AUDITORY_N_BANDS = 32
#: Power-law compression of the narrowband envelopes (Biesmans et al. 2017, IEEE TNSRE 25:402;
#: from memory).
COMPRESSION = 0.6


# ERB scale (Glasberg & Moore 1990)
def erb(f: float | np.ndarray) -> float | np.ndarray:
    """Equivalent rectangular bandwidth, Hz, at centre frequency ``f`` (Hz).

    ``ERB = 24.7 * (4.37 * f / 1000 + 1)`` (Glasberg & Moore 1990).
    """
    return 24.7 * (4.37 * np.asarray(f, dtype=np.float64) / 1000.0 + 1.0)


def erb_number(f: float | np.ndarray) -> float | np.ndarray:
    """ERB-number (Cam), ``21.4 * log10(4.37 * f / 1000 + 1)`` with ``f`` in Hz."""
    return 21.4 * np.log10(4.37 * np.asarray(f, dtype=np.float64) / 1000.0 + 1.0)


def erb_space(low: float, high: float, n: int) -> np.ndarray:
    """``n`` centre frequencies (Hz) from ``low`` to ``high``, equally spaced in ERB-number."""
    if n < 2 or not 0 < low < high:
        raise StatsError(f"erb_space needs n >= 2 and 0 < low < high, got {n}, {low}, {high}")
    e = np.linspace(erb_number(low), erb_number(high), n)
    return (10.0 ** (e / 21.4) - 1.0) / 4.37 * 1000.0



def _ratio(target: float, sr: float) -> tuple[int, int]:
    fr = Fraction(target).limit_denominator(1000) / Fraction(sr).limit_denominator(1000)
    fr = Fraction(fr).limit_denominator(100000)
    return fr.numerator, fr.denominator


def broadband_envelope(x: np.ndarray, *, sr: int, env_sr: float) -> np.ndarray:
    """Broadband Hilbert envelope, low-passed and resampled to ``env_sr``.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Waveform.
    sr : int, Hz
    env_sr : float, Hz
        Output rate (``sr * up / down`` for small integers).

    Returns
    -------
    ndarray, shape (ceil(n * env_sr / sr),)
    """
    x = np.asarray(x, dtype=np.float64)
    n = x.size
    env = np.abs(sps.hilbert(x, N=sfft.next_fast_len(n))[:n])
    up, down = _ratio(env_sr, sr)
    return sps.resample_poly(env, up, down, padtype="line")


_BANKS: dict[tuple[int, int], list[np.ndarray]] = {}


def gammatone_bank(*, sr: int = AUDITORY_SR, n_bands: int = AUDITORY_N_BANDS,
                   band: tuple[float, float] = AUDITORY_BAND) -> tuple[np.ndarray, list[np.ndarray]]:
    """ERB-spaced fourth-order gammatone filters as second-order sections.

    Returns
    -------
    centres : ndarray, Hz
    sos : list of ndarray, one (n_sections, 6) array per band
    """
    centres = erb_space(band[0], band[1], n_bands)
    key = (sr, n_bands)
    if key not in _BANKS:
        bank = []
        for fc in centres:
            b, a = sps.gammatone(float(fc), "iir", fs=sr)
            sos = sps.tf2sos(b, a)
            if np.max(np.abs(np.roots(a))) >= 1.0:  # pragma: no cover - guarded by design
                raise CheckInputError(f"gammatone band at {fc:.0f} Hz is unstable at {sr} Hz")
            bank.append(sos)
        _BANKS[key] = bank
    return centres, _BANKS[key]


_RESP: dict[int, list[tuple[int, np.ndarray]]] = {}
_TAPER = (50.0, 100.0)  # Hz: raised-cosine roll-off of the auditory path's low-pass


def _band_responses(nfft: int) -> list[tuple[int, np.ndarray]]:
    """Per band: first rfft bin and the gammatone response over the bins within -60 dB."""
    if nfft not in _RESP:
        if len(_RESP) > 8:
            _RESP.clear()
        centres, _ = gammatone_bank()
        f = np.arange(nfft // 2 + 1) * (AUDITORY_SR / nfft)
        out = []
        for fc in centres:
            b, a = sps.gammatone(float(fc), "iir", fs=AUDITORY_SR)
            _, h = sps.freqz(b, a, worN=f, fs=AUDITORY_SR)
            mag = np.abs(h)
            keep = np.flatnonzero(mag >= 1e-3 * mag.max())
            lo, hi = int(keep[0]), int(keep[-1]) + 1
            out.append((lo, h[lo:hi]))
        _RESP[nfft] = out
    return _RESP[nfft]


def auditory_envelope(x: np.ndarray, *, sr: int, env_sr: float) -> np.ndarray:
    """Auditory envelope: gammatone bank at 16 kHz, compressed band envelopes summed.

    Each band is filtered in the frequency domain (the IIR gammatone's response, bins within
    -60 dB of its peak), its analytic signal is formed at a reduced rate (the band's width),
    its magnitude is raised to :data:`COMPRESSION`, and the low-frequency Fourier coefficients
    of all bands are summed and returned at ``env_sr`` through a raised-cosine low-pass
    (50-100 Hz roll-off).  This equals Hilbert magnitudes of ``sosfilt`` outputs summed and
    downsampled, at a fraction of the cost (checked in the tests).

    Returns an array of the same length as :func:`broadband_envelope` gives for ``x``.
    """
    x = np.asarray(x, dtype=np.float64)
    n_out = int(math.ceil(x.size * env_sr / sr))
    if sr != AUDITORY_SR:
        import soxr

        y = soxr.resample(x, sr, AUDITORY_SR, quality="HQ")
    else:
        y = x
    n = y.size
    q = (Fraction(AUDITORY_SR) / Fraction(env_sr).limit_denominator(1000)).numerator
    pad = int(0.1 * AUDITORY_SR)
    nfft = q * sfft.next_fast_len(-(-(n + pad) // q))
    Y = np.fft.rfft(y, nfft)
    df = AUDITORY_SR / nfft
    J = int(math.ceil(_TAPER[1] / df)) + 1
    acc = np.zeros(J, dtype=np.complex128)
    for lo, h in _band_responses(nfft):
        B = 2.0 * Y[lo:lo + h.size] * h
        m = sfft.next_fast_len(max(B.size, 2 * J + 2))
        z = np.fft.ifft(B, m) * (m / nfft)
        c = np.abs(z) ** COMPRESSION
        acc += np.fft.fft(c)[:J] / m
    fj = np.arange(J) * df
    taper = np.where(fj <= _TAPER[0], 1.0,
                     np.where(fj >= _TAPER[1], 0.0,
                              0.5 + 0.5 * np.cos(np.pi * (fj - _TAPER[0]) / (_TAPER[1] - _TAPER[0]))))
    n_env = int(round(nfft * env_sr / AUDITORY_SR))
    env = np.fft.irfft(acc * taper * n_env, n=n_env)
    if env.size < n_out:
        env = np.pad(env, (0, n_out - env.size), mode="edge")
    return env[:n_out]


def choose_env_sr(unit_duration: float) -> float:
    """An envelope rate in 100-250 Hz at which a unit spans a whole number of samples."""
    T = exact(unit_duration)
    for cand in (200, 250, 160, 150, 125, 100, 240, 120, 180):
        if (T * cand).denominator == 1:
            return float(cand)
    return 200.0

"""Seconds <-> samples: the one place where seconds and samples meet.

Positions on the grid (documented in the README): unit ``k`` of a trial starts at sample
``round_half_up(k * T * fs)`` after the trial's first unit, computed in exact rational
arithmetic from the decimal values written in the recipe.  Slot ``k`` is therefore
``start(k + 1) - start(k)`` samples long: always ``floor(T*fs)`` or ``ceil(T*fs)``, and the
error of any onset against the ideal grid is at most half a sample, however long the trial
(no drift).  Every onset, silence and cut point uses this rule (:func:`seconds_to_samples`).

Lengths of processing windows (a fade, a smoother, an analysis pad) are not positions: they
are rounded to the nearest sample with halves to even (:func:`window_samples`, Python's
``round``), the rule they have always had, so that a build's bytes do not change; at 22.05 kHz
a 10 ms fade is 220 samples (220.5 -> 220).

Tables give seconds to the microsecond (:func:`table_seconds`).
"""

from __future__ import annotations

import math
from fractions import Fraction

__all__ = ["exact", "round_half_up", "unit_start", "slot_length", "seconds_to_samples",
           "window_samples", "table_seconds", "table_samples"]


def exact(value: float | int | str | Fraction) -> Fraction:
    """Return the exact rational value of a decimal number as the user wrote it.

    Floats go through their shortest ``repr`` so that ``0.3`` means 3/10, not the binary
    approximation 0.299999999999999988898.
    """
    if isinstance(value, Fraction):
        return value
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"expected a finite number, got {value!r}")
        return Fraction(repr(value))
    return Fraction(value)


def round_half_up(x: Fraction) -> int:
    """Round a non-negative rational to the nearest integer, halves upwards."""
    return math.floor(x + Fraction(1, 2))


def unit_start(k: int, *, unit_duration: float, sr: int) -> int:
    """Sample index of unit ``k``'s start, relative to the first unit: round(k * T * fs)."""
    return round_half_up(k * exact(unit_duration) * sr)


def slot_length(k: int, *, unit_duration: float, sr: int) -> int:
    """Length in samples of slot ``k`` under the rounding rule."""
    return unit_start(k + 1, unit_duration=unit_duration, sr=sr) - unit_start(
        k, unit_duration=unit_duration, sr=sr
    )


def seconds_to_samples(seconds: float, *, sr: int) -> int:
    """Convert a duration in seconds to samples with the same half-up rule."""
    return round_half_up(exact(seconds) * sr)


def window_samples(seconds: float, *, sr: float, minimum: int = 0) -> int:
    """Length in samples of a processing window (fade, smoother, pad): nearest, halves to even.

    Not for positions on the grid (use :func:`seconds_to_samples`); at least ``minimum``.
    """
    return max(int(minimum), int(round(float(seconds) * float(sr))))


def table_seconds(n_samples: int, *, sr: int) -> float:
    """A sample count as seconds for the TSV tables: rounded to 1 microsecond."""
    return round(int(n_samples) / sr, 6)


def table_samples(seconds: float, *, sr: int) -> int:
    """A position read from the TSV tables (seconds to 1 us) as a sample index: the float noise
    of the decimal text is rounded away, then the grid's half-up rule applies."""
    return seconds_to_samples(round(float(seconds), 9), sr=sr)

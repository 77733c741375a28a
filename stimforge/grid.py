"""The rate table: levels, rates, periods, FFT bins, the analysed window and samples per slot.

One grid type for every stage (no pydantic here): the recipe builds it
(:meth:`stimforge.recipe.Recipe.rates`), a build's ``manifest.json`` stores it
(:meth:`RateTable.to_dict` / :meth:`RateTable.from_dict`), and the checker's files mode and
the analysis stage build it from plain numbers (:func:`grid_from_numbers`).  Every rate is a
whole number of cycles of the analysed window, so it falls exactly on FFT bin
``rate * window``; :meth:`RateTable.target_bins` says which bins the checker and the analysis
test, and :meth:`RateTable.structure_bins` which are left out of the noise neighbours.

Examples
--------
>>> t = grid_from_numbers(unit_duration=0.25, levels=[("phrase", 2), ("sentence", 2)],
...                       sr=16000, n_top_groups=10)
>>> [(b.level, b.bin, b.harmonic) for b in t.target_bins()]
[('phrase', 20, 1), ('sentence', 10, 1), ('sentence', 30, 3)]
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any, Sequence

from .errors import GridError
from .timing import exact, seconds_to_samples, unit_start

__all__ = ["LevelRate", "RateTable", "RateWarning", "TargetBin", "rate_table", "grid_from_numbers",
           "checked_levels",
           "MAX_LEVELS"]

#: More levels than this above the unit is no design of this field (2-4 are usual).
MAX_LEVELS = 8


class RateWarning(UserWarning):
    """Two tagged rates lie so close that their spectral bins can hardly be told apart."""


@dataclass(frozen=True)
class TargetBin:
    """One tested frequency: ``harmonic`` x the rate of ``level``, at FFT bin ``bin``."""

    level: str
    bin: int
    harmonic: int
    rate_hz: float


@dataclass(frozen=True)
class LevelRate:
    """One row of the rate table."""

    name: str
    units_per_group: int
    period: float  # seconds
    rate: float  # Hz
    bin: int  # FFT bin of the rate over the analysed window
    period_exact: Fraction = field(repr=False, compare=False)


@dataclass(frozen=True)
class RateTable:
    """Rates, periods and sample arithmetic derived from a hierarchy.

    ``rows[0]`` is the unit; the others follow the levels upwards.  The analysed window is
    ``n_top_groups`` top-level groups (the lead-in and silences excluded), so every rate is a
    whole number of cycles and falls exactly on FFT bin ``rate * window``.
    """

    rows: tuple[LevelRate, ...]
    sr: int
    n_top_groups: int
    lead_in: bool
    silence_before: float
    silence_after: float

    @property
    def unit(self) -> LevelRate:
        return self.rows[0]

    @property
    def unit_samples(self) -> float:
        """T * fs, possibly not whole."""
        return float(self.rows[0].period_exact * self.sr)

    @property
    def slot_lengths(self) -> tuple[int, ...]:
        """The distinct slot lengths in samples that the rounding rule produces."""
        tfs = self.rows[0].period_exact * self.sr
        return tuple(sorted({math.floor(tfs), math.ceil(tfs)}))

    @property
    def units_per_trial(self) -> int:
        top = self.rows[-1].units_per_group
        return top * (self.n_top_groups + (1 if self.lead_in else 0))

    @property
    def analysed_units(self) -> int:
        return self.rows[-1].units_per_group * self.n_top_groups

    @property
    def window(self) -> float:
        """Seconds analysed per trial (whole cycles of every rate)."""
        return float(self.rows[0].period_exact * self.analysed_units)

    @property
    def resolution(self) -> float:
        """Frequency resolution of the analysed window, Hz."""
        return 1.0 / self.window

    @property
    def trial_duration(self) -> float:
        """Whole trial file: silence + lead-in + analysed part + silence, seconds."""
        return self.trial_samples / self.sr

    @property
    def trial_samples(self) -> int:
        return (
            seconds_to_samples(self.silence_before, sr=self.sr)
            + unit_start(self.units_per_trial, unit_duration=float(self.rows[0].period_exact), sr=self.sr)
            + seconds_to_samples(self.silence_after, sr=self.sr)
        )

    def row(self, name: str) -> LevelRate:
        for r in self.rows:
            if r.name == name:
                return r
        raise KeyError(name)

    # ------------------------------------------------------------------ bins on the window
    @property
    def n_units(self) -> int:
        """Units in the analysed window (the lead-in excluded)."""
        return self.analysed_units

    @property
    def unit_bin(self) -> int:
        """FFT bin of the unit rate over the analysed window."""
        return self.rows[0].bin

    @property
    def top_bin(self) -> int:
        """FFT bin of the slowest (top-level) rate: the number of top-level groups."""
        return self.rows[-1].bin

    @property
    def levels(self) -> tuple[tuple[str, int], ...]:
        """(name, size) of every level above the unit, from the lowest upwards."""
        return tuple((b.name, b.units_per_group // a.units_per_group)
                     for a, b in zip(self.rows[:-1], self.rows[1:]))

    def target_bins(self) -> list[TargetBin]:
        """Every level's rate and its harmonics below the unit rate, each bin once.

        A bin is assigned to the fastest level whose rate divides it, so each bin is tested
        once; harmonics of the unit rate are not structure rates and are left out.
        """
        out = []
        for j in range(1, len(self.rows)):
            b = self.rows[j].bin
            faster = [r.bin for r in self.rows[:j]]
            h = 1
            while h * b < self.unit_bin:
                kb = h * b
                if not any(kb % fb == 0 for fb in faster):
                    out.append(TargetBin(level=self.rows[j].name, bin=kb, harmonic=h,
                                         rate_hz=kb / self.window))
                h += 1
        return out

    def structure_bins(self, n_total: int) -> frozenset[int]:
        """Bins at multiples of the top-level rate (kept out of the noise neighbours)."""
        return frozenset(range(0, int(n_total), self.top_bin))

    def n_bins_needed(self) -> int:
        """Bins from 0 Hz that cover the unit rate and the neighbours of every target."""
        ub = self.unit_bin
        return int(ub + max(ub // 2, 3 * self.top_bin + 12) + 1)

    @classmethod
    def from_dict(cls, d: dict[str, Any], *, source: str = "rate_table") -> "RateTable":
        """Rebuild a table from :meth:`to_dict`'s layout (a build's ``manifest.json``).

        The stored rates and bins are checked against the ones derived again from the unit
        duration and the level sizes; a disagreement raises :class:`GridError`.
        """
        try:
            lv = d["levels"]
            names = [str(r["name"]) for r in lv]
            upg = [int(r["units_per_group"]) for r in lv]
            sizes = [(names[i], upg[i] // upg[i - 1]) for i in range(1, len(lv))]
            table = rate_table(
                unit_name=names[0], unit_duration=float(d["unit_duration"]), levels=sizes,
                sr=int(d["sample_rate"]), n_top_groups=int(d["groups_per_trial"]),
                lead_in=bool(d.get("lead_in", False)),
                silence_before=float(d.get("silence_before", 0.0)),
                silence_after=float(d.get("silence_after", 0.0)), warn=False)
        except (KeyError, TypeError, ValueError, IndexError, ZeroDivisionError) as exc:
            raise GridError(f"{source}: not a usable rate table ({exc!r}); rebuild the set") from exc
        for row, stored in zip(table.rows, lv):
            if "bin" in stored and int(stored["bin"]) != row.bin:
                raise GridError(f"{source}: level {row.name!r} is stored at bin {stored['bin']}, "
                                f"its size and the window give bin {row.bin}; rebuild the set")
        return table

    def close_pairs(self, min_bins: int = 3) -> list[tuple[str, str, int]]:
        out = []
        for i, a in enumerate(self.rows):
            for b in self.rows[i + 1 :]:
                if abs(a.bin - b.bin) < min_bins:
                    out.append((a.name, b.name, abs(a.bin - b.bin)))
        return out

    def to_dict(self) -> dict[str, Any]:
        """JSON layout written into manifest.json under "rate_table"."""
        return {
            "sample_rate": self.sr,
            "unit_duration": float(self.rows[0].period_exact),
            "unit_samples": self.unit_samples,
            "slot_lengths": list(self.slot_lengths),
            "rounding_rule": "unit k starts at sample round_half_up(k * T * fs) after the first unit",
            "levels": [
                {
                    "name": r.name,
                    "units_per_group": r.units_per_group,
                    "period": r.period,
                    "rate": r.rate,
                    "bin": r.bin,
                }
                for r in self.rows
            ],
            "groups_per_trial": self.n_top_groups,
            "lead_in": self.lead_in,
            "units_per_trial": self.units_per_trial,
            "analysed_units": self.analysed_units,
            "window": self.window,
            "resolution": self.resolution,
            "silence_before": self.silence_before,
            "silence_after": self.silence_after,
            "trial_duration": self.trial_duration,
            "trial_samples": self.trial_samples,
        }

    def format(self) -> str:
        """A plain-text table for the terminal."""
        lines = [
            f"{'level':<12}{'units':>7}{'period (s)':>12}{'rate (Hz)':>11}{'FFT bin':>9}",
        ]
        for r in self.rows:
            lines.append(
                f"{r.name:<12}{r.units_per_group:>7}{r.period:>12.4f}{r.rate:>11.4f}{r.bin:>9d}"
            )
        tfs = self.unit_samples
        lines.append(
            f"sample rate {self.sr} Hz; T*fs = {tfs:g} samples per unit"
            + ("" if float(tfs).is_integer() else f" (slots of {' or '.join(map(str, self.slot_lengths))})")
        )
        lines.append("rounding: unit k starts at sample round_half_up(k*T*fs) -> no drift")
        lines.append(
            f"analysed window {self.window:g} s ({self.n_top_groups} x {self.rows[-1].name}"
            f"{', plus 1 lead-in' if self.lead_in else ''}); resolution {self.resolution:.4g} Hz; "
            f"trial file {self.trial_duration:.3f} s"
        )
        return "\n".join(lines)


def rate_table(
    *,
    unit_name: str,
    unit_duration: float,
    levels: list[tuple[str, int]],
    sr: int,
    n_top_groups: int,
    lead_in: bool = False,
    silence_before: float = 0.0,
    silence_after: float = 0.0,
    warn: bool = True,
) -> RateTable:
    """Derive the rate table.

    Parameters
    ----------
    unit_duration : float, seconds > 0
        Slot duration of the unit.
    levels : list of (name, size)
        From the lowest group upwards; ``size`` counts elements of the level below.
    sr : int, Hz
        Output sample rate.
    n_top_groups : int >= 1
        Top-level groups in the analysed window.

    Examples
    --------
    >>> t = rate_table(unit_name="syllable", unit_duration=0.25, levels=[("phrase", 2),
    ...                ("sentence", 2)], sr=16000, n_top_groups=10)
    >>> [r.rate for r in t.rows]
    [4.0, 2.0, 1.0]
    """
    if n_top_groups < 1:
        raise GridError(f"n_top_groups must be >= 1, got {n_top_groups}")
    T = exact(unit_duration)
    n_units = 1
    per = [(unit_name, 1)]
    for name, size in levels:
        n_units *= int(size)
        per.append((name, n_units))
    window = T * per[-1][1] * n_top_groups
    rows = []
    for name, k in per:
        period = T * k
        cycles = window / period  # whole by construction
        rows.append(
            LevelRate(
                name=name,
                units_per_group=k,
                period=float(period),
                rate=float(1 / period),
                bin=int(cycles),
                period_exact=period,
            )
        )
    table = RateTable(
        rows=tuple(rows),
        sr=int(sr),
        n_top_groups=int(n_top_groups),
        lead_in=bool(lead_in),
        silence_before=float(silence_before),
        silence_after=float(silence_after),
    )
    for a, b, d in table.close_pairs() if warn else ():
        warnings.warn(
            f"rates of {a!r} and {b!r} are only {d} FFT bin(s) apart over a {table.window:g} s "
            "window; use more groups per trial to separate them",
            RateWarning,
            stacklevel=2,
        )
    return table


def checked_levels(unit_duration: float, levels: Sequence[tuple[str, int]], *,
                   option: str = "--level") -> tuple[float, list[tuple[str, int]]]:
    """Validate a unit duration and level sizes given as plain numbers.

    Returns ``(unit_duration, [(name, size), ...])``; raises :class:`GridError` naming the
    option (``--unit-duration``, ``--level``) and the value to change.
    """
    try:
        T = float(unit_duration)
    except (TypeError, ValueError) as exc:
        raise GridError(f"--unit-duration: {unit_duration!r} is not a number of seconds") from exc
    if not (T > 0 and math.isfinite(T)):
        raise GridError(f"--unit-duration must be > 0 seconds, got {unit_duration!r}")
    if not levels:
        raise GridError(f"give at least one level above the unit, e.g. {option} line=4")
    if len(levels) > MAX_LEVELS:
        raise GridError(f"{option}: {len(levels)} levels above the unit; at most {MAX_LEVELS} "
                        "are supported (designs of this kind use 1-4)")
    lv = []
    for name, size in levels:
        ok = isinstance(size, (int, float, Fraction)) and not isinstance(size, bool)
        if not str(name) or not ok or int(size) != size or int(size) < 2:
            raise GridError(f"{option} {name}={size}: a level needs a name and a whole "
                            "size >= 2 (units of the level below per group)")
        lv.append((str(name), int(size)))
    return T, lv


def grid_from_numbers(*, unit_duration: float, levels: Sequence[tuple[str, int]], sr: int,
                      n_top_groups: int, unit_name: str = "unit", lead_in: bool = False,
                      silence_before: float = 0.0, silence_after: float = 0.0,
                      option: str = "--level") -> RateTable:
    """A rate table from plain numbers (the checker's files mode, the analysis stage's CLI).

    Parameters
    ----------
    unit_duration : float, seconds > 0
    levels : list of (name, size)
        From the lowest group upwards; ``size`` >= 2 whole elements of the level below.
    sr : int, Hz > 0
    n_top_groups : int >= 1
        Top-level groups in the analysed window.

    Raises
    ------
    GridError
        Naming the option (``--unit-duration``, ``--level``) and the value to change.
    """
    T, lv = checked_levels(unit_duration, levels, option=option)
    names = [unit_name] + [n for n, _ in lv]
    if len(set(names)) != len(names):
        raise GridError(f"{option}: level names must differ from each other and from the unit "
                        f"({', '.join(names)})")
    if int(sr) != sr or int(sr) <= 0:
        raise GridError(f"sample rate must be a whole number of Hz > 0, got {sr!r}")
    if int(n_top_groups) != n_top_groups or int(n_top_groups) < 1:
        raise GridError(f"the analysed window must hold at least one {lv[-1][0]} group, "
                        f"got {n_top_groups!r}")
    return rate_table(unit_name=unit_name, unit_duration=T, levels=lv, sr=int(sr),
                      n_top_groups=int(n_top_groups), lead_in=lead_in,
                      silence_before=silence_before, silence_after=silence_after)

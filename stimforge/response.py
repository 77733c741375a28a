"""Responses recorded while a stimulus set played, analysed at the design's own rates.

Array functions in the MNE-Python style work on ``data`` of shape
``(n_epochs, n_channels, n_times)`` (and on spectra with frequency last); thin result objects
hold what a notebook or a report needs.  The statistics are the ones the acoustic check uses
(:mod:`stimforge.stats`: DFT at exact bins, neighbour bins, evoked F-test, Rayleigh, T2circ,
Holm / Benjamini-Hochberg, circular differences); nothing is re-implemented here.

What is measured
----------------
For every participant, condition, channel (and region of interest) and **target rate** --
every level's rate and its harmonics below the unit rate (each bin once,
:meth:`stimforge.grid.RateTable.target_bins`), plus the unit rate and its first
``unit_harmonics`` harmonics:

* evoked amplitude ``|mean_j X_j(k)|`` and its ratio to the mean amplitude of the noise
  bins (``snr_db = 20 log10(ratio)``), z against them, and the F-test of the power ratio
  (``evoked_p``, F(2, 2m));
* mean single-trial power SNR (``power_snr_db``): the common practice, shown beside the
  evoked measure; noise inflates it and it is blind to phase;
* ITPC with the Rayleigh test (Zar), and its null expectation ``sqrt(pi) / (2 sqrt n)``;
* Hotelling's T2circ (Victor & Mast 1991) on the complex single-trial values.

The finding's ``p`` is the test named by ``test`` (default ``"t2circ"``: it uses amplitude
and phase and needs no assumption about the neighbouring bins, so a 1/f floor or a
non-phase-locked rhythm does not bias it).  ``p_corrected`` corrects within one participant
and condition across channels x target rates, separately for the structure rates and the
unit-rate rows (``correction="holm"`` by default, or ``"fdr"``: Benjamini-Hochberg).

Noise bins: ``n_side`` bins on each side beyond ``skip`` adjacent bins, structure bins left
out; defaults ``skip=1, n_side=4`` = bins k+-2 .. k+-5 (Nozaradan et al. 2011, J Neurosci).

Phase across hearings: per rate and channel, the circular mean of the single-trial phases
(unit vectors, averaged per item first) of the first and of the second hearing, their
difference in degrees and milliseconds (``difference_ms = difference_deg / (360 f)``,
positive = the second hearing leads), a bootstrap interval over items, and a permutation test
that swaps the hearings within items (unpaired over trials when items are unknown).  Every
channel and rate gets a row, but only rows where the rate shows a response (``responding``:
a significant finding; at group level a significant group response) form the family that is
corrected and can be ``significant``: the phase of noise means nothing.

Group level (several participants): per-participant ITPC minus its null expectation tested
across participants (one-sided one-sample t), mean power SNR against 1, T2circ across
participants on the evoked complex values (assumes one phase for everybody), condition
contrasts (sign-flip permutation of per-participant differences), and a sign-flip test of the
per-participant phase differences.

JSON layout (``schema_version`` 1; see :data:`JSON_SCHEMA`; keys stable, new keys may be added)
---------------------------------------------------------------------------------------------
``schema_version``, ``kind`` ("stimforge response analysis"), ``stimforge_version``,
``settings`` {alpha, correction, test, group_test, neighbours {skip, n_side, source},
unit_harmonics, n_boot, n_perm, seed},
``design`` {unit, unit_duration, levels [{name, units_per_group, rate_hz}], window_s,
resolution_hz, targets [{level, harmonic, rate_hz, bin, kind}], dft},
``participants`` [{participant, source, n_epochs, n_channels, sfreq, units, window_s, dft,
conditions {name: n_trials}, n_significant, notes}],
``findings`` [{participant, condition, channel, roi, level, harmonic, kind, rate_hz, bin,
n_trials, amplitude, noise, snr_db, z, evoked_p, power_snr_db, itpc, itpc_null, rayleigh_p,
t2circ, t2circ_p, p, p_corrected, significant}],
``phase_differences`` [{participant, condition, channel, roi, level, harmonic, kind,
rate_hz, n_items, paired, itpc_first, itpc_second, phase_first_deg, phase_second_deg,
difference_deg, difference_ms, ci_deg [lo, hi], ci_ms [lo, hi], p, p_corrected,
significant, responding}],
``group`` (only with >= 2 participants, else []) [{condition, channel, roi, level, harmonic,
kind, rate_hz, n_participants, itpc_mean, itpc_null_mean, t, p, p_corrected, significant,
snr_db_mean, power_snr_db_mean, snr_p, t2circ_p}],
``contrasts`` [{condition_a, condition_b, channel, roi, level, harmonic, kind, rate_hz,
n_participants, itpc_difference, p, p_corrected, significant}],
``group_phase_differences`` [{condition, channel, roi, level, harmonic, kind, rate_hz,
n_participants, difference_deg, difference_ms, ci_deg, ci_ms, p, p_corrected, significant,
responding}] (``p_corrected`` is null where there is no response),
``summary`` {n_participants, n_findings, n_significant, n_group_significant, sentence},
``notes`` [str].  Angles in degrees, times in ms, amplitudes in the data's ``units``;
non-finite numbers are written as null.
"""

from __future__ import annotations

import functools
import logging
import math
import warnings
from dataclasses import dataclass, field, replace
from fractions import Fraction
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from . import stats
from ._version import __version__
from .errors import AnalysisError, GridError
from .grid import RateTable, RateWarning, grid_from_numbers, rate_table

__all__ = [
    "SCHEMA_VERSION", "JSON_SCHEMA", "NEIGHBOUR_SOURCE", "CAUTION",
    "Target", "AnalysisGrid", "EpochSet",
    "analysis_grid", "epoch_spectra", "rate_measures", "spectrum_profile", "hearing_phases",
    "load_epochs", "epochs_from_array", "apply_build",
    "ParticipantResponse", "ResponseAnalysis", "analyze_participant", "analyze",
]

log = logging.getLogger("stimforge")

SCHEMA_VERSION = 1
KIND = "stimforge response analysis"
NEIGHBOUR_SOURCE = ("bins k+-2..k+-5 (skip 1 adjacent bin, 4 on each side), after Nozaradan et "
                    "al. (2011), J Neurosci; structure bins left out")
TESTS = {"t2circ": "Hotelling T2circ (Victor & Mast 1991)",
         "itpc": "Rayleigh test of ITPC (Zar)",
         "evoked": "evoked power vs neighbour bins, F(2, 2m)"}
CORRECTIONS = {"holm": "Holm (1979)", "fdr": "Benjamini-Hochberg (1995) FDR"}
GROUP_TEST = ("one-sided one-sample t-test across participants of ITPC minus its null "
              "expectation sqrt(pi)/(2 sqrt(n_trials))")
CAUTION = (
    "A response at a rate shows that the recording follows something that recurs at that "
    "rate; it does not by itself show which process (grouping, expectation, attention, or an "
    "acoustic cue the check did not catch) drives it. Compare with control conditions built "
    "from the same tokens, and check the stimuli (stimforge check) before reading a response "
    "as linguistic."
)
_PREFERRED_MONTAGES = ("colin27_1005", "standard_1005", "colin27_1020", "standard_1020",
                       "biosemi64", "biosemi128", "biosemi32")
_SKIP_KINDS = {"practice", "catch", "filler", "lead-in", "leadin"}


def _need(module: str):
    """Import an optional dependency of the analysis stage, or say how to get it."""
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError as exc:
        raise AnalysisError(
            f"this needs the optional package {module.split('.')[0]!r}: install "
            "stimforge with the analysis extra (pip install 'stimforge[analysis]')") from exc


def _fmt_s(x: float) -> str:
    return f"{x:.6g}"


# =============================================================================================
# The grid on the epochs
# =============================================================================================
@dataclass(frozen=True)
class Target:
    """One tested frequency: ``harmonic`` x the rate of ``level`` at DFT bin ``bin``.

    ``kind`` is ``"structure"`` (a level above the unit, or its harmonic below the unit
    rate) or ``"unit"`` (the unit rate and its harmonics).
    """

    level: str
    harmonic: int
    bin: int
    rate_hz: float
    kind: str

    @property
    def label(self) -> str:
        h = "" if self.harmonic == 1 else f" x{self.harmonic}"
        return f"{self.level}{h} {self.rate_hz:.4g} Hz"

    @property
    def key(self) -> tuple[str, int]:
        return (self.level, self.harmonic)


@dataclass(frozen=True)
class AnalysisGrid:
    """The design's rates laid on epochs of ``n_times`` samples at ``sfreq``.

    Attributes
    ----------
    rates : RateTable
        With ``n_top_groups`` = top-level cycles the epochs hold.
    sfreq : float, Hz
    n_times : int
    targets : tuple of Target
    n_bins : int
        Bins computed (0 .. n_bins-1, at ``k / window`` Hz).
    exclude : frozenset of int
        Structure bins, kept out of the noise neighbours.
    skip, n_side : int
        Noise bins: ``n_side`` per side beyond ``skip`` adjacent bins.
    dft : {"fft", "exact"}
        ``"exact"`` when the window is not a whole number of samples: the DFT is evaluated at
        the exact frequencies ``k / window`` over the samples given (no rounding, no
        resampling).
    notes : tuple of str
    """

    rates: RateTable
    sfreq: float
    n_times: int
    targets: tuple[Target, ...]
    n_bins: int
    exclude: frozenset
    skip: int
    n_side: int
    dft: str
    notes: tuple[str, ...] = ()

    @property
    def window(self) -> float:
        return float(self.rates.window)

    @property
    def resolution(self) -> float:
        return 1.0 / self.window

    @property
    def freqs(self) -> np.ndarray:
        return np.arange(self.n_bins) / self.window

    @property
    def structure_targets(self) -> tuple[Target, ...]:
        return tuple(t for t in self.targets if t.kind == "structure")

    def neighbours(self, k: int) -> np.ndarray:
        return stats.neighbour_bins(int(k), n_total=self.n_bins, exclude=self.exclude,
                                    skip=self.skip, n_side=self.n_side)

    def describe_dft(self) -> str:
        exact_samples = self.window * self.sfreq
        if self.dft == "fft":
            return (f"FFT over {self.n_times} samples = {_fmt_s(self.window)} s, every rate on "
                    f"a bin ({self.resolution:.4g} Hz resolution)")
        return (f"exact-frequency DFT: the {_fmt_s(self.window)} s window is "
                f"{exact_samples:.6g} samples at {self.sfreq:g} Hz; {self.n_times} samples used "
                f"and the DFT evaluated at k / {_fmt_s(self.window)} s (no rounding, no "
                "resampling)")

    def to_dict(self) -> dict[str, Any]:
        r = self.rates
        return {
            "unit": r.unit.name, "unit_duration": float(r.unit.period),
            "levels": [{"name": row.name, "units_per_group": row.units_per_group,
                        "rate_hz": row.rate} for row in r.rows],
            "window_s": self.window, "resolution_hz": self.resolution,
            "targets": [{"level": t.level, "harmonic": t.harmonic, "rate_hz": t.rate_hz,
                         "bin": t.bin, "kind": t.kind} for t in self.targets],
            "dft": self.describe_dft(),
        }


def _crop_advice(n_times: int, sfreq: float, top: Fraction, top_name: str) -> str:
    per = float(top) * sfreq
    lo = math.floor(n_times / per + 1e-9)
    parts = []
    if lo >= 1:
        n_lo = math.floor(lo * per + 1e-9)
        parts.append(f"crop to {_fmt_s(lo * float(top))} s ({n_lo} samples; in MNE-Python "
                     f"epochs.crop(tmin, tmin + {n_lo - 1} / {sfreq:g}))")
    hi = lo + 1
    parts.append(f"cut {_fmt_s(hi * float(top))} s epochs ({math.ceil(hi * per - 1e-9)} samples)")
    return (f"epochs of {n_times / sfreq:.6g} s ({n_times} samples at {sfreq:g} Hz) do not hold "
            f"whole cycles of the slowest rate ({top_name}, {1 / float(top):.4g} Hz, period "
            f"{_fmt_s(float(top))} s): " + ", or ".join(parts))


def analysis_grid(rates: RateTable, *, sfreq: float, n_times: int, window: float | None = None,
                  skip: int = 1, n_side: int = 4, unit_harmonics: int = 2,
                  max_groups: int | None = None) -> AnalysisGrid:
    """Lay a design's rates on epochs of ``n_times`` samples at ``sfreq``.

    Parameters
    ----------
    rates : RateTable
        The design (from a build or :func:`stimforge.grid.grid_from_numbers`); its own
        window is replaced by the epochs' length.
    sfreq : float, Hz
    n_times : int
        Samples per epoch.
    window : float, seconds, optional
        The exact analysed window when the epochs file states it (``.npz`` key ``window``);
        otherwise the whole number of top-level cycles nearest to ``n_times / sfreq``.
    skip, n_side : int
        Noise bins (defaults: bins k+-2..k+-5, :data:`NEIGHBOUR_SOURCE`).
    unit_harmonics : int >= 0
        Unit-rate harmonics measured (1 = the unit rate only).
    max_groups : int, optional
        Top-level cycles the build analyses; longer epochs are refused (they would hold the
        lead-in or the silence).

    Raises
    ------
    AnalysisError
        If the epochs do not hold a whole number of top-level cycles (naming the nearest valid
        crops), are longer than the build's analysed window, or are sampled too slowly.
    """
    if not sfreq > 0 or int(n_times) < 2:
        raise AnalysisError(f"sfreq must be > 0 and epochs at least 2 samples, got {sfreq}, "
                            f"{n_times}")
    if skip < 0 or n_side < 1 or unit_harmonics < 0:
        raise AnalysisError(f"neighbours need skip >= 0 and n_side >= 1, unit_harmonics >= 0; "
                            f"got {skip}, {n_side}, {unit_harmonics}")
    top = rates.rows[-1].period_exact
    top_name = rates.rows[-1].name
    per = float(top) * sfreq
    if window is not None:
        c_exact = Fraction(window).limit_denominator(10 ** 9) / top
        c = round(float(c_exact))
        if c < 1 or abs(float(c_exact) - c) > 1e-6 or abs(n_times - window * sfreq) > 1.0:
            raise AnalysisError(f"the epochs' stated window {window:g} s ({n_times} samples) is "
                                "not a whole number of cycles of the slowest rate; "
                                + _crop_advice(n_times, sfreq, top, top_name))
    else:
        c = round(n_times / per)
        if c < 1 or abs(n_times - c * per) >= 1.0 - 1e-9:
            raise AnalysisError(_crop_advice(n_times, sfreq, top, top_name))
    if max_groups is not None and c > max_groups:
        raise AnalysisError(
            f"epochs of {n_times / sfreq:.6g} s hold {c} {top_name} cycles, more than the "
            f"build's analysed window ({max_groups} cycles = {_fmt_s(max_groups * float(top))} s): "
            "they include the lead-in or silence; cut each trial's analysed window only "
            "(stimforge epoch does), starting at the build's analysis_onset")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RateWarning)
        r = rate_table(unit_name=rates.unit.name, unit_duration=rates.unit.period_exact,
                       levels=list(rates.levels), sr=rates.sr, n_top_groups=int(c),
                       lead_in=rates.lead_in, silence_before=rates.silence_before,
                       silence_after=rates.silence_after, warn=False)
    if r.top_bin < 2:
        # every bin is then a multiple of the slowest rate: no bin is left for the noise
        raise AnalysisError(
            f"epochs of {_fmt_s(r.window)} s hold only one {top_name} cycle: every frequency "
            f"bin is then a multiple of the slowest rate and none is left to measure the noise "
            f"beside the tested rates; cut epochs of at least two cycles "
            f"({_fmt_s(2 * float(top))} s), e.g. two trials' windows in a row, or analyse "
            "without the slowest level")
    notes = []
    for a, b, d in r.close_pairs():
        notes.append(f"the rates of {a!r} and {b!r} are only {d} bin(s) apart over "
                     f"{_fmt_s(r.window)} s; longer epochs would separate them")
    nyq = n_times // 2  # highest usable bin index (exclusive bound below)
    reach = skip + 2 * n_side + 1
    targets = [Target(level=t.level, harmonic=t.harmonic, bin=t.bin, rate_hz=float(t.rate_hz),
                      kind="structure") for t in r.target_bins()]
    if not targets:
        raise AnalysisError("the design has no level above the unit to test")
    if max(t.bin for t in targets) + reach >= nyq:
        raise AnalysisError(f"sampling at {sfreq:g} Hz is too slow for the structure rates and "
                            "their noise bins; record (or resample) at a higher rate")
    dropped = []
    for h in range(1, unit_harmonics + 1):
        kb = h * r.unit_bin
        if kb + reach >= nyq:
            dropped.append(h)
            continue
        targets.append(Target(level=r.unit.name, harmonic=h, bin=kb, rate_hz=kb / r.window,
                              kind="unit"))
    if dropped:
        notes.append(f"unit-rate harmonic(s) {dropped} lie too close to the Nyquist frequency "
                     f"({sfreq / 2:g} Hz) and are not measured")
    last = max(t.bin for t in targets)
    n_bins = int(min(nyq, last + reach + r.top_bin + 1))
    dft = "fft" if abs(n_times - r.window * sfreq) < 1e-6 else "exact"
    return AnalysisGrid(rates=r, sfreq=float(sfreq), n_times=int(n_times),
                        targets=tuple(targets), n_bins=n_bins,
                        exclude=r.structure_bins(n_bins), skip=int(skip), n_side=int(n_side),
                        dft=dft, notes=tuple(notes))


# =============================================================================================
# Array functions
# =============================================================================================
def epoch_spectra(data: np.ndarray, *, sfreq: float, window: float, n_bins: int,
                  start_offset: np.ndarray | None = None,
                  max_chunk_bytes: int = 64 * 2 ** 20) -> np.ndarray:
    """Complex spectra of every epoch and channel at the bins ``k / window``.

    Parameters
    ----------
    data : ndarray, shape (n_epochs, n_channels, n_times)
        Epochs of the analysed window, in any unit (the spectra keep it).
    sfreq : float, Hz
    window : float, seconds
        The analysed window (whole cycles of every rate).  When ``n_times == window * sfreq``
        this is the FFT; otherwise :func:`stimforge.stats.dft_bins` evaluates the DFT at the
        exact frequencies.
    n_bins : int
    start_offset : ndarray, shape (n_epochs,), samples, optional
        Exact start minus the sample taken (as written by ``stimforge epoch``); each epoch's
        phases are corrected by ``2 pi f offset / sfreq``.
    max_chunk_bytes : int
        Channels are transformed in blocks of about this size, so memory stays bounded.

    Returns
    -------
    ndarray, complex128, shape (n_epochs, n_channels, n_bins)
        ``a cos(2 pi f t + phi)`` gives ``a exp(i phi)`` at its bin (2/n scaling); the mean
        of each epoch is removed first.
    """
    x = np.asarray(data)
    if x.ndim != 3:
        raise AnalysisError(f"data must be (n_epochs, n_channels, n_times), got shape {x.shape}")
    n_ep, n_ch, n_t = x.shape
    out = np.empty((n_ep, n_ch, int(n_bins)), dtype=np.complex128)
    step = max(1, int(max_chunk_bytes // max(1, n_ep * n_t * 8)))
    for i in range(0, n_ch, step):
        blk = np.asarray(x[:, i:i + step], dtype=np.float64)
        blk = blk - blk.mean(axis=-1, keepdims=True)
        out[:, i:i + step] = stats.dft_bins(blk, sr=sfreq, window=window, n_bins=int(n_bins))
    if start_offset is not None:
        off = np.asarray(start_offset, dtype=np.float64).reshape(n_ep, 1, 1)
        f = np.arange(int(n_bins)) / float(window)
        out *= np.exp(2j * np.pi * f[None, None, :] * off / float(sfreq))
    return out


def rate_measures(spectra: np.ndarray, *, grid: AnalysisGrid,
                  targets: Sequence[Target] | None = None) -> dict[str, np.ndarray]:
    """Every measure at every target rate, over the leading axes of the spectra.

    Parameters
    ----------
    spectra : ndarray, complex, shape (n_epochs, ..., n_bins)
        From :func:`epoch_spectra`; trials first.
    grid : AnalysisGrid
    targets : sequence of Target, optional
        Default ``grid.targets``.

    Returns
    -------
    dict of ndarray, each shape (..., n_targets)
        ``amplitude``, ``noise`` (mean neighbour amplitude), ``ratio``, ``snr_db``, ``z``,
        ``evoked_p``, ``power_snr``, ``power_snr_db``, ``itpc``, ``phase`` (radians, of the
        mean unit vector), ``rayleigh_p``, ``t2circ``, ``t2circ_p``, ``evoked`` (complex
        mean), and ``n_trials`` (int).
    """
    Z = np.asarray(spectra)
    if Z.ndim < 2 or Z.shape[0] < 2:
        raise AnalysisError(f"rate measures need at least 2 trials, got spectra of shape "
                            f"{Z.shape}")
    tg = list(grid.targets if targets is None else targets)
    ev = Z.mean(axis=0)
    cols: dict[str, list] = {k: [] for k in (
        "amplitude", "noise", "ratio", "z", "evoked_p", "power_snr", "itpc", "phase",
        "rayleigh_p", "t2circ", "t2circ_p", "evoked")}
    for t in tg:
        nb = grid.neighbours(t.bin)
        e = stats.evoked_test(ev, k=t.bin, neighbours=nb)
        ray = stats.rayleigh(Z[..., t.bin], axis=0)
        t2 = stats.t2circ(Z[..., t.bin], axis=0)
        cols["amplitude"].append(e.amplitude)
        cols["noise"].append(e.noise)
        cols["ratio"].append(e.ratio)
        cols["z"].append(e.z)
        cols["evoked_p"].append(e.p)
        cols["power_snr"].append(stats.power_snr(Z, k=t.bin, neighbours=nb, axis=0))
        cols["itpc"].append(ray.r)
        cols["phase"].append(ray.mean_angle)
        cols["rayleigh_p"].append(ray.p)
        cols["t2circ"].append(t2.T2)
        cols["t2circ_p"].append(t2.p)
        cols["evoked"].append(ev[..., t.bin])
    out = {k: np.stack([np.asarray(v) for v in vals], axis=-1) for k, vals in cols.items()}
    with np.errstate(divide="ignore"):
        out["snr_db"] = 20.0 * np.log10(out["ratio"])
        out["power_snr_db"] = 10.0 * np.log10(out["power_snr"])
    out["n_trials"] = np.asarray(Z.shape[0])
    return out


def spectrum_profile(spectra: np.ndarray, *, grid: AnalysisGrid) -> dict[str, np.ndarray]:
    """Evoked SNR and ITPC at every bin (for the spectra figures).

    Returns
    -------
    dict
        ``freqs`` (n_bins,) Hz; ``amplitude``, ``snr_db`` (evoked amplitude over its noise
        bins, dB) and ``itpc``, each (..., n_bins); bin 0 is NaN.
    """
    Z = np.asarray(spectra)
    ev = np.abs(Z.mean(axis=0))
    snr = np.full(ev.shape, np.nan)
    for k in range(1, grid.n_bins):
        nb = grid.neighbours(k)
        if nb.size == 0:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            snr[..., k] = 20.0 * np.log10(ev[..., k] / ev[..., nb].mean(axis=-1))
    itpc = np.asarray(stats.rayleigh(Z, axis=0).r)
    itpc[..., 0] = np.nan
    return {"freqs": grid.freqs, "amplitude": ev, "snr_db": snr, "itpc": itpc}


def hearing_phases(values: np.ndarray, *, hearing: np.ndarray, item: np.ndarray | None,
                   rng: np.random.Generator, n_boot: int = 2000, n_perm: int = 2000
                   ) -> stats.CircularDifference | None:
    """Circular mean phase per hearing and their difference (second - first).

    Parameters
    ----------
    values : ndarray, complex, shape (n_trials, ...)
        Single-trial values at one or more bins (only their phase is used).
    hearing : ndarray of int, shape (n_trials,)
        1 = first hearing, 2 = second; other values are ignored.
    item : ndarray, shape (n_trials,), optional
        Which item each trial played.  Given: unit vectors are averaged per item and hearing,
        only items heard twice count, the bootstrap resamples items and the permutation
        swaps hearings within items.  None: unpaired over trials.

    Returns
    -------
    stats.CircularDifference or None
        None when fewer than 3 items (or trials per hearing) are available.
    """
    z = np.asarray(values)
    u = z / np.where(np.abs(z) > 0, np.abs(z), 1.0)
    h = np.asarray(hearing)
    if item is None:
        a, b = u[h == 1], u[h == 2]
        if min(a.shape[0], b.shape[0]) < 3:
            return None
        return stats.circular_difference(a, b, paired=False, rng=rng, n_boot=n_boot,
                                         n_perm=n_perm)
    it = np.asarray(item).astype(str)
    keys = [k for k in dict.fromkeys(it[h == 1]) if np.any((it == k) & (h == 2))]
    if len(keys) < 3:
        return None
    first = np.stack([u[(it == k) & (h == 1)].mean(axis=0) for k in keys])
    second = np.stack([u[(it == k) & (h == 2)].mean(axis=0) for k in keys])
    return stats.circular_difference(first, second, paired=True, rng=rng, n_boot=n_boot,
                                     n_perm=n_perm)


def _correct_where(p: np.ndarray, ok: np.ndarray, targets: Sequence[Target],
                   method: str) -> np.ndarray:
    """Correct ``p`` (rows, targets) over the entries where ``ok`` holds, per kind of target;
    NaN elsewhere (phase differences are tested only where there is a response)."""
    return _correct_by_kind(p, np.array([t.kind for t in targets]), method, ok=ok)


def _correct_by_kind(p: np.ndarray, kinds: np.ndarray, method: str,
                     ok: np.ndarray | None = None) -> np.ndarray:
    """Correct ``p`` (rows, targets) as two families: the structure-rate columns and the
    unit-rate columns (each over every row), only where ``ok`` holds; NaN elsewhere."""
    p = np.asarray(p, dtype=float)
    sel_ok = np.ones(p.shape, bool) if ok is None else np.asarray(ok, bool)
    out = np.full(p.shape, np.nan)
    for kind in ("structure", "unit"):
        sel = sel_ok & (np.asarray(kinds) == kind)[None, :]
        if sel.any():
            out[sel] = _correct(p[sel], method)
    return out


def _correct(p: np.ndarray, method: str) -> np.ndarray:
    if method == "holm":
        return stats.holm(p)
    if method == "fdr":
        return stats.fdr_bh(p)
    raise AnalysisError(f"correction must be 'holm' or 'fdr', got {method!r}")


# =============================================================================================
# Epochs in
# =============================================================================================
@dataclass(frozen=True, repr=False)
class EpochSet:
    """Epochs of one participant (or one file), with what the analysis needs to know.

    Attributes
    ----------
    data : ndarray, shape (n_epochs, n_channels, n_times)
    sfreq : float, Hz
    ch_names : tuple of str
    labels : dict of str -> ndarray (n_epochs,)
        Any of ``condition``, ``repetition`` (1 = first hearing, 2 = second), ``stim_file``,
        ``item``, ``participant``, ``kind``.
    source : str
    units : str
        Unit of ``data`` (amplitudes are reported in it).
    window : float or None, seconds
        The exact analysed window when the file states it.
    start_offset : ndarray (n_epochs,) or None, samples
    info : mne.Info or None
        Channel positions, for topographies.
    notes : tuple of str
    """

    data: np.ndarray
    sfreq: float
    ch_names: tuple[str, ...]
    labels: dict[str, np.ndarray] = field(default_factory=dict)
    source: str = "array"
    units: str = "as stored"
    window: float | None = None
    start_offset: np.ndarray | None = None
    info: Any = None
    notes: tuple[str, ...] = ()

    @property
    def n_epochs(self) -> int:
        return int(self.data.shape[0])

    @property
    def n_channels(self) -> int:
        return int(self.data.shape[1])

    @property
    def n_times(self) -> int:
        return int(self.data.shape[2])

    @property
    def duration(self) -> float:
        return self.n_times / self.sfreq

    def label(self, name: str) -> np.ndarray | None:
        return self.labels.get(name)

    def subset(self, mask: np.ndarray) -> "EpochSet":
        m = np.asarray(mask, dtype=bool)
        return replace(self, data=self.data[m], labels={k: v[m] for k, v in self.labels.items()},
                       start_offset=None if self.start_offset is None else self.start_offset[m])

    def __repr__(self) -> str:
        labs = ", ".join(sorted(self.labels)) or "no labels"
        return (f"<EpochSet {self.source}: {self.n_epochs} epochs x {self.n_channels} channels x "
                f"{self.n_times} samples at {self.sfreq:g} Hz ({self.duration:.6g} s); {labs}>")

    def _repr_html_(self) -> str:
        import html

        return f"<p><code>{html.escape(repr(self))}</code></p>"


def _as_labels(name: str, value: Any, n: int, where: str) -> np.ndarray:
    a = np.asarray(value)
    if a.ndim == 0:
        a = np.full(n, a.item())
    a = a.reshape(-1)
    if a.shape[0] != n:
        raise AnalysisError(f"{where}: {name!r} has {a.shape[0]} values for {n} epochs; give "
                            "one per epoch (or one for all)")
    if name == "repetition":
        try:
            a = a.astype(np.int64)
        except (TypeError, ValueError) as exc:
            raise AnalysisError(f"{where}: 'repetition' must be whole numbers (1 = first "
                                "hearing, 2 = second)") from exc
    else:
        a = a.astype(str)
    return a


def epochs_from_array(data: np.ndarray, *, sfreq: float, ch_names: Sequence[str] | None = None,
                      condition: Any = None, repetition: Any = None, stim_file: Any = None,
                      item: Any = None, participant: Any = None, units: str = "as stored",
                      window: float | None = None, start_offset: Any = None,
                      source: str = "array", info: Any = None) -> EpochSet:
    """An :class:`EpochSet` from arrays (what an ``.npz`` holds).

    Parameters
    ----------
    data : ndarray, shape (n_epochs, n_channels, n_times)
    sfreq : float, Hz
    ch_names : sequence of str, optional
        Default ``ch0, ch1, ...``.
    condition, repetition, stim_file, item, participant : array (n_epochs,) or scalar, optional
    units : str
    window : float, seconds, optional
    start_offset : array (n_epochs,), samples, optional

    Raises
    ------
    AnalysisError
        Naming the field and what to change.
    """
    where = source
    x = np.asarray(data)
    if x.ndim == 2:
        raise AnalysisError(f"{where}: 'data' has shape {x.shape}; give (n_epochs, n_channels, "
                            "n_times), e.g. data[:, None, :] for one channel")
    if x.ndim != 3 or min(x.shape) < 1:
        raise AnalysisError(f"{where}: 'data' must be (n_epochs, n_channels, n_times), got "
                            f"shape {x.shape}")
    if not np.issubdtype(x.dtype, np.number) or np.iscomplexobj(x):
        raise AnalysisError(f"{where}: 'data' must be real numbers, got dtype {x.dtype}")
    if not np.all(np.isfinite(x)):
        bad = np.unique(np.nonzero(~np.isfinite(x))[0])
        raise AnalysisError(f"{where}: 'data' holds NaN or infinite values in epoch(s) "
                            f"{bad[:10].tolist()}; drop or repair them first")
    try:
        fs = float(np.asarray(sfreq).reshape(-1)[0])
    except (TypeError, ValueError, IndexError) as exc:
        raise AnalysisError(f"{where}: 'sfreq' must be a number of Hz, got {sfreq!r}") from exc
    if not (fs > 0 and math.isfinite(fs)):
        raise AnalysisError(f"{where}: 'sfreq' must be > 0 Hz, got {sfreq!r}")
    n = x.shape[0]
    names = (tuple(str(c) for c in np.asarray(ch_names).reshape(-1)) if ch_names is not None
             else tuple(f"ch{i}" for i in range(x.shape[1])))
    if len(names) != x.shape[1]:
        raise AnalysisError(f"{where}: {len(names)} 'ch_names' for {x.shape[1]} channels")
    if len(set(names)) != len(names):
        raise AnalysisError(f"{where}: 'ch_names' repeat a name")
    labels = {}
    for key, val in (("condition", condition), ("repetition", repetition),
                     ("stim_file", stim_file), ("item", item), ("participant", participant)):
        if val is not None:
            labels[key] = _as_labels(key, val, n, where)
    off = None
    if start_offset is not None:
        off = np.asarray(start_offset, dtype=np.float64).reshape(-1)
        if off.shape[0] != n or not np.all(np.abs(off) <= 1.0):
            raise AnalysisError(f"{where}: 'start_offset' needs one value per epoch in samples "
                                "(|offset| <= 1)")
    win = None if window is None else float(np.asarray(window).reshape(-1)[0])
    return EpochSet(data=x, sfreq=fs, ch_names=names, labels=labels, source=str(source),
                    units=str(units), window=win, start_offset=off, info=info)


def _load_npz(path: Path) -> EpochSet:
    try:
        z = np.load(path, allow_pickle=False)
    except (OSError, ValueError, EOFError) as exc:
        raise AnalysisError(f"{path}: not a readable .npz file ({exc})") from exc
    with z:
        keys = set(z.files)
        if "data" not in keys or "sfreq" not in keys:
            raise AnalysisError(f"{path}: needs keys 'data' (epochs x channels x times) and "
                                f"'sfreq'; found {sorted(keys)}")

        def get(k):
            if k not in keys:
                return None
            try:
                return z[k]
            except ValueError as exc:  # object arrays need pickles: refused
                raise AnalysisError(f"{path}: key {k!r} is stored as Python objects; save "
                                    "strings as np.asarray(values, dtype=str)") from exc

        rep = get("repetition")
        if rep is None and "hearing" in keys:
            rep = get("hearing")
        units = get("units")
        return epochs_from_array(
            get("data"), sfreq=get("sfreq"), ch_names=get("ch_names"),
            condition=get("condition"), repetition=rep, stim_file=get("stim_file"),
            item=get("item"), participant=get("participant"),
            units=str(units) if units is not None else "as stored",
            window=get("window"), start_offset=get("start_offset"), source=str(path))


_SCALE = {"eeg": (1e6, "uV"), "seeg": (1e6, "uV"), "ecog": (1e6, "uV"), "mag": (1e15, "fT"),
          "grad": (1e13, "fT/cm")}


def _from_mne(epochs: Any, source: str) -> EpochSet:
    mne = _need("mne")
    picks = mne.pick_types(epochs.info, meg=True, eeg=True, seeg=True, ecog=True, dbs=True,
                           exclude="bads")
    if len(picks) == 0:
        raise AnalysisError(f"{source}: no good EEG/MEG channels (all are stim/misc or bad)")
    epochs.load_data()
    data = epochs.get_data(picks=picks, copy=True)
    info = mne.pick_info(epochs.info, picks)
    types = set(info.get_channel_types())
    notes = []
    units = "SI (V, T, T/m)"
    if len(types) == 1 and next(iter(types)) in _SCALE:
        sc, units = _SCALE[next(iter(types))]
        data = data * sc
    md = epochs.metadata
    labels: dict[str, Any] = {}
    if md is not None:
        for key in ("condition", "repetition", "stim_file", "item", "participant", "kind"):
            col = key if key in md.columns else ("hearing" if key == "repetition" and
                                                 "hearing" in md.columns else None)
            if col is not None:
                labels[key] = md[col].to_numpy()
    if "condition" not in labels and len(epochs.event_id) > 1:
        inv = {v: k for k, v in epochs.event_id.items()}
        labels["condition"] = np.array([inv[c] for c in epochs.events[:, 2]])
        notes.append(f"{source}: no metadata column 'condition'; the event names stand in")
    off = None
    if md is not None and "start_offset" in md.columns:
        off = md["start_offset"].to_numpy(dtype=np.float64)
    kind = labels.pop("kind", None)
    es = epochs_from_array(data, sfreq=float(epochs.info["sfreq"]), ch_names=info.ch_names,
                           units=units, start_offset=off, source=source, info=info,
                           **{k: v for k, v in labels.items()})
    if kind is not None:
        es = replace(es, labels={**es.labels, "kind": np.asarray(kind).astype(str)})
    return replace(es, notes=tuple(notes))


def load_epochs(source: Any) -> EpochSet:
    """Read epochs from an ``.npz``, an ``-epo.fif``, an MNE-Python ``Epochs`` or a dict.

    ``.npz`` keys: ``data`` (epochs x channels x times), ``sfreq``; optional ``ch_names``,
    ``condition``, ``repetition`` (or ``hearing``; 1 = first, 2 = second), ``stim_file``,
    ``item``, ``participant`` (one per file or per epoch), ``units``, ``window`` (exact
    analysed window, s), ``start_offset`` (samples).  Strings must be unicode arrays (no
    pickles).  ``-epo.fif`` / ``Epochs``: data channels (bad ones left out), scaled to uV / fT
    / fT/cm when all are of one type; metadata columns of the same names.
    """
    if isinstance(source, EpochSet):
        return source
    if isinstance(source, Mapping):
        d = dict(source)
        if "data" not in d or "sfreq" not in d:
            raise AnalysisError("a dict of epochs needs 'data' and 'sfreq'")
        d.setdefault("source", "dict")
        if "hearing" in d and "repetition" not in d:
            d["repetition"] = d.pop("hearing")
        data = d.pop("data")
        try:
            return epochs_from_array(data, **d)
        except TypeError as exc:
            raise AnalysisError(f"a dict of epochs: {exc}") from exc
    if hasattr(source, "get_data") and hasattr(source, "info") and hasattr(source, "events"):
        return _from_mne(source.copy(), source=f"<{type(source).__name__}>")
    path = Path(source)
    if not path.is_file():
        raise AnalysisError(f"{path}: not found; give an .npz or -epo.fif file of epochs")
    name = path.name.lower()
    if name.endswith(".npz"):
        return _load_npz(path)
    if name.endswith((".fif", ".fif.gz")):
        mne = _need("mne")
        try:
            with warnings.catch_warnings():
                # MNE-Python 1.13 reads metadata with DataFrame.set_index(inplace=True), which
                # pandas >= 3.1 deprecates: not the user's concern
                warnings.filterwarnings("ignore", message="The inplace keyword in DataFrame")
                ep = mne.read_epochs(path, preload=True, verbose="error")
        except Exception as exc:  # MNE raises ValueError/OSError/RuntimeError variously
            raise AnalysisError(f"{path}: MNE-Python cannot read it as epochs ({exc}); is it "
                                "an -epo.fif file?") from exc
        return _from_mne(ep, source=str(path))
    raise AnalysisError(f"{path}: unknown kind of file; give epochs as .npz or -epo.fif")


def apply_build(es: EpochSet, build: Any) -> EpochSet:
    """Fill condition and hearing from a build's ``trials.tsv`` (matched by stim file name).

    Epochs whose ``kind`` is practice/catch/filler are dropped.  Without ``stim_file`` labels
    nothing can be matched and the epochs are returned unchanged (with a note).
    """
    sf = es.label("stim_file")
    if sf is None:
        return replace(es, notes=es.notes + (
            f"{es.source}: no stim_file labels, so the build's trial table is not used "
            "(conditions and hearings come from the epochs file)",))
    rows: dict[str, list[dict]] = {}
    for r in build.trials:
        rows.setdefault(Path(str(r.get("stim_file"))).name, []).append(r)
    base = np.array([Path(s).name for s in sf])
    unknown = sorted({b for b in base if b not in rows})
    if unknown:
        raise AnalysisError(f"{es.source}: stim_file(s) {unknown[:5]} are not in "
                            f"{build.root}/trials.tsv; is this the build that was played?")
    labels = dict(es.labels)
    if "condition" not in labels:
        labels["condition"] = np.array([str(rows[b][0].get("condition")) for b in base])
    if "item" not in labels:
        labels["item"] = base.astype(str)
    kinds = np.array([str(rows[b][0].get("kind", "")) for b in base])
    out = replace(es, labels=labels)
    drop = np.isin(np.char.lower(kinds.astype(str)), list(_SKIP_KINDS))
    if drop.any():
        out = out.subset(~drop)
        out = replace(out, notes=out.notes + (f"{es.source}: {int(drop.sum())} practice/catch/"
                                              "filler epochs left out",))
    return out


def _infer_repetition(es: EpochSet) -> EpochSet:
    """Number the hearings of each item in the order of the epochs, when not labelled."""
    if "repetition" in es.labels:
        return es
    key = es.label("item") if es.label("item") is not None else es.label("stim_file")
    if key is None:
        return es
    cond = es.label("condition")
    full = np.array([f"{c}\x00{k}" for c, k in zip(cond if cond is not None else [""] * len(key),
                                                   key)])
    seen: dict[str, int] = {}
    rep = np.empty(len(full), dtype=np.int64)
    for i, k in enumerate(full):
        seen[k] = seen.get(k, 0) + 1
        rep[i] = seen[k]
    if rep.max() < 2:
        return es
    return replace(es, labels={**es.labels, "repetition": rep}, notes=es.notes + (
        f"{es.source}: no 'repetition' labels; hearings numbered by the order of the epochs "
        "(first occurrence of an item = first hearing)",))


def _split_participants(es: EpochSet, fallback: str) -> list[tuple[str, EpochSet]]:
    p = es.label("participant")
    if p is None:
        return [(fallback, es)]
    ids = list(dict.fromkeys(p.tolist()))
    return [(str(i), es.subset(p == i)) for i in ids]


def _participant_name(source: str, index: int) -> str:
    name = Path(source).name
    for suf in ("-epo.fif", "_epo.fif", ".fif.gz", ".fif", "-epo.npz", "_epo.npz", ".npz"):
        if name.endswith(suf):
            return name[: -len(suf)] or f"P{index + 1:02d}"
    return f"P{index + 1:02d}" if source.startswith("<") or source in ("array", "dict") else name


# =============================================================================================
# One participant
# =============================================================================================
def _deg(a: Any) -> Any:
    return np.rad2deg(a)


@dataclass(frozen=True, repr=False)
class ParticipantResponse:
    """The analysis of one participant's epochs.

    Attributes
    ----------
    participant : str
    source : str
    grid : AnalysisGrid
    rows : tuple of str
        Channel names, then regions of interest.
    roi : tuple of bool
        Which ``rows`` are regions of interest.
    conditions : dict of str -> int
        Trials per condition.
    finding_rows, phase_rows : list of dict
        The JSON records (see the module docstring); :attr:`findings` and
        :attr:`phase_differences` give them as DataFrames.
    measures : dict of str -> dict of ndarray
        Per condition, :func:`rate_measures` over (rows, targets).
    profiles : dict of str -> dict of ndarray
        Per condition, :func:`spectrum_profile` over (rows, bins).
    phasors : dict of str -> (ndarray, ndarray)
        Per condition (``"all"`` when the hearings stand in for conditions), single-trial unit
        vectors at the targets (n_trials, rows, targets) and each trial's hearing (0: unknown).
    units : str
    info : mne.Info or None
    settings : dict
    notes : tuple of str
    """

    participant: str
    source: str
    grid: AnalysisGrid
    rows: tuple[str, ...]
    roi: tuple[bool, ...]
    conditions: dict[str, int]
    finding_rows: list[dict]
    phase_rows: list[dict]
    measures: dict[str, dict[str, np.ndarray]]
    profiles: dict[str, dict[str, np.ndarray]]
    phasors: dict[str, tuple[np.ndarray, np.ndarray]]
    units: str
    info: Any
    settings: dict[str, Any]
    notes: tuple[str, ...] = ()

    @property
    def n_epochs(self) -> int:
        return int(sum(self.conditions.values()))

    @property
    def findings(self):
        """Findings as a pandas DataFrame (one row per condition x channel x rate)."""
        return _need("pandas").DataFrame(self.finding_rows)

    @property
    def phase_differences(self):
        """Phase differences between hearings as a pandas DataFrame."""
        return _need("pandas").DataFrame(self.phase_rows)

    @property
    def significant(self) -> list[dict]:
        return [r for r in self.finding_rows if r["significant"]]

    def summary_line(self) -> str:
        sig = self.significant
        where = sorted({f"{r['condition']}: {r['level']}" + (f" x{r['harmonic']}" if
                        r['harmonic'] > 1 else "") + f" {r['rate_hz']:.4g} Hz at "
                        f"{r['channel']}" for r in sig if r["kind"] == "structure"})
        s = self.settings
        base = (f"{self.participant}: {len(sig)} significant finding(s) of "
                f"{len(self.finding_rows)} ({TESTS[s['test']].split(' (')[0]}, "
                f"{s['correction']}, alpha {s['alpha']:g})")
        if where:
            base += "; at structure rates: " + "; ".join(where[:6]) + (
                f" (+{len(where) - 6} more)" if len(where) > 6 else "")
        elif sig:
            base += "; at structure rates: none (unit rate only)"
        return base

    def __repr__(self) -> str:
        conds = ", ".join(f"{c} ({n})" for c, n in self.conditions.items())
        return (f"<ParticipantResponse {self.participant}: {self.n_epochs} epochs x "
                f"{len(self.rows)} rows, {self.grid.window:.6g} s at {self.grid.sfreq:g} Hz; "
                f"conditions {conds}; {len(self.significant)} significant>")

    def _repr_html_(self) -> str:
        return _html_block(self.summary_line(), self.significant, _FINDING_COLS)

    # ------------------------------------------------------------------ figures
    def _pick(self, condition: str | None, channel: str | None) -> tuple[str, int]:
        conds = list(self.conditions)
        c = condition if condition is not None else conds[0]
        if c not in self.measures:
            raise AnalysisError(f"condition {c!r} not analysed; have {conds}")
        if channel is not None:
            if channel not in self.rows:
                raise AnalysisError(f"channel {channel!r} not analysed; have {list(self.rows)}")
            return c, self.rows.index(channel)
        m = self.measures[c]
        st = [i for i, t in enumerate(self.grid.targets) if t.kind == "structure"]
        p = np.asarray(m["p"])[:, st]
        return c, int(np.unravel_index(np.nanargmin(p), p.shape)[0])

    def plot_spectra(self, *, channel: str | None = None, conditions: Sequence[str] | None = None):
        """Evoked SNR spectra (dB) with every target rate labelled; returns a Figure."""
        return _fig_profile(self, "snr_db", channel=channel, conditions=conditions)

    def plot_itpc(self, *, channel: str | None = None, conditions: Sequence[str] | None = None):
        """ITPC by frequency with the Rayleigh critical lines; returns a Figure."""
        return _fig_profile(self, "itpc", channel=channel, conditions=conditions)

    def plot_phase(self, *, condition: str | None = None, channel: str | None = None,
                   max_targets: int = 4):
        """Polar plots of single-trial phases per hearing at the structure rates."""
        return _fig_polar(self, condition=condition, channel=channel, max_targets=max_targets)

    def plot_topomap(self, *, value: str = "itpc", montage: str | None = "auto"):
        """Topographies of ``value`` per condition and structure rate (None: no positions)."""
        vals = {c: np.asarray(self.measures[c][value]) for c in self.conditions}
        sig = {c: np.asarray(self.measures[c]["significant"]) for c in self.conditions}
        return _fig_topo(vals, sig, grid=self.grid, rows=self.rows, roi=self.roi, info=self.info,
                         montage=montage, value=value, title=self.participant)


_FINDING_COLS = ("condition", "channel", "level", "harmonic", "rate_hz", "n_trials", "snr_db",
                 "power_snr_db", "itpc", "t2circ", "p", "p_corrected", "significant")


def _rows_of(es: EpochSet, roi: Mapping[str, Sequence[str]] | None
             ) -> tuple[list[str], list[bool], list[np.ndarray]]:
    names = list(es.ch_names)
    rois = []
    for name, chans in (roi or {}).items():
        if name in names:
            raise AnalysisError(f"region of interest {name!r} has the name of a channel; rename it")
        missing = [c for c in chans if c not in es.ch_names]
        if missing or not chans:
            raise AnalysisError(f"region of interest {name!r}: channel(s) {missing or '(none)'} "
                                f"not in {es.source} (have {', '.join(es.ch_names[:12])}...)")
        rois.append((name, np.array([es.ch_names.index(c) for c in chans])))
    return (names + [n for n, _ in rois], [False] * len(names) + [True] * len(rois),
            [idx for _, idx in rois])


def _conditions(es: EpochSet) -> tuple[np.ndarray, str]:
    c = es.label("condition")
    if c is not None:
        return c, "condition"
    r = es.label("repetition")
    if r is not None:
        return np.array([f"hearing{int(v)}" for v in r]), "hearing"
    return np.array(["all"] * es.n_epochs), "none"


def analyze_participant(es: EpochSet, *, rates: RateTable, participant: str | None = None,
                        alpha: float = 0.05, correction: str = "holm", test: str = "t2circ",
                        skip: int = 1, n_side: int = 4, unit_harmonics: int = 2,
                        roi: Mapping[str, Sequence[str]] | None = None,
                        max_groups: int | None = None, n_boot: int = 2000, n_perm: int = 2000,
                        rng: np.random.Generator | int | None = None) -> ParticipantResponse:
    """Analyse one participant's epochs at the design's rates.

    Parameters
    ----------
    es : EpochSet
    rates : RateTable
        The design; laid on the epochs by :func:`analysis_grid`.
    alpha : float
        Error rate of the correction (family-wise for Holm, false-discovery for FDR).
    correction : {"holm", "fdr"}
    test : {"t2circ", "itpc", "evoked"}
        The test whose p makes the finding's ``p``.
    skip, n_side : int
        Noise bins (default k+-2..k+-5).
    unit_harmonics : int
    roi : dict of name -> list of channel names, optional
        Regions of interest: the complex spectra of their channels are averaged per trial.
    max_groups : int, optional
        The build's analysed top-level cycles (longer epochs refused).
    n_boot, n_perm : int
        Bootstrap resamples and permutations of the phase comparison.
    rng : int or Generator, optional

    Returns
    -------
    ParticipantResponse
    """
    if test not in TESTS:
        raise AnalysisError(f"test must be one of {sorted(TESTS)}, got {test!r}")
    if correction not in CORRECTIONS:
        raise AnalysisError(f"correction must be 'holm' or 'fdr', got {correction!r}")
    if not 0 < alpha < 1:
        raise AnalysisError(f"alpha must be between 0 and 1, got {alpha}")
    rng = np.random.default_rng(rng)
    name = participant or _participant_name(es.source, 0)
    es = _infer_repetition(es)
    grid = analysis_grid(rates, sfreq=es.sfreq, n_times=es.n_times, window=es.window, skip=skip,
                         n_side=n_side, unit_harmonics=unit_harmonics, max_groups=max_groups)
    rows, is_roi, roi_idx = _rows_of(es, roi)
    Z = epoch_spectra(es.data, sfreq=es.sfreq, window=grid.window, n_bins=grid.n_bins,
                      start_offset=es.start_offset)
    if roi_idx:
        Z = np.concatenate([Z] + [Z[:, idx].mean(axis=1, keepdims=True) for idx in roi_idx],
                           axis=1)
    cond, cond_from = _conditions(es)
    hearing = es.label("repetition")
    items = es.label("item") if es.label("item") is not None else es.label("stim_file")
    notes = list(es.notes) + list(grid.notes)
    if es.start_offset is not None:
        notes.append(f"{es.source}: phases corrected for sub-sample epoch starts "
                     f"(start_offset up to {np.max(np.abs(es.start_offset)):.3f} sample)")
    if cond_from == "hearing":
        notes.append(f"{name}: no condition labels; each hearing stands in as a condition")
    key_p = {"t2circ": "t2circ_p", "itpc": "rayleigh_p", "evoked": "evoked_p"}[test]
    conditions, measures, profiles, phasors = {}, {}, {}, {}
    finding_rows: list[dict] = []
    kinds = np.array([t.kind for t in grid.targets])
    order = list(dict.fromkeys(cond.tolist()))
    for c in (sorted(order) if cond_from == "hearing" else order):
        sel = cond == c
        n = int(sel.sum())
        if n < 3:
            notes.append(f"{name}: condition {c!r} has only {n} epoch(s); left out (needs >= 3)")
            continue
        Zc = Z[sel]
        m = rate_measures(Zc, grid=grid)
        m["p"] = np.asarray(m[key_p])
        pc = _correct_by_kind(m["p"], kinds, correction)
        m["p_corrected"] = pc
        m["significant"] = pc <= alpha
        m["itpc_null"] = np.full(m["itpc"].shape, stats.itpc_null_mean(n))
        conditions[c], measures[c] = n, m
        profiles[c] = spectrum_profile(Zc, grid=grid)
        for r, ch in enumerate(rows):
            for j, t in enumerate(grid.targets):
                finding_rows.append({
                    "participant": name, "condition": c, "channel": ch, "roi": is_roi[r],
                    "level": t.level, "harmonic": t.harmonic, "kind": t.kind,
                    "rate_hz": t.rate_hz, "bin": t.bin, "n_trials": n,
                    "amplitude": float(m["amplitude"][r, j]), "noise": float(m["noise"][r, j]),
                    "snr_db": float(m["snr_db"][r, j]), "z": float(m["z"][r, j]),
                    "evoked_p": float(m["evoked_p"][r, j]),
                    "power_snr_db": float(m["power_snr_db"][r, j]),
                    "itpc": float(m["itpc"][r, j]), "itpc_null": float(m["itpc_null"][r, j]),
                    "rayleigh_p": float(m["rayleigh_p"][r, j]),
                    "t2circ": float(m["t2circ"][r, j]), "t2circ_p": float(m["t2circ_p"][r, j]),
                    "p": float(m["p"][r, j]), "p_corrected": float(pc[r, j]),
                    "significant": bool(m["significant"][r, j])})
    if not conditions:
        raise AnalysisError(f"{es.source}: no condition with at least 3 epochs to analyse")
    tb = np.array([t.bin for t in grid.targets])
    groups = ({c: cond == c for c in conditions} if cond_from == "condition" else
              {"all": np.isin(cond, list(conditions))})
    for c, sel in groups.items():
        zc = Z[sel][..., tb]
        u = zc / np.where(np.abs(zc) > 0, np.abs(zc), 1.0)
        hc = hearing[sel] if hearing is not None else np.zeros(int(sel.sum()), dtype=np.int64)
        phasors[c] = (u.astype(np.complex64), np.asarray(hc))
    phase_rows = _phase_rows(Z, cond, hearing, items, grid=grid, rows=rows, is_roi=is_roi,
                             name=name, measures=measures, cond_from=cond_from,
                             correction=correction, alpha=alpha, rng=rng, n_boot=n_boot,
                             n_perm=n_perm, notes=notes)
    settings = {"alpha": alpha, "correction": correction, "test": test, "skip": skip,
                "n_side": n_side, "unit_harmonics": unit_harmonics}
    return ParticipantResponse(
        participant=name, source=es.source, grid=grid, rows=tuple(rows), roi=tuple(is_roi),
        conditions=conditions, finding_rows=finding_rows, phase_rows=phase_rows,
        measures=measures, profiles=profiles, phasors=phasors, units=es.units, info=es.info,
        settings=settings, notes=tuple(notes))


def _phase_rows(Z, cond, hearing, items, *, grid, rows, is_roi, name, measures, cond_from,
                correction, alpha, rng, n_boot, n_perm, notes) -> list[dict]:
    if hearing is None or not (np.any(hearing == 1) and np.any(hearing == 2)):
        return []
    tb = np.array([t.bin for t in grid.targets])
    groups = ({"all": np.ones(len(cond), bool)} if cond_from != "condition" else
              {c: cond == c for c in dict.fromkeys(cond.tolist())})
    out = []
    for c, sel in groups.items():
        res = hearing_phases(Z[sel][..., tb], hearing=hearing[sel],
                             item=None if items is None else items[sel], rng=rng,
                             n_boot=n_boot, n_perm=n_perm)
        if res is None:
            notes.append(f"{name}: condition {c!r}: fewer than 3 items heard twice; no phase "
                         "comparison")
            continue
        if not res.paired:
            notes.append(f"{name}: condition {c!r}: items unknown, so the hearings are compared "
                         "unpaired over trials")
        h = hearing[sel]
        u = Z[sel][..., tb]
        u = u / np.where(np.abs(u) > 0, np.abs(u), 1.0)
        r1 = np.abs(u[h == 1].mean(axis=0))
        r2 = np.abs(u[h == 2].mean(axis=0))
        resp = (np.zeros(r1.shape, bool) if c not in measures else
                np.asarray(measures[c]["significant"]))
        if c == "all":  # hearings stand in for conditions: responding in either
            resp = np.zeros(r1.shape, bool)
            for m in measures.values():
                resp |= np.asarray(m["significant"])
        pc = _correct_where(np.asarray(res.p), resp, grid.targets, correction)
        for r, ch in enumerate(rows):
            for j, t in enumerate(grid.targets):
                d = float(res.difference[r, j])
                lo, hi = float(res.ci_low[r, j]), float(res.ci_high[r, j])
                ms = 1000.0 / (2 * np.pi * t.rate_hz)
                out.append({
                    "participant": name, "condition": c, "channel": ch, "roi": is_roi[r],
                    "level": t.level, "harmonic": t.harmonic, "kind": t.kind,
                    "rate_hz": t.rate_hz, "n_items": int(res.n), "paired": bool(res.paired),
                    "itpc_first": float(r1[r, j]), "itpc_second": float(r2[r, j]),
                    "phase_first_deg": float(_deg(res.mean_first[r, j])),
                    "phase_second_deg": float(_deg(res.mean_second[r, j])),
                    "difference_deg": float(_deg(d)), "difference_ms": d * ms,
                    "ci_deg": [float(_deg(lo)), float(_deg(hi))], "ci_ms": [lo * ms, hi * ms],
                    "p": float(res.p[r, j]), "p_corrected": float(pc[r, j]),
                    "significant": bool(pc[r, j] <= alpha), "responding": bool(resp[r, j])})
    return out


# =============================================================================================
# Several participants
# =============================================================================================
@dataclass(frozen=True, repr=False)
class ResponseAnalysis:
    """A whole analysis: every participant, and the group when there are several.

    Attributes
    ----------
    participants : tuple of ParticipantResponse
    group_rows, contrast_rows, group_phase_rows : list of dict
        JSON records; :attr:`group`, :attr:`contrasts`, :attr:`group_phase_differences` give
        DataFrames.
    group_measures : dict
        Per condition: ``itpc_excess`` (participants, rows, targets), ``significant``, ...
    settings : dict
    notes : tuple of str
    """

    participants: tuple[ParticipantResponse, ...]
    group_rows: list[dict]
    contrast_rows: list[dict]
    group_phase_rows: list[dict]
    group_measures: dict[str, dict[str, np.ndarray]]
    group_channels: tuple[str, ...]
    settings: dict[str, Any]
    notes: tuple[str, ...] = ()

    @property
    def grid(self) -> AnalysisGrid:
        return self.participants[0].grid

    def _df(self, rows):
        return _need("pandas").DataFrame(rows)

    @property
    def findings(self):
        return self._df([r for p in self.participants for r in p.finding_rows])

    @property
    def phase_differences(self):
        return self._df([r for p in self.participants for r in p.phase_rows])

    @property
    def group(self):
        return self._df(self.group_rows)

    @property
    def contrasts(self):
        return self._df(self.contrast_rows)

    @property
    def group_phase_differences(self):
        return self._df(self.group_phase_rows)

    @property
    def n_significant(self) -> int:
        return sum(len(p.significant) for p in self.participants)

    def summary_line(self) -> str:
        n = len(self.participants)
        s = self.settings
        st = sum(1 for p in self.participants for r in p.significant if r["kind"] == "structure")
        line = (f"{n} participant(s): {self.n_significant} significant finding(s), {st} at "
                f"structure rates ({TESTS[s['test']]}, {CORRECTIONS[s['correction']]}, alpha "
                f"{s['alpha']:g})")
        if n > 1:
            g = [r for r in self.group_rows if r["significant"]]
            gs = sorted({f"{r['condition']}: {r['level']}"
                         + (f" x{r['harmonic']}" if r["harmonic"] > 1 else "")
                         + f" {r['rate_hz']:.4g} Hz at {r['channel']}"
                         for r in g if r["kind"] == "structure"})
            line += (f"; group: {len(g)} significant"
                     + (", at structure rates " + "; ".join(gs[:6]) if gs else ""))
        if self.n_significant == 0 and not any(r["significant"] for r in self.group_rows):
            line += ". No response was found at any tested rate"
        return line

    def to_dict(self) -> dict[str, Any]:
        """The JSON layout documented in the module docstring (:data:`JSON_SCHEMA`)."""
        first = self.participants[0]
        findings = [r for p in self.participants for r in p.finding_rows]
        return {
            "schema_version": SCHEMA_VERSION, "kind": KIND, "stimforge_version": __version__,
            "settings": self.settings,
            "design": first.grid.to_dict(),
            "participants": [{
                "participant": p.participant, "source": p.source, "n_epochs": p.n_epochs,
                "n_channels": int(sum(1 for x in p.roi if not x)), "sfreq": p.grid.sfreq,
                "units": p.units, "window_s": p.grid.window, "dft": p.grid.describe_dft(),
                "conditions": dict(p.conditions), "n_significant": len(p.significant),
                "notes": list(p.notes)} for p in self.participants],
            "findings": findings,
            "phase_differences": [r for p in self.participants for r in p.phase_rows],
            "group": self.group_rows,
            "contrasts": self.contrast_rows,
            "group_phase_differences": self.group_phase_rows,
            "summary": {"n_participants": len(self.participants), "n_findings": len(findings),
                        "n_significant": self.n_significant,
                        "n_group_significant": sum(bool(r["significant"])
                                                   for r in self.group_rows),
                        "sentence": self.summary_line()},
            "notes": list(self.notes),
        }

    def write_json(self, path: str | Path) -> Path:
        from .audio_io import json_dumps

        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json_dumps(self.to_dict(), sort_keys=False), encoding="utf-8")
        return path

    def format_table(self, *, max_rows: int = 20) -> str:
        """Plain text for the terminal: significant findings, phase shifts, group."""
        out = []
        for p in self.participants:
            out.append(p.summary_line())
        sig = sorted((r for p in self.participants for r in p.significant),
                     key=lambda r: (r["kind"] != "structure", r["p"]))
        if sig:
            shown = sig[:max_rows]

            def rate_of(r):
                return (f"{r['level']}" + (f" x{r['harmonic']}" if r["harmonic"] > 1 else "")
                        + f" {r['rate_hz']:.4g} Hz")

            # names are never cut: each column is as wide as its longest entry
            w = {k: max([len(h)] + [len(str(f(r))) for r in shown]) + 2 for k, h, f in (
                ("participant", "participant", lambda r: r["participant"]),
                ("condition", "condition", lambda r: r["condition"]),
                ("channel", "channel", lambda r: r["channel"]),
                ("rate", "rate", rate_of))}
            out.append("")
            out.append(f"{'participant':<{w['participant']}}{'condition':<{w['condition']}}"
                       f"{'channel':<{w['channel']}}{'rate':<{w['rate']}}"
                       f"{'SNR dB':>7}{'pSNR dB':>8}{'ITPC':>6}{'p':>10}{'p corr':>10}")
            for r in shown:
                out.append(f"{r['participant']:<{w['participant']}}{r['condition']:<{w['condition']}}"
                           f"{r['channel']:<{w['channel']}}{rate_of(r):<{w['rate']}}"
                           f"{r['snr_db']:>7.1f}{r['power_snr_db']:>8.1f}{r['itpc']:>6.2f}"
                           f"{r['p']:>10.2e}{r['p_corrected']:>10.2e}")
            if len(sig) > max_rows:
                out.append(f"... {len(sig) - max_rows} more in the JSON / report")
        ph = [r for p in self.participants for r in p.phase_rows
              if r["responding"] and r["kind"] == "structure"]
        if ph:
            out.append("")
            out.append("phase, second minus first hearing, where there is a response "
                       "(+ = second leads):")
            for r in sorted(ph, key=lambda r: r["p"])[:max_rows]:
                out.append(f"  {r['participant']} {r['condition']} {r['channel']} {r['level']}"
                           f" {r['rate_hz']:.4g} Hz: {r['difference_deg']:+.1f} deg "
                           f"({r['difference_ms']:+.0f} ms), 95% CI {r['ci_deg'][0]:+.1f} .. "
                           f"{r['ci_deg'][1]:+.1f} deg, n = {r['n_items']}, p = {r['p']:.3g}")
        g = [r for r in self.group_rows if r["significant"]]
        if g:
            out.append("")
            out.append("group (ITPC above its null expectation across participants):")
            for r in sorted(g, key=lambda r: r["p"])[:max_rows]:
                out.append(f"  {r['condition']} {r['channel']} {r['level']}"
                           + (f" x{r['harmonic']}" if r["harmonic"] > 1 else "")
                           + f" {r['rate_hz']:.4g} Hz: ITPC {r['itpc_mean']:.3f} vs "
                           f"{r['itpc_null_mean']:.3f}, n = {r['n_participants']}, "
                           f"p = {r['p']:.2e}, corrected {r['p_corrected']:.2e}")
        gp = [r for r in self.group_phase_rows if r["significant"]]
        for r in gp[:max_rows]:
            out.append(f"  group phase {r['condition']} {r['channel']} {r['level']} "
                       f"{r['rate_hz']:.4g} Hz: {r['difference_deg']:+.1f} deg "
                       f"({r['difference_ms']:+.0f} ms), p = {r['p']:.3g}")
        return "\n".join(out)

    def __repr__(self) -> str:
        return f"<ResponseAnalysis {self.summary_line()}>"

    def _repr_html_(self) -> str:
        rows = [r for p in self.participants for r in p.significant]
        body = _html_block(self.summary_line(), rows, ("participant",) + _FINDING_COLS)
        if self.group_rows:
            body += _html_block("group", [r for r in self.group_rows if r["significant"]],
                                ("condition", "channel", "level", "harmonic", "rate_hz",
                                 "n_participants", "itpc_mean", "itpc_null_mean", "p",
                                 "p_corrected"))
        return body

    # ------------------------------------------------------------------ figures
    def plot_topomap(self, *, value: str = "itpc_excess", montage: str | None = "auto"):
        """Group topographies (mean over participants), or None without positions."""
        if not self.group_measures:
            return None
        vals = {c: np.nanmean(m[value], axis=0) for c, m in self.group_measures.items()}
        sig = {c: m["significant"] for c, m in self.group_measures.items()}
        first = self.participants[0]
        rows = self.group_channels
        return _fig_topo(vals, sig, grid=first.grid, rows=rows, roi=tuple(
            first.roi[first.rows.index(r)] for r in rows), info=first.info, montage=montage,
            value=value, title="group")

    def plot_group(self):
        """Per-participant ITPC minus its null expectation at each structure rate."""
        return _fig_group(self)


def _resolve_rates(*, build: Any, rates: RateTable | None, unit_duration: float | None,
                   levels: Sequence[tuple[str, int]] | None, unit_name: str
                   ) -> tuple[RateTable, Any, int | None]:
    given = sum(x is not None for x in (build, rates)) + (unit_duration is not None or
                                                          bool(levels))
    if given != 1:
        raise AnalysisError("give the design's rates one way: a build folder (--build DIR), a "
                            "rate table, or --unit-duration S with --level NAME=SIZE")
    if build is not None:
        from .audio_io import BuildTables, read_build

        b = build if isinstance(build, BuildTables) else read_build(build)
        return b.rates, b, int(b.rates.n_top_groups)
    if rates is not None:
        return rates, None, None
    if unit_duration is None or not levels:
        raise AnalysisError("--unit-duration S and at least one --level NAME=SIZE are needed "
                            "together (e.g. --unit-duration 0.25 --level word=2 --level line=2)")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RateWarning)
        try:
            r = grid_from_numbers(unit_duration=unit_duration, levels=list(levels), sr=1000,
                                  n_top_groups=64, unit_name=unit_name)
        except GridError as exc:
            raise AnalysisError(str(exc)) from exc
    return r, None, None


def _group(parts: Sequence[ParticipantResponse], *, alpha: float, correction: str,
           rng: np.random.Generator, n_boot: int, n_perm: int, notes: list[str]):
    sc = _need("scipy.stats")
    chans = [r for r in parts[0].rows if all(r in p.rows for p in parts)]
    if len(chans) < len(parts[0].rows):
        notes.append(f"group: only the {len(chans)} channel(s) every participant has are tested")
    keys = [t.key for t in parts[0].grid.targets if all(
        t.key in {u.key for u in p.grid.targets} for p in parts)]
    tg = [t for t in parts[0].grid.targets if t.key in keys]
    kinds = np.array([t.kind for t in tg])
    is_roi = [parts[0].roi[parts[0].rows.index(c)] for c in chans]

    def take(p, c, name):
        ri = [p.rows.index(ch) for ch in chans]
        ti = [[u.key for u in p.grid.targets].index(k) for k in keys]
        return np.asarray(p.measures[c][name])[np.ix_(ri, ti)]

    conds = list(dict.fromkeys(c for p in parts for c in p.conditions))
    group_rows, gm = [], {}
    for c in conds:
        ps = [p for p in parts if c in p.conditions]
        if len(ps) < 2:
            notes.append(f"group: condition {c!r} has fewer than 2 participants; not tested")
            continue
        itpc = np.stack([take(p, c, "itpc") for p in ps])
        null = np.array([stats.itpc_null_mean(p.conditions[c]) for p in ps])[:, None, None]
        exc = itpc - null
        tt = sc.ttest_1samp(exc, 0.0, axis=0, alternative="greater")
        psnr = np.stack([take(p, c, "power_snr") for p in ps])
        ts = sc.ttest_1samp(psnr - 1.0, 0.0, axis=0, alternative="greater")
        snr_db = np.stack([take(p, c, "snr_db") for p in ps])
        ev = np.stack([take(p, c, "evoked") for p in ps])
        t2 = stats.t2circ(ev, axis=0) if len(ps) >= 3 else None
        p_ = np.asarray(tt.pvalue, dtype=float)
        pc = _correct_by_kind(p_, kinds, correction)
        gm[c] = {"itpc_excess": exc, "itpc": itpc, "p": p_, "p_corrected": pc,
                 "significant": pc <= alpha, "participants": [p.participant for p in ps]}
        with np.errstate(divide="ignore", invalid="ignore"):
            psnr_db = 10 * np.log10(psnr.mean(axis=0))
        for r, ch in enumerate(chans):
            for j, t in enumerate(tg):
                group_rows.append({
                    "condition": c, "channel": ch, "roi": is_roi[r], "level": t.level,
                    "harmonic": t.harmonic, "kind": t.kind, "rate_hz": t.rate_hz,
                    "n_participants": len(ps), "itpc_mean": float(itpc[:, r, j].mean()),
                    "itpc_null_mean": float(null.mean()), "t": float(tt.statistic[r, j]),
                    "p": float(p_[r, j]), "p_corrected": float(pc[r, j]),
                    "significant": bool(pc[r, j] <= alpha),
                    "snr_db_mean": float(np.nanmean(snr_db[:, r, j])),
                    "power_snr_db_mean": float(psnr_db[r, j]),
                    "snr_p": float(ts.pvalue[r, j]),
                    "t2circ_p": float(t2.p[r, j]) if t2 is not None else None})
    contrast_rows = []
    for i, a in enumerate(conds):
        for b in conds[i + 1:]:
            ps = [p for p in parts if a in p.conditions and b in p.conditions]
            if len(ps) < 2:
                continue
            da = np.stack([take(p, a, "itpc") - stats.itpc_null_mean(p.conditions[a])
                           for p in ps])
            db = np.stack([take(p, b, "itpc") - stats.itpc_null_mean(p.conditions[b])
                           for p in ps])
            sf = stats.sign_flip_test(da - db, rng=rng, n_perm=n_perm)
            p_ = np.asarray(sf.p, dtype=float)
            pc = _correct_by_kind(p_, kinds, correction)
            for r, ch in enumerate(chans):
                for j, t in enumerate(tg):
                    contrast_rows.append({
                        "condition_a": a, "condition_b": b, "channel": ch, "roi": is_roi[r],
                        "level": t.level, "harmonic": t.harmonic, "kind": t.kind,
                        "rate_hz": t.rate_hz, "n_participants": len(ps),
                        "itpc_difference": float(np.mean(da[:, r, j] - db[:, r, j])),
                        "p": float(p_[r, j]), "p_corrected": float(pc[r, j]),
                        "significant": bool(pc[r, j] <= alpha), "exact": bool(sf.exact)})
    phase_rows = []
    pconds = list(dict.fromkeys(r["condition"] for p in parts for r in p.phase_rows))
    for c in pconds:
        diffs, who = [], []
        for p in parts:
            rr = {(r["channel"], r["level"], r["harmonic"]): r["difference_deg"]
                  for r in p.phase_rows if r["condition"] == c}
            if not rr:
                continue
            diffs.append([[rr.get((ch, t.level, t.harmonic), np.nan) for t in tg] for ch in chans])
            who.append(p.participant)
        if len(diffs) < 3:
            if diffs:
                notes.append(f"group: phase differences in {c!r} from fewer than 3 participants; "
                             "not tested")
            continue
        d = np.deg2rad(np.array(diffs))
        if not np.all(np.isfinite(d)):
            notes.append(f"group: phase differences in {c!r} missing for some participants")
            continue
        res = stats.circular_one_sample(d, rng=rng, n_boot=n_boot, n_perm=max(n_perm, 10))
        p_ = np.asarray(res.p, dtype=float)
        resp = np.zeros(p_.shape, bool)
        for cc, m in gm.items():
            if cc == c or c == "all":
                resp |= np.asarray(m["significant"])
        pc = _correct_where(p_, resp, tg, correction)
        for r, ch in enumerate(chans):
            for j, t in enumerate(tg):
                ms = 1000.0 / (2 * np.pi * t.rate_hz)
                dd = float(res.difference[r, j])
                lo, hi = float(res.ci_low[r, j]), float(res.ci_high[r, j])
                phase_rows.append({
                    "condition": c, "channel": ch, "roi": is_roi[r], "level": t.level,
                    "harmonic": t.harmonic, "kind": t.kind, "rate_hz": t.rate_hz,
                    "n_participants": len(who), "difference_deg": float(_deg(dd)),
                    "difference_ms": dd * ms, "ci_deg": [float(_deg(lo)), float(_deg(hi))],
                    "ci_ms": [lo * ms, hi * ms], "p": float(p_[r, j]),
                    "p_corrected": float(pc[r, j]), "significant": bool(pc[r, j] <= alpha),
                    "responding": bool(resp[r, j])})
    return group_rows, contrast_rows, phase_rows, gm, tuple(chans)


def analyze(epochs: Any, *, build: Any = None, rates: RateTable | None = None,
            unit_duration: float | None = None, levels: Sequence[tuple[str, int]] | None = None,
            unit_name: str = "unit", alpha: float = 0.05, correction: str = "holm",
            test: str = "t2circ", skip: int = 1, n_side: int = 4, unit_harmonics: int = 2,
            roi: Mapping[str, Sequence[str]] | None = None, n_boot: int = 2000,
            n_perm: int = 2000, rng: np.random.Generator | int | None = None,
            progress: bool = False) -> ResponseAnalysis:
    """Analyse recorded responses at a design's rates: each participant, then the group.

    Parameters
    ----------
    epochs : path, EpochSet, mne.Epochs, dict, or a list of them
        One item per participant (a file whose ``participant`` labels name several is split).
    build : path or BuildTables, optional
        A stimforge build folder: its rate table, and its trial table for condition/hearing
        labels by stim file.  Or give ``rates``, or ``unit_duration`` with ``levels``.
    rates : RateTable, optional
    unit_duration : float, seconds, optional
    levels : list of (name, size), optional
        From the lowest group upwards (as ``stimforge check --level``).
    unit_name : str
    alpha, correction, test, skip, n_side, unit_harmonics, roi, n_boot, n_perm
        See :func:`analyze_participant`.
    rng : int or Generator, optional
        Seeds the bootstrap and permutations (the seed is written into the JSON).
    progress : bool
        A progress bar over participants.

    Returns
    -------
    ResponseAnalysis

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> t = np.arange(1000) / 250.0                         # 4 s at 250 Hz
    >>> data = rng.standard_normal((20, 2, 1000))
    >>> data[:, 0] += 0.5 * np.cos(2 * np.pi * 1.0 * t)       # 1 Hz in channel 0
    >>> res = analyze({"data": data, "sfreq": 250.0}, unit_duration=0.25,
    ...               levels=[("word", 2), ("line", 2)], rng=1)
    >>> [(r["channel"], r["rate_hz"]) for r in res.participants[0].significant
    ...  if r["kind"] == "structure"]
    [('ch0', 1.0)]
    """
    seed = None
    if rng is None or isinstance(rng, (int, np.integer)):
        seed = int(np.random.SeedSequence().entropy % 2 ** 32) if rng is None else int(rng)
        rng = np.random.default_rng(seed)
    table, btab, max_groups = _resolve_rates(build=build, rates=rates, unit_duration=unit_duration,
                                             levels=levels, unit_name=unit_name)
    items = list(epochs) if isinstance(epochs, (list, tuple)) else [epochs]
    if not items:
        raise AnalysisError("no epochs given")
    sets: list[tuple[str, EpochSet]] = []
    for i, src in enumerate(items):
        es = load_epochs(src)
        if btab is not None:
            es = apply_build(es, btab)
        sets += _split_participants(es, _participant_name(es.source, i))
    names = [n for n, _ in sets]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise AnalysisError(f"participant name(s) {dup} come from more than one file; give each "
                            "participant one file, or distinct 'participant' labels")
    from tqdm.auto import tqdm

    parts = []
    for name, es in tqdm(sets, desc="analyze", unit="participant", disable=not progress):
        parts.append(analyze_participant(
            es, rates=table, participant=name, alpha=alpha, correction=correction, test=test,
            skip=skip, n_side=n_side, unit_harmonics=unit_harmonics, roi=roi,
            max_groups=max_groups, n_boot=n_boot, n_perm=n_perm, rng=rng))
        log.debug("analyzed %s", name)
    notes: list[str] = []
    windows = {p.grid.window for p in parts}
    if len(windows) > 1:
        notes.append(f"participants' windows differ ({sorted(windows)} s); rates are compared "
                     "by level and harmonic")
    g_rows, c_rows, gp_rows, gm, gch = ([], [], [], {}, ())
    if len(parts) > 1:
        g_rows, c_rows, gp_rows, gm, gch = _group(parts, alpha=alpha, correction=correction,
                                                  rng=rng, n_boot=n_boot, n_perm=n_perm,
                                                  notes=notes)
    settings = {"alpha": alpha, "correction": correction,
                "correction_name": CORRECTIONS[correction],
                "family": "per participant and condition: channels x rates, the structure "
                          "rates and the unit-rate rows separately",
                "test": test, "test_name": TESTS[test], "group_test": GROUP_TEST,
                "neighbours": {"skip": skip, "n_side": n_side, "source": NEIGHBOUR_SOURCE},
                "unit_harmonics": unit_harmonics, "n_boot": n_boot, "n_perm": n_perm,
                "seed": seed, "roi": {k: list(v) for k, v in (roi or {}).items()},
                "rates_from": ("build " + str(btab.root)) if btab is not None else
                ("rate table" if rates is not None else "--unit-duration/--level")}
    return ResponseAnalysis(participants=tuple(parts), group_rows=g_rows, contrast_rows=c_rows,
                            group_phase_rows=gp_rows, group_measures=gm, group_channels=gch,
                            settings=settings, notes=tuple(notes))


# =============================================================================================
# HTML snippets and figures (matplotlib.figure.Figure only: the user's backend is untouched)
# =============================================================================================
def _cell(v: Any) -> str:
    import html

    if isinstance(v, bool):
        return "yes" if v else ""
    if isinstance(v, float):
        if not math.isfinite(v):
            return "n/a"
        return f"{v:.2e}" if (abs(v) < 1e-3 and v != 0) else f"{v:.3g}"
    if isinstance(v, (list, tuple)):
        return " .. ".join(_cell(x) for x in v)
    return html.escape(str(v))


def _html_block(title: str, rows: Sequence[dict], cols: Sequence[str], *, limit: int = 40) -> str:
    import html

    head = "".join(f"<th>{html.escape(c)}</th>" for c in cols)
    body = "".join("<tr" + (" class='sig'" if r.get("significant") else "") + ">" + "".join(
        f"<td>{_cell(r.get(c))}</td>" for c in cols) + "</tr>" for r in rows[:limit])
    more = (f"<p>... {len(rows) - limit} more rows in the JSON</p>" if len(rows) > limit else "")
    table = (f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"
             if rows else "<p>(no rows)</p>")
    return f"<div><p><b>{html.escape(title)}</b></p>{table}{more}</div>"


_LEVEL_COLOURS = ("#1b6ca8", "#c0392b", "#27865f", "#8e44ad", "#d35400", "#2c3e50", "#7f8c8d")


def _level_colour(grid: AnalysisGrid, level: str) -> str:
    names = [r.name for r in grid.rates.rows][::-1]
    return _LEVEL_COLOURS[names.index(level) % len(_LEVEL_COLOURS)] if level in names else "k"


def _mark_targets(ax, grid: AnalysisGrid, *, top: float) -> None:
    for t in grid.targets:
        col = _level_colour(grid, t.level)
        ax.axvline(t.rate_hz, color=col, lw=1.2, alpha=0.55, zorder=0)
        lab = t.level if t.harmonic == 1 else f"{t.level} x{t.harmonic}"
        ax.text(t.rate_hz, top, f"{lab}\n{t.rate_hz:.3g} Hz", color=col, fontsize=7.5,
                ha="center", va="bottom", clip_on=False)


def _fig_profile(pr: ParticipantResponse, what: str, *, channel: str | None,
                 conditions: Sequence[str] | None):
    from matplotlib.figure import Figure

    conds = list(conditions) if conditions else list(pr.conditions)
    fig = Figure(figsize=(12.0, 2.9 * len(conds) + 0.4), dpi=100, layout="constrained")
    axes = fig.subplots(len(conds), 1, squeeze=False)[:, 0]
    f = pr.grid.freqs
    for ax, c in zip(axes, conds):
        c, ri = pr._pick(c, channel)
        prof = pr.profiles[c][what]
        chans = [i for i, r in enumerate(pr.roi) if not r]
        if len(chans) <= 64:
            for i in chans:
                ax.plot(f[1:], prof[i, 1:], color="0.75", lw=0.5)
        ax.plot(f[1:], np.nanmean(prof[chans, 1:], axis=0), color="0.2", lw=1.2,
                label="mean of channels")
        ax.plot(f[1:], prof[ri, 1:], color="#e67e22", lw=1.4, label=pr.rows[ri])
        n = pr.conditions[c]
        if what == "itpc":
            rc = stats.rayleigh_critical_r(n, pr.settings["alpha"])
            m = sum(1 for t in pr.grid.targets if t.kind == "structure") * len(pr.rows)
            rcm = stats.rayleigh_critical_r(n, pr.settings["alpha"] / max(m, 1))
            ax.axhline(rc, color="k", ls="--", lw=1,
                       label=f"Rayleigh p = {pr.settings['alpha']:g} (n = {n}): r = {rc:.2f}")
            ax.axhline(rcm, color="k", ls=":", lw=1,
                       label=f"after correction over {m} tests: r = {rcm:.2f}")
            ax.axhline(stats.itpc_null_mean(n), color="0.5", ls="-.", lw=0.8,
                       label=f"null mean {stats.itpc_null_mean(n):.2f}")
            ax.set_ylim(0, 1.0)
            ax.set_ylabel("ITPC")
            top = 1.0
        else:
            ax.axhline(0, color="0.5", lw=0.8)
            ax.set_ylabel("evoked SNR (dB)")
            lo, hi = ax.get_ylim()
            top = hi
        _mark_targets(ax, pr.grid, top=top)
        ax.set_xlim(0, f[-1])
        ax.set_title(f"{pr.participant} - {c} ({n} trials)", loc="left", fontsize=10, pad=24)
        ax.legend(loc="upper right", fontsize=7.5, framealpha=0.85)
    axes[-1].set_xlabel("frequency (Hz)")
    return fig


def _fig_polar(pr: ParticipantResponse, *, condition: str | None, channel: str | None,
               max_targets: int):
    from matplotlib.figure import Figure

    c = condition if condition is not None else next(iter(pr.phasors))
    if c not in pr.phasors:
        raise AnalysisError(f"no phases kept for {c!r}; have {list(pr.phasors)}")
    _, ri = pr._pick(c if c in pr.measures else None, channel)
    u, h = pr.phasors[c]
    st = [j for j, t in enumerate(pr.grid.targets) if t.kind == "structure"][:max_targets]
    fig = Figure(figsize=(min(12.0, 3.2 * len(st) + 0.6), 4.2), dpi=100, layout="constrained")
    hearings = [x for x in (1, 2) if np.any(h == x)] or [0]
    cols = {0: "0.3", 1: "#1b6ca8", 2: "#e67e22"}
    names = {0: "all trials", 1: "first hearing", 2: "second hearing"}
    for n, j in enumerate(st):
        ax = fig.add_subplot(1, len(st), n + 1, projection="polar")
        t = pr.grid.targets[j]
        for x in hearings:
            v = u[h == x, ri, j] if x else u[:, ri, j]
            ang = np.angle(v)
            ax.scatter(ang, np.full(ang.shape, 1.0), s=10, color=cols[x], alpha=0.6,
                       label=names[x])
            m = v.mean()
            ax.annotate("", xy=(np.angle(m), abs(m)), xytext=(0, 0),
                        arrowprops=dict(arrowstyle="->", color=cols[x], lw=2))
        ax.set_ylim(0, 1.1)
        ax.set_yticks([0.5, 1.0])
        ax.tick_params(labelsize=7)
        ttl = f"{t.label}, {pr.rows[ri]}"
        for r in pr.phase_rows:
            if (r["channel"] == pr.rows[ri] and r["level"] == t.level
                    and r["harmonic"] == t.harmonic and r["condition"] in (c, "all")):
                ttl += f"\nsecond - first {r['difference_deg']:+.0f} deg " \
                       f"({r['difference_ms']:+.0f} ms)"
                break
        ax.set_title(ttl, fontsize=8.5)
        if n == 0:
            handles, labels = ax.get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=3, fontsize=8,
               title=f"{pr.participant} - {c}: single-trial phases; arrow length = ITPC",
               title_fontsize=8.5)
    return fig


@functools.lru_cache(maxsize=8)
def _montage(name: str):
    mne = _need("mne")
    try:
        return mne.channels.make_standard_montage(name)
    except ValueError as exc:
        raise AnalysisError(f"montage {name!r}: {exc}") from exc


def _positions(rows: Sequence[str], roi: Sequence[bool], info: Any, montage: str | None,
               sfreq: float):
    """(mne.Info with positions, indices into rows) or (None, None)."""
    if montage is None:
        return None, None
    mne = _need("mne")
    chans = [r for r, is_r in zip(rows, roi) if not is_r]
    if info is not None:
        try:
            pos = info.get_montage()
        except Exception:  # noqa: BLE001 - an Info without digitisation
            pos = None
        if pos is not None:
            keep = [c for c in chans if c in info.ch_names]
            if len(keep) >= 3:
                sub = mne.pick_info(info, [info.ch_names.index(c) for c in keep])
                return sub, [list(rows).index(c) for c in keep]
    names = ([montage] if montage != "auto" else
             [m for m in _PREFERRED_MONTAGES if m in mne.channels.get_builtin_montages()])
    best = None
    for name in names:
        mont = _montage(name)
        low = {c.lower(): c for c in mont.ch_names}
        keep = [c for c in chans if c.lower() in low]
        if len(keep) >= 3 and (best is None or len(keep) > len(best[1])):
            best = (mont, keep, low)
        if best is not None and len(best[1]) == len(chans):
            break
    if best is None:
        return None, None
    mont, keep, low = best
    info2 = mne.create_info([low[c.lower()] for c in keep], sfreq, "eeg")
    info2.set_montage(mont, on_missing="ignore", verbose="error")
    return info2, [list(rows).index(c) for c in keep]


def _fig_topo(vals: dict, sig: dict, *, grid: AnalysisGrid, rows, roi, info, montage,
              value: str, title: str):
    from matplotlib.figure import Figure

    info2, idx = _positions(rows, roi, info, montage, grid.sfreq)
    if info2 is None:
        return None
    mne = _need("mne")
    tg = [j for j, t in enumerate(grid.targets) if t.kind == "structure" and t.harmonic == 1]
    tg += [j for j, t in enumerate(grid.targets) if t.kind == "unit" and t.harmonic == 1]
    conds = list(vals)
    w = min(12.0, 2.4 * len(tg) + 1.0)
    fig = Figure(figsize=(w, 2.3 * len(conds) + 0.5), dpi=100, layout="constrained")
    axes = fig.subplots(len(conds), len(tg), squeeze=False)
    for i, c in enumerate(conds):
        v = np.asarray(vals[c])[idx]
        s = np.asarray(sig[c])[idx]
        for jj, j in enumerate(tg):
            ax = axes[i, jj]
            data = v[:, j]
            lim = float(np.nanmax(np.abs(data))) or 1.0
            im, _ = mne.viz.plot_topomap(
                data, info2, axes=ax, show=False, mask=s[:, j], contours=0, cmap="viridis",
                vlim=(0 if value in ("itpc",) else -lim, lim),
                mask_params=dict(marker="o", markerfacecolor="w", markeredgecolor="k",
                                 markersize=5))
            ax.set_title(f"{c}\n{grid.targets[j].label}", fontsize=8)
        fig.colorbar(im, ax=axes[i, :].tolist(), shrink=0.8, label=value)
    fig.suptitle(f"{title}: {value} (white dots: significant)", fontsize=10)
    return fig


def _fig_group(ga: ResponseAnalysis):
    from matplotlib.figure import Figure

    if not ga.group_measures:
        return None
    grid = ga.grid
    st = [j for j, t in enumerate(grid.targets) if t.kind == "structure"]
    conds = list(ga.group_measures)
    fig = Figure(figsize=(12.0, 2.8 * len(conds) + 0.4), dpi=100, layout="constrained")
    axes = fig.subplots(len(conds), 1, squeeze=False)[:, 0]
    for ax, c in zip(axes, conds):
        m = ga.group_measures[c]
        exc = m["itpc_excess"]
        p = np.asarray(m["p"])[:, st]
        ri = int(np.unravel_index(np.nanargmin(p), p.shape)[0])
        xs = np.arange(len(st))
        for k in range(exc.shape[0]):
            ax.plot(xs, exc[k, ri, st], "o", color="0.6", ms=4, alpha=0.8)
        ax.errorbar(xs, exc[:, ri, st].mean(axis=0), yerr=exc[:, ri, st].std(axis=0, ddof=1)
                    / np.sqrt(exc.shape[0]), fmt="s", color="#c0392b", capsize=4,
                    label="mean +- SE")
        for x, j in zip(xs, st):
            if m["significant"][ri, j]:
                ax.text(x, ax.get_ylim()[1], "*", ha="center", va="top", fontsize=14)
        ax.axhline(0, color="k", lw=0.8)
        ax.set_xticks(xs, [grid.targets[j].label for j in st], fontsize=8)
        ax.set_ylabel("ITPC - null")
        ax.set_title(f"group - {c}, channel {ga.group_channels[ri]} ({exc.shape[0]} "
                     "participants; * significant)", loc="left", fontsize=10)
        ax.legend(loc="upper right", fontsize=8)
    return fig


# =============================================================================================
# JSON Schema of the layout (for validators; documented in the module docstring)
# =============================================================================================
_NUM = {"type": ["number", "null"]}
_STR = {"type": "string"}
_BOOL = {"type": "boolean"}
_INT = {"type": "integer"}


def _obj(required: dict[str, Any]) -> dict[str, Any]:
    return {"type": "object", "required": list(required), "properties": required}


_RATE = {"level": _STR, "harmonic": _INT, "kind": {"enum": ["structure", "unit"]},
         "rate_hz": {"type": "number"}, "channel": _STR, "roi": _BOOL}
JSON_SCHEMA: dict[str, Any] = {
    "$schema": "https://json-schema.org/draft/2020-12/schema",
    "title": "stimforge response analysis",
    "type": "object",
    "required": ["schema_version", "kind", "stimforge_version", "settings", "design",
                 "participants", "findings", "phase_differences", "group", "contrasts",
                 "group_phase_differences", "summary", "notes"],
    "properties": {
        "schema_version": {"const": SCHEMA_VERSION},
        "kind": {"const": KIND},
        "stimforge_version": _STR,
        "settings": _obj({"alpha": {"type": "number"}, "correction": {"enum": ["holm", "fdr"]},
                          "test": {"enum": sorted(TESTS)}, "group_test": _STR,
                          "neighbours": _obj({"skip": _INT, "n_side": _INT, "source": _STR}),
                          "unit_harmonics": _INT, "n_boot": _INT, "n_perm": _INT,
                          "seed": {"type": ["integer", "null"]}}),
        "design": _obj({"unit": _STR, "levels": {"type": "array"}, "window_s": {"type": "number"},
                        "resolution_hz": {"type": "number"}, "targets": {"type": "array"},
                        "dft": _STR}),
        "participants": {"type": "array", "minItems": 1, "items": _obj({
            "participant": _STR, "source": _STR, "n_epochs": _INT, "n_channels": _INT,
            "sfreq": {"type": "number"}, "conditions": {"type": "object"},
            "n_significant": _INT, "notes": {"type": "array"}})},
        "findings": {"type": "array", "items": _obj({
            **_RATE, "participant": _STR, "condition": _STR, "bin": _INT, "n_trials": _INT,
            "amplitude": _NUM, "noise": _NUM, "snr_db": _NUM, "z": _NUM, "evoked_p": _NUM,
            "power_snr_db": _NUM, "itpc": _NUM, "itpc_null": _NUM, "rayleigh_p": _NUM,
            "t2circ": _NUM, "t2circ_p": _NUM, "p": _NUM, "p_corrected": _NUM,
            "significant": _BOOL})},
        "phase_differences": {"type": "array", "items": _obj({
            **_RATE, "participant": _STR, "condition": _STR, "n_items": _INT, "paired": _BOOL,
            "phase_first_deg": _NUM, "phase_second_deg": _NUM, "difference_deg": _NUM,
            "difference_ms": _NUM, "ci_deg": {"type": "array", "items": _NUM},
            "ci_ms": {"type": "array", "items": _NUM}, "p": _NUM, "p_corrected": _NUM,
            "significant": _BOOL, "responding": _BOOL})},
        "group": {"type": "array", "items": _obj({
            **_RATE, "condition": _STR, "n_participants": _INT, "itpc_mean": _NUM,
            "itpc_null_mean": _NUM, "t": _NUM, "p": _NUM, "p_corrected": _NUM,
            "significant": _BOOL, "snr_db_mean": _NUM, "power_snr_db_mean": _NUM,
            "snr_p": _NUM, "t2circ_p": _NUM})},
        "contrasts": {"type": "array", "items": _obj({
            **_RATE, "condition_a": _STR, "condition_b": _STR, "n_participants": _INT,
            "itpc_difference": _NUM, "p": _NUM, "p_corrected": _NUM, "significant": _BOOL})},
        "group_phase_differences": {"type": "array", "items": _obj({
            **_RATE, "condition": _STR, "n_participants": _INT, "difference_deg": _NUM,
            "difference_ms": _NUM, "ci_deg": {"type": "array"}, "p": _NUM,
            "p_corrected": _NUM, "significant": _BOOL})},
        "summary": _obj({"n_participants": _INT, "n_findings": _INT, "n_significant": _INT,
                         "n_group_significant": _INT, "sentence": _STR}),
        "notes": {"type": "array", "items": _STR},
    },
}

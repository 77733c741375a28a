"""The acoustic-leak checker: does a stimulus set carry a cue at the rates of its structure?

Two entry points, one pipeline:

* :func:`check_build` reads a stimforge build folder (``manifest.json``, ``trials.tsv``,
  ``units.tsv``, ``stimuli/*.wav``);
* :func:`check_files` reads plain WAV files (one trial each) on a grid given by the caller.

Both return a :class:`~stimforge.verify_report.CheckReport`.  What is computed, and why:

1. Two envelopes per trial, each sampled at ``env_sr`` (100-250 Hz, chosen so that a unit
   spans a whole number of envelope samples where possible):

   * **broadband**: Hilbert magnitude of the waveform (FFT length ``next_fast_len``), low-passed
     and downsampled in one step by ``scipy.signal.resample_poly`` (its Kaiser FIR is the
     low-pass, cut-off ``env_sr / 2``; ``padtype='line'`` keeps the edges right);
   * **auditory**: the waveform at 16 kHz (soxr HQ) through a bank of 32 fourth-order gammatone
     filters (scipy's IIR design, as second-order sections; stable at 16 kHz) with centres
     equally spaced in ERB-number from 180 to 7250 Hz (Glasberg & Moore 1990); each band's
     Hilbert magnitude is compressed by a power of 0.6, the bands are summed, then downsampled.

2. Spectra over the analysis window (whole cycles of the slowest rate: every rate sits on a
   bin), at every higher-level rate and its harmonics below the unit rate that do not belong to
   a faster level: evoked amplitude against its neighbours (ratio, z, F-test p), ITPC with the
   Rayleigh test (Zar), Hotelling T^2circ, and the magnitude-average SNR (shown only).
3. Per-position features of every unit (RMS dB, active duration, median Praat F0, spectral
   centroid, steepest-rise latency) compared across positions with a blocked Friedman test.
4. Joins: the largest sample step within 2 ms of every unit boundary against the units' own.
5. One Holm family per set (conditions x levels x measures x features).
6. Sensitivity: cues planted into copies of the measured set (envelope and feature domains,
   see :func:`plant`), tested by the same family; the smallest revealed size of each.

Only one trial's audio is in memory at a time; what is kept per trial is small (envelopes at
``env_sr``, a feature table, join scores).

See ``README.md``, section "The acoustic check", for the plain-words version.
"""

from __future__ import annotations

import json
import logging
import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

from . import stats as vs
from .acoustics import (FEATURES, active_bounds, praat_f0, rms_dbfs, semitones,
                        steepest_rise_time)
from .audio_io import AudioFileProblem, probe_audio, read_audio, read_tsv
from .envelopes import (AUDITORY_SR, COMPRESSION, auditory_envelope, broadband_envelope,
                        choose_env_sr, gammatone_bank)
from .defaults import ALPHA
from .errors import CheckInputError, GridError
from .grid import RateTable, grid_from_numbers
from .timing import seconds_to_samples, unit_start
from .verify_report import CheckReport

__all__ = ["check", "check_build", "check_files", "CheckReport", "broadband_envelope", "auditory_envelope",
           "gammatone_bank", "FEATURES", "AUDITORY_SR", "COMPRESSION"]

log = logging.getLogger("stimforge")

#: Resolution of each feature in the position tests (dB, ms, semitones, Hz, ms).
FEATURE_RESOLUTION = {"rms_db": 0.01, "active_ms": 0.1, "f0_st": 0.01, "centroid_hz": 1.0,
                      "rise_ms": 0.1}
ENVELOPES = ("broadband", "auditory")
MEASURES = ("evoked", "itpc", "t2circ")
JOIN_HALF_WIDTH = 0.002  # s either side of a boundary
JOIN_FLAG_DB = 0.0  # a boundary step above the median unit's own largest step is flagged
#: Join scores below this (a boundary step under a tenth of the units' own largest steps) are
#: clean; the position test sees them as ties, so differences within silence are not cues.
JOIN_FLOOR_DB = -20.0
F0_REF = 100.0  # Hz, reference of the semitone scale
F0_SR = 8000  # Hz, rate at which Praat measures F0


# ---------------------------------------------------------------------------------------------
# Design and trials
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Design:
    """The grid the check works on (internal): a rate table and where it came from."""

    grid: RateTable
    mode: str  # "build" | "files"
    source: str

    @property
    def unit_name(self) -> str:
        return self.grid.rows[0].name

    @property
    def unit_duration(self) -> float:
        return self.grid.rows[0].period

    @property
    def levels(self) -> tuple[tuple[str, int], ...]:
        return self.grid.levels

    @property
    def sr(self) -> int:
        return self.grid.sr

    @property
    def window(self) -> float:
        """Seconds analysed per trial."""
        return self.grid.window

    @property
    def n_units(self) -> int:
        """Analysed units per trial."""
        return self.grid.analysed_units

    @property
    def rates(self) -> list[tuple[str, int, float]]:
        """(name, units per group, rate Hz) from the unit upwards."""
        return [(r.name, r.units_per_group, r.rate) for r in self.grid.rows]


@dataclass
class Trial:
    """One distinct audio file on the grid (internal)."""

    name: str
    condition: str
    trial: str
    path: Path | None
    n_frames: int
    bounds: np.ndarray  # n_units + 1 sample indices into the audio
    file_onset: float  # s, analysis onset in the file
    audio: np.ndarray | None = None  # read on demand (one trial in memory at a time)

    def load(self) -> np.ndarray:
        """The trial's mono audio (kept if it was given, else read from ``path``)."""
        if self.audio is not None:
            return self.audio
        assert self.path is not None
        x, _ = _read_wav(self.path)
        if x.size != self.n_frames:
            raise CheckInputError(f"{self.path}: read {x.size} samples, the header promised "
                                  f"{self.n_frames}; the file is truncated: re-export it")
        return x


def _probe_wav(path: Path) -> tuple[int, int]:
    """(frames, sample rate) from the header, with the check's error messages."""
    try:
        n_frames, sr, _ = probe_audio(path)
    except AudioFileProblem as exc:
        raise CheckInputError(f"{path}: {exc}; give a whole WAV file (for a build folder, "
                              "check that the build finished)") from None
    return n_frames, sr


def _read_wav(path: Path) -> tuple[np.ndarray, int]:
    """Mono float64 samples (the mean of the channels) and the sample rate."""
    try:
        x, sr = read_audio(path)
    except AudioFileProblem as exc:
        raise CheckInputError(f"{path}: {exc}; give a whole WAV file") from None
    if x.shape[1] > 1:
        log.warning("%s: %d channels, analysed as their mean", path, x.shape[1])
    return np.ascontiguousarray(x.mean(axis=1)), int(sr)


def _read_tsv(path: Path) -> list[dict[str, str]]:
    if not path.is_file():
        raise CheckInputError(f"{path}: missing; is this a stimforge build folder?")
    rows = read_tsv(path)
    if not rows:
        raise CheckInputError(f"{path}: no rows")
    return rows


def _num(row: dict[str, str], key: str, where: str) -> float:
    try:
        return float(row[key])
    except (KeyError, TypeError, ValueError) as exc:
        raise CheckInputError(f"{where}: column {key!r} missing or not a number "
                              f"(got {row.get(key)!r})") from exc


def _sample(t: float, sr: int) -> int:
    # the tables give seconds to 1 us: round away float noise, then the one rounding rule
    return seconds_to_samples(round(t, 9), sr=sr)


def load_build(build_dir: str | Path) -> tuple[Design, list[Trial]]:
    """Read a build folder into a design and its distinct trials."""
    root = Path(build_dir)
    if not root.is_dir():
        raise CheckInputError(f"{root}: not a folder; give a stimforge build folder or WAV files")
    mpath = root / "manifest.json"
    if not mpath.is_file():
        raise CheckInputError(f"{mpath}: missing; is {root} a stimforge build folder?")
    try:
        manifest = json.loads(mpath.read_text(encoding="utf-8"))
        grid = RateTable.from_dict(manifest["rate_table"], source=str(mpath))
    except (ValueError, KeyError, TypeError) as exc:
        raise CheckInputError(f"{mpath}: no usable 'rate_table' ({exc}); rebuild the set") from exc
    unit_name, sr, T = grid.rows[0].name, grid.sr, grid.rows[0].period
    if not grid.levels:
        raise CheckInputError(f"{mpath}: the rate table has no level above the unit: "
                              "nothing to check")
    rows = _read_tsv(root / "trials.tsv")
    seen: dict[str, dict[str, str]] = {}
    for i, r in enumerate(rows, start=2):
        if str(r.get("repetition", "1")).strip() not in ("1", "1.0", "n/a", ""):
            continue
        f = r.get("stim_file")
        if not f:
            raise CheckInputError(f"{root / 'trials.tsv'} line {i}: empty stim_file")
        seen.setdefault(f, r)
    units_path = root / "units.tsv"
    unit_rows: dict[str, list[tuple[int, float]]] = {}
    if units_path.is_file():
        for r in _read_tsv(units_path):
            if r.get("level") != unit_name or str(r.get("lead_in", "0")).strip() == "1":
                continue
            unit_rows.setdefault(r["stim_file"], []).append(
                (int(float(r["index"])), _num(r, "onset", str(units_path))))
    window = grid.window
    trials: list[Trial] = []
    n_units = None
    for f, r in seen.items():
        where = f"{root / 'trials.tsv'} ({f})"
        onset = _num(r, "analysis_onset", where)
        dur = _num(r, "analysis_duration", where)
        if window and abs(dur - window) > 1e-6:
            raise CheckInputError(f"{where}: analysis_duration {dur} s differs from the rate "
                                  f"table's window {window} s; rebuild the set")
        n_frames, fsr = _probe_wav(root / f)
        if fsr != sr:
            raise CheckInputError(f"{root / f}: sample rate {fsr} Hz, manifest says {sr} Hz")
        nu = int(round(dur / T))
        if n_units is None:
            n_units = nu
        elif nu != n_units:
            raise CheckInputError(f"{where}: {nu} analysed units, other trials have {n_units}; "
                                  "trials of one set must be of equal length")
        if f in unit_rows:
            ons = sorted(unit_rows[f])
            starts = [_sample(t, sr) for _, t in ons]
            if len(starts) != nu:
                raise CheckInputError(f"{units_path}: {len(starts)} analysed {unit_name} rows "
                                      f"for {f}, expected {nu}; the build folder is inconsistent")
        else:
            s0 = _sample(onset, sr)
            starts = [s0 + unit_start(k, unit_duration=T, sr=sr) for k in range(nu)]
        end = _sample(onset, sr) + unit_start(nu, unit_duration=T, sr=sr)
        bounds = np.array(starts + [end], dtype=np.int64)
        if bounds[-1] > n_frames or bounds[0] < 0 or np.any(np.diff(bounds) <= 0):
            raise CheckInputError(f"{root / f}: {n_frames / sr:.3f} s long; the grid needs "
                                  f"{end / sr:.3f} s (file truncated or grid wrong)")
        trials.append(Trial(name=f, condition=str(r.get("condition", "all")),
                            trial=str(r.get("trial", len(trials) + 1)), path=root / f,
                            n_frames=n_frames, bounds=bounds, file_onset=onset))
    if not trials:
        raise CheckInputError(f"{root / 'trials.tsv'}: no first-hearing rows (repetition == 1)")
    assert n_units is not None
    if n_units != grid.analysed_units:
        raise CheckInputError(f"{root / 'trials.tsv'}: {n_units} analysed units per trial, the "
                              f"manifest's rate table says {grid.analysed_units}; the build "
                              "folder is inconsistent: rebuild the set")
    design = Design(grid=grid, mode="build", source=".")
    return design, trials


def load_files(paths: Sequence[str | Path], *, unit_duration: float,
               levels: Sequence[tuple[str, int]], offset: float = 0.0,
               unit_name: str = "unit") -> tuple[Design, list[Trial]]:
    """Read plain WAV files (one trial each) onto the grid starting at ``offset``."""
    if not paths:
        raise CheckInputError("no files given; pass one WAV file per trial")
    try:
        T = float(unit_duration)
    except (TypeError, ValueError) as exc:
        raise CheckInputError(f"--unit-duration: {unit_duration!r} is not a number") from exc
    if not (T > 0 and math.isfinite(T)):
        raise CheckInputError(f"--unit-duration must be > 0 seconds, got {unit_duration!r}")
    if not levels:
        raise CheckInputError("give at least one level above the unit, e.g. --level line=4")
    lv = []
    for name, size in levels:
        if not str(name) or int(size) < 2 or int(size) != size:
            raise CheckInputError(f"--level {name}={size}: a level needs a name and a whole "
                                  "size >= 2 (units of the level below per group)")
        lv.append((str(name), int(size)))
    if not (offset >= 0 and math.isfinite(offset)):
        raise CheckInputError(f"--offset must be >= 0 seconds, got {offset!r}")
    top_units = int(np.prod([s for _, s in lv]))
    lens = []
    sr0 = None
    problems = []
    for p in paths:  # every file is probed before any error: one bad file hides no other
        try:
            n_frames, sr = _probe_wav(Path(p))
        except CheckInputError as exc:
            problems.append(str(exc))
            continue
        if sr0 is None:
            sr0 = sr
        elif sr != sr0:
            problems.append(f"{p}: sample rate {sr} Hz, {paths[0]} has {sr0} Hz; resample "
                            "to one rate first")
        lens.append(n_frames)
    if problems:
        head = f"{len(problems)} of {len(paths)} file(s) cannot be checked:\n  " if len(problems) > 1 else ""
        raise CheckInputError(head + "\n  ".join(problems))
    assert sr0 is not None
    off = _sample(offset, sr0)
    shortest = int(np.argmin(lens))
    top_samples = top_units * T * sr0
    n_top = int(math.floor((lens[shortest] - off) / top_samples + 1e-9)) if lens[shortest] > off else 0
    if n_top < 1:
        raise CheckInputError(
            f"{paths[shortest]}: {lens[shortest] / sr0:.3f} s after the {offset} s offset does not "
            f"hold one {lv[-1][0]} cycle ({top_units} x {T} s = {top_units * T:.3f} s); check "
            "--unit-duration, --level and --offset")
    for p, n in zip(paths, lens):
        if int(math.floor((n - off) / top_samples + 1e-9)) != n_top:
            raise CheckInputError(
                f"{p}: {n / sr0:.3f} s, but {paths[shortest]} is {lens[shortest] / sr0:.3f} s; "
                f"trials of unequal length (by a whole {lv[-1][0]} cycle or more) would be "
                "analysed over different spans: trim them to one length or check them separately")
    nu = n_top * top_units
    bounds = np.array([off + unit_start(k, unit_duration=T, sr=sr0) for k in range(nu + 1)],
                      dtype=np.int64)
    trials = [Trial(name=str(p), condition="all", trial=str(i + 1), path=Path(p), n_frames=n,
                    bounds=bounds, file_onset=offset) for i, (p, n) in enumerate(zip(paths, lens))]
    try:
        grid = grid_from_numbers(unit_duration=T, levels=lv, sr=sr0, n_top_groups=n_top,
                                 unit_name=unit_name)
    except GridError as exc:
        raise CheckInputError(str(exc)) from None
    design = Design(grid=grid, mode="files",
                    source=", ".join(str(p) for p in paths[:3]) + (" ..." if len(paths) > 3 else ""))
    return design, trials


# ---------------------------------------------------------------------------------------------
# Per-trial measurement
# ---------------------------------------------------------------------------------------------
@dataclass
class Measured:
    """What the check keeps of one trial (internal): small arrays only."""

    name: str
    condition: str
    trial: str
    env: dict[str, np.ndarray]  # envelope over the window, env_sr
    env_bounds: np.ndarray  # unit boundaries in envelope samples, window-relative
    feats: np.ndarray  # (n_units, n_features)
    active: np.ndarray  # (n_units, 2) active start/end, s from the unit start (NaN if silent)
    energy_ms: list[np.ndarray]  # per unit: cumulative energy at 1 ms steps (for gap planting)
    join_db: np.ndarray  # (n_units,) boundary score before each unit, dB (NaN: no audio before)
    join_time: np.ndarray  # (n_units,) s from file start
    unit_len: np.ndarray  # (n_units,) samples


def _centroid(x: np.ndarray, sr: int) -> float:
    if x.size < 8:
        return float("nan")
    p = np.abs(np.fft.rfft(x * np.hanning(x.size))) ** 2
    tot = float(p.sum())
    if tot <= 0:
        return float("nan")
    f = np.fft.rfftfreq(x.size, 1.0 / sr)
    return float(np.sum(f * p) / tot)


def measure_trial(tr: Trial, *, design: Design, env_sr: float) -> Measured:
    """Envelopes over the window, per-unit features and join scores of one trial."""
    sr = design.sr
    x = tr.load()
    b = tr.bounds
    w0, w1 = int(b[0]), int(b[-1])
    n_env = int(round(design.window * env_sr))
    e0 = int(round(w0 * env_sr / sr))
    env = {}
    for kind, fn in (("broadband", broadband_envelope), ("auditory", auditory_envelope)):
        full = fn(x, sr=sr, env_sr=env_sr)
        seg = full[e0:e0 + n_env]
        if seg.size < n_env:
            seg = np.pad(seg, (0, n_env - seg.size), mode="edge")
        env[kind] = seg
    env_bounds = np.round((b - w0) * env_sr / sr).astype(np.int64)
    # Praat F0 once per file; frames assigned to units.
    seg_lo = max(0, w0 - int(0.05 * sr))
    seg_hi = min(x.size, w1 + int(0.05 * sr))
    seg = x[seg_lo:seg_hi]
    if sr > F0_SR:  # Praat's autocorrelation costs grow with the rate; 8 kHz changes F0 < 0.1 st
        import soxr

        times, f0 = praat_f0(soxr.resample(seg, sr, F0_SR, quality="HQ"), sr=F0_SR)
    else:
        times, f0 = praat_f0(seg, sr=sr)
    times = times + seg_lo / sr
    n = b.size - 1
    feats = np.full((n, len(FEATURES)), np.nan)
    active = np.full((n, 2), np.nan)
    energy_ms: list[np.ndarray] = []
    d = np.abs(np.diff(x, prepend=x[0]))
    hw = max(1, int(round(JOIN_HALF_WIDTH * sr)))
    interior_peaks = np.full(n, np.nan)
    boundary_peaks = np.full(n, np.nan)
    ms = max(1, int(round(0.001 * sr)))
    # Features over the same number of samples in every slot: the rounding rule makes slots
    # floor(T*fs) or ceil(T*fs) long, and a one-sample difference by position is not a cue.
    n_feat = int(np.min(np.diff(b)))
    for k in range(n):
        s, e = int(b[k]), int(b[k + 1])
        u = x[s:s + n_feat]
        feats[k, 0] = rms_dbfs(u)
        ab = active_bounds(u, sr=sr)
        if ab is not None:
            active[k] = (ab[0] / sr, ab[1] / sr)
            feats[k, 1] = (ab[1] - ab[0]) / sr * 1000.0
            feats[k, 3] = _centroid(u[ab[0]:ab[1]], sr)
            feats[k, 4] = steepest_rise_time(u, sr=sr) * 1000.0
        else:
            feats[k, 1] = 0.0
        if times.size:
            m = (times >= s / sr + 0.005) & (times < e / sr - 0.005)
            v = f0[m]
            v = v[np.isfinite(v)]
            if v.size >= 3:
                feats[k, 2] = float(semitones(float(np.median(v)), F0_REF))
        c = np.concatenate([[0.0], np.cumsum(u * u)])
        energy_ms.append(c[np.minimum(np.arange(0, u.size + ms, ms), u.size)])
        if e - s > 4 * hw:
            interior_peaks[k] = float(np.max(d[s + hw:e - hw]))
        if s - hw >= 1:
            boundary_peaks[k] = float(np.max(d[s - hw:s + hw]))
    ref = float(np.nanmedian(interior_peaks)) if np.any(np.isfinite(interior_peaks)) else 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        join_db = 20.0 * np.log10(boundary_peaks / ref) if ref > 0 else np.full(n, np.nan)
    join_db = np.where(np.isfinite(join_db) | np.isnan(boundary_peaks), join_db, -200.0)
    return Measured(name=tr.name, condition=tr.condition, trial=tr.trial, env=env,
                    env_bounds=env_bounds, feats=feats, active=active, energy_ms=energy_ms,
                    join_db=join_db, join_time=b[:-1] / sr, unit_len=np.full(n, n_feat))


# ---------------------------------------------------------------------------------------------
# Tests on a measured set
# ---------------------------------------------------------------------------------------------
def spectra_of(ms: list[Measured], *, kind: str, design: Design, env_sr: float,
               envs: list[np.ndarray] | None = None) -> np.ndarray:
    """Complex spectra (n_trials, n_bins) of one envelope kind over the window."""
    X = np.stack(envs if envs is not None else [m.env[kind] for m in ms])
    X = X - X.mean(axis=1, keepdims=True)
    return vs.dft_bins(X, sr=env_sr, window=design.window, n_bins=design.grid.n_bins_needed())


def spectral_rows(Z: np.ndarray, *, design: Design, condition: str, kind: str) -> list[dict]:
    """Evoked, ITPC and T2circ rows (plus SNR for comparison) for one condition and envelope."""
    n_total = Z.shape[1]
    excl = design.grid.structure_bins(n_total)
    ev = Z.mean(axis=0)
    rows = []
    for tb in design.grid.target_bins():
        level, k, h = tb.level, tb.bin, tb.harmonic
        nb = vs.neighbour_bins(k, n_total=n_total, exclude=excl)
        e = vs.evoked_test(ev, k=k, neighbours=nb)
        ray = vs.rayleigh(Z[:, k])
        t2 = vs.t2circ(Z[:, k])
        snr = vs.magnitude_snr_db(Z, k=k, neighbours=nb)
        freq = k / design.window
        base = {"condition": condition, "envelope": kind, "level": level, "freq": freq,
                "bin": int(k), "harmonic": int(h), "n_trials": int(Z.shape[0]),
                "snr_db": snr}
        rows.append({**base, "measure": "evoked", "value": e.ratio, "z": e.z,
                     "amplitude": e.amplitude, "stat": e.F, "p": e.p})
        rows.append({**base, "measure": "itpc", "value": ray.r, "stat": ray.z, "p": ray.p})
        rows.append({**base, "measure": "t2circ", "value": t2.T2, "stat": t2.F, "p": t2.p})
    return rows


def unit_rate_row(Z: np.ndarray, *, design: Design, condition: str, kind: str) -> dict:
    n_total = Z.shape[1]
    k = design.grid.unit_bin
    nb = vs.neighbour_bins(k, n_total=n_total, exclude=design.grid.structure_bins(n_total))
    e = vs.evoked_test(Z.mean(axis=0), k=k, neighbours=nb)
    ray = vs.rayleigh(Z[:, k])
    ok = bool(e.ratio >= 3.0 and ray.r >= 0.5)
    return {"condition": condition, "envelope": kind, "freq": k / design.window,
            "ratio": e.ratio, "itpc": ray.r, "p": e.p, "clear": ok}


def position_tables(feats: np.ndarray, *, design: Design, level_index: int) -> np.ndarray:
    """Blocks x positions table(s) for a level: feats (n_trials, n_units, F) -> (B, s, F).

    For level L, position = which element of the L-group a unit is in; blocks are
    (trial, L-group, position below L), so a faster level's pattern cancels out.
    """
    sizes = [s for _, s in design.levels]
    below = int(np.prod(sizes[:level_index])) if level_index else 1
    s = sizes[level_index]
    per_group = below * s
    n_tr, n_u = feats.shape[:2]
    g = n_u // per_group
    a = feats[:, : g * per_group].reshape(n_tr, g, s, below, *feats.shape[2:])
    a = np.moveaxis(a, 2, 3)  # (n_tr, g, below, s, ...)
    return a.reshape(n_tr * g * below, s, *feats.shape[2:])


def _quantise(F: np.ndarray, res: float) -> np.ndarray:
    return np.where(np.isfinite(F), np.round(F / res) * res, F)


def feature_rows(F: np.ndarray, *, design: Design, condition: str) -> list[dict]:
    """Friedman test of every feature across positions, for every level above the unit.

    Features are rounded to :data:`FEATURE_RESOLUTION` first: smaller differences are not
    measured, so exact copies of a token tie instead of being ordered by numerical noise.
    """
    rows = []
    F = np.stack([_quantise(F[..., i], FEATURE_RESOLUTION[f]) for i, (f, _) in
                  enumerate(FEATURES)], axis=-1)
    for li, (level, size) in enumerate(design.levels):
        tab = position_tables(F, design=design, level_index=li)
        for fi, (fname, unit) in enumerate(FEATURES):
            res = vs.friedman(tab[:, :, fi])
            med = np.asarray(res.medians)
            diff = float(np.nanmax(med) - np.nanmin(med)) if np.any(np.isfinite(med)) else float("nan")
            rows.append({"condition": condition, "level": level, "feature": fname,
                         "unit": unit, "test": res.test, "stat": res.statistic, "df": res.df,
                         "p": res.p, "value": res.effect, "effect": "kendall_w",
                         "n_blocks": res.n_blocks, "largest_difference": diff,
                         "position_medians": [float(v) for v in med],
                         "measure": "feature"})
    return rows


def join_rows(J: np.ndarray, *, design: Design, condition: str) -> list[dict]:
    rows = []
    for li, (level, size) in enumerate(design.levels):
        tab = position_tables(J[:, :, None], design=design, level_index=li)[:, :, 0]
        tab = _quantise(np.where(np.isfinite(tab), np.maximum(tab, JOIN_FLOOR_DB), tab), 0.1)
        res = vs.friedman(tab)
        med = np.asarray(res.medians)
        rows.append({"condition": condition, "level": level, "feature": "join_step_db",
                     "unit": "dB", "test": res.test, "stat": res.statistic, "df": res.df,
                     "p": res.p, "value": res.effect, "effect": "kendall_w",
                     "n_blocks": res.n_blocks,
                     "largest_difference": float(np.nanmax(med) - np.nanmin(med))
                     if np.any(np.isfinite(med)) else float("nan"),
                     "position_medians": [float(v) for v in med], "measure": "joins"})
    return rows


@dataclass
class SetData:
    """A measured set, grouped by condition (internal)."""

    design: Design
    env_sr: float
    conditions: list[str]
    by_cond: dict[str, list[Measured]]

    def feats(self, cond: str) -> np.ndarray:
        return np.stack([m.feats for m in self.by_cond[cond]])

    def joins(self, cond: str) -> np.ndarray:
        return np.stack([m.join_db for m in self.by_cond[cond]])


def run_family(data: SetData, *, envs: dict[tuple[str, str], list[np.ndarray]] | None = None,
               feats: dict[str, np.ndarray] | None = None) -> tuple[list[dict], list[dict], list[dict]]:
    """All family tests (spectral, feature, join rows) with raw p-values.

    ``envs`` / ``feats`` override the measured envelopes / features (for planted cues).
    """
    spec, frows, jrows = [], [], []
    for c in data.conditions:
        ms = data.by_cond[c]
        for kind in ENVELOPES:
            e = envs.get((c, kind)) if envs else None
            Z = spectra_of(ms, kind=kind, design=data.design, env_sr=data.env_sr, envs=e)
            spec += spectral_rows(Z, design=data.design, condition=c, kind=kind)
        F = feats[c] if feats is not None else data.feats(c)
        frows += feature_rows(F, design=data.design, condition=c)
        jrows += join_rows(data.joins(c), design=data.design, condition=c)
    return spec, frows, jrows


def apply_holm(rows: list[dict], alpha: float) -> None:
    adj = vs.holm([r["p"] for r in rows])
    for r, a in zip(rows, adj):
        r["p_holm"] = float(a) if np.isfinite(a) else 1.0
        r["significant"] = bool(np.isfinite(a) and a < alpha)


def _test_id(r: dict) -> tuple:
    return (r["condition"], r.get("envelope", ""), r["level"], r.get("bin", -1),
            r["measure"], r.get("feature", ""))


def evaluate(data: SetData, *, alpha: float, **over) -> tuple[list[dict], list[dict], list[dict]]:
    spec, frows, jrows = run_family(data, **over)
    apply_holm(spec + frows + jrows, alpha)
    return spec, frows, jrows


# ---------------------------------------------------------------------------------------------
# Sensitivity: cues planted in the envelope and feature domains
# ---------------------------------------------------------------------------------------------
LADDERS = {
    "level_step": (0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 4.0, 8.0),
    "gap": (2.0, 5.0, 10.0, 20.0, 40.0, 80.0),
    "pitch_step": (0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 4.0),
}
CUE_UNIT = {"level_step": "dB", "gap": "ms", "pitch_step": "semitones"}
CUE_WHERE = {"level_step": "first", "gap": "last", "pitch_step": "last"}


def _unit_targets(design: Design, level_index: int, where: str) -> np.ndarray:
    sizes = [s for _, s in design.levels]
    per = int(np.prod(sizes[: level_index + 1]))
    k = np.arange(design.n_units)
    return (k % per == 0) if where == "first" else (k % per == per - 1)


def plant(data: SetData, cue: str, size: float, *, level_index: int = 0):
    """Envelopes and feature tables of the set with a cue planted (see module docs).

    * level_step: units first in each group of the level are ``size`` dB louder: broadband
      envelope x g, auditory envelope x g**COMPRESSION, RMS + size.
    * gap: the last ``size`` ms of the active part of each group's last unit are silenced:
      in both envelopes the unit's end (and the decay after it) moves forward by ``size``;
      active duration - size; RMS recomputed without the removed energy (1-ms energy profile).
    * pitch_step: the last unit of each group has its F0 raised by ``size`` semitones: F0 +
      size; envelopes unchanged (a perfect pitch shifter is assumed).
    """
    d = data.design
    sr_e = data.env_sr
    tgt = _unit_targets(d, level_index, CUE_WHERE[cue])
    idx = np.flatnonzero(tgt)
    envs: dict[tuple[str, str], list[np.ndarray]] = {}
    feats: dict[str, np.ndarray] = {}
    for c in data.conditions:
        ms = data.by_cond[c]
        F = data.feats(c).copy()
        e_bb, e_au = [], []
        for ti, m in enumerate(ms):
            eb = m.env["broadband"].copy()
            ea = m.env["auditory"].copy()
            if cue == "level_step":
                g = 10.0 ** (size / 20.0)
                for k in idx:
                    sl = slice(m.env_bounds[k], m.env_bounds[k + 1])
                    eb[sl] *= g
                    ea[sl] *= g ** COMPRESSION
                F[ti, idx, 0] += size
            elif cue == "gap":
                for k in idx:
                    a0, a1 = m.active[k]
                    if not np.isfinite(a1):
                        continue
                    cut = max(a0, a1 - size / 1000.0)
                    s0, s1 = int(m.env_bounds[k]), int(m.env_bounds[k + 1])
                    j = s0 + int(round(cut * sr_e))
                    gi = int(round((a1 - cut) * sr_e))
                    if gi > 0 and j < s1:
                        for arr in (eb, ea):
                            seg = arr[j:s1].copy()
                            # the token's end moves forward by the gap; its decay follows
                            arr[j:s1 - gi] = seg[gi:]
                            arr[s1 - gi:s1] = seg[-1]
                    F[ti, k, 1] = max(0.0, (cut - a0) * 1000.0)
                    en = m.energy_ms[k]
                    grid = np.arange(en.size)
                    removed = np.interp(a1 * 1000.0, grid, en) - np.interp(cut * 1000.0, grid, en)
                    kept = float(en[-1] - removed)
                    F[ti, k, 0] = 10.0 * np.log10(kept / int(m.unit_len[k])) if kept > 0 else -np.inf
            else:  # pitch_step
                F[ti, idx, 2] += size
            e_bb.append(eb)
            e_au.append(ea)
        envs[(c, "broadband")] = e_bb
        envs[(c, "auditory")] = e_au
        feats[c] = F
    return envs, feats


def sensitivity(data: SetData, *, alpha: float, level_index: int = 0,
                cues: Iterable[str] = ("level_step", "gap", "pitch_step"),
                n_bisect: int = 3) -> list[dict]:
    """Smallest planted cue of each kind that the family flags (ladder + bisection)."""
    base_spec, base_f, base_j = evaluate(data, alpha=alpha)
    already = {_test_id(r) for r in base_spec + base_f + base_j if r["significant"]}
    level = data.design.levels[level_index][0]
    slot_ms = data.design.unit_duration * 1000.0
    out = []
    for cue in cues:
        t0 = time.perf_counter()
        n_eval = 0
        cache: dict[float, list[dict]] = {}

        def hits_at(size: float) -> list[dict]:
            nonlocal n_eval
            if size not in cache:
                n_eval += 1
                envs, feats = plant(data, cue, size, level_index=level_index)
                rows = sum(evaluate(data, alpha=alpha, envs=envs, feats=feats), [])
                hits = [r for r in rows if r["significant"] and _test_id(r) not in already]
                cache[size] = sorted(hits, key=lambda r: r["p_holm"])
            return cache[size]

        ladder = [s for s in LADDERS[cue] if cue != "gap" or s < slot_ms]

        def search(keep) -> tuple[float | None, float, list[str]]:
            lo, hi, hi_hits = 0.0, None, []
            for s in ladder:
                h = [r for r in hits_at(s) if keep(r)]
                if h:
                    hi, hi_hits = s, h
                    break
                lo = s
            if hi is not None and lo > 0:  # never below the ladder's first rung
                for _ in range(n_bisect):
                    mid = math.sqrt(lo * hi)
                    h = [r for r in hits_at(mid) if keep(r)]
                    if h:
                        hi, hi_hits = mid, h
                    else:
                        lo = mid
            return hi, lo, [_describe(r) for r in hi_hits[:3]]

        hi, lo, by = search(lambda r: True)
        rec = {"cue": cue, "level": level, "where": CUE_WHERE[cue], "unit": CUE_UNIT[cue],
               "smallest_detected": hi, "largest_missed": lo if lo > 0 else None,
               "at_floor": bool(hi is not None and lo == 0), "largest_tried": ladder[-1],
               "detected_by": by}
        if cue == "pitch_step":  # planted in F0 only: the envelopes cannot show it
            rec["envelope_only"] = None
        else:
            ehi, elo, _ = search(lambda r: r["measure"] in MEASURES)
            rec["envelope_only"] = ehi
            rec["envelope_only_at_floor"] = bool(ehi is not None and elo == 0)
        rec["evaluations"] = n_eval
        rec["seconds"] = time.perf_counter() - t0
        out.append(rec)
    return out


def _describe(r: dict) -> str:
    if r["measure"] in ("feature", "joins"):
        return f"{r['condition']}: {r['feature']} by position in {r['level']}"
    return f"{r['condition']}: {r['envelope']} {r['measure']} at {r['freq']:g} Hz"


# ---------------------------------------------------------------------------------------------
# Entry points
# ---------------------------------------------------------------------------------------------
def _measure_all(design: Design, trials: list[Trial], *, progress: bool) -> SetData:
    from tqdm.auto import tqdm

    env_sr = choose_env_sr(design.unit_duration)
    by_cond: dict[str, list[Measured]] = {}
    for tr in tqdm(trials, desc="check: measuring", unit="trial", disable=not progress):
        by_cond.setdefault(tr.condition, []).append(measure_trial(tr, design=design, env_sr=env_sr))
    for c, ms in by_cond.items():
        if len(ms) < 2:
            raise CheckInputError(f"condition {c!r}: {len(ms)} trial; the phase statistics need "
                                  "at least 2 trials per condition (10 or more for useful power)")
        if len(ms) < 10:
            log.warning("condition %r has %d trials: the check has little power", c, len(ms))
    return SetData(design=design, env_sr=env_sr, conditions=sorted(by_cond), by_cond=by_cond)


def _run(design: Design, trials: list[Trial], *, alpha: float, sensitivity_on: bool,
         progress: bool, sensitivity_level: int | None = None):
    if not 0 < alpha < 0.5:
        raise CheckInputError(f"alpha must be in (0, 0.5), got {alpha!r}")
    t0 = time.perf_counter()
    data = _measure_all(design, trials, progress=progress)
    t1 = time.perf_counter()
    spec, frows, jrows = evaluate(data, alpha=alpha)
    unit_rows, plots, warnings = [], {}, []
    for c in data.conditions:
        for kind in ENVELOPES:
            Z = spectra_of(data.by_cond[c], kind=kind, design=design, env_sr=data.env_sr)
            unit_rows.append(unit_rate_row(Z, design=design, condition=c, kind=kind))
            ray = vs.rayleigh(Z, axis=0)
            plots[(c, kind)] = {"freq": np.arange(Z.shape[1]) / design.window,
                                "evoked": np.abs(Z.mean(axis=0)),
                                "mean_mag": np.abs(Z).mean(axis=0), "itpc": ray.r}
        if not any(u["clear"] for u in unit_rows if u["condition"] == c):
            best = max((u for u in unit_rows if u["condition"] == c), key=lambda u: u["ratio"])
            raise CheckInputError(
                f"condition {c!r}: no clear peak at the unit rate {1 / design.unit_duration:g} Hz "
                f"(ratio to neighbours {best['ratio']:.2f}, ITPC {best['itpc']:.2f}); the grid does "
                "not match the audio: check the unit duration, the offset and the files")
    joins_summary = _join_summary(data)
    if joins_summary["n_flagged"]:
        w = joins_summary["worst"]
        warnings.append(
            f"{joins_summary['n_flagged']} of {joins_summary['n_boundaries']} joins have a "
            f"click-like step (largest sample step above the median unit's own); worst: "
            f"{w['file']} (trial {w['trial']}, {w['condition']}) at {w['time']:.4f} s, "
            f"{w['score_db']:+.1f} dB: listen there and fade the join")
    t2 = time.perf_counter()
    sens = None
    if sensitivity_on:
        levels = (range(len(design.levels)) if sensitivity_level is None
                  else [sensitivity_level])
        sens = [row for li in levels for row in sensitivity(data, alpha=alpha, level_index=li)]
    t3 = time.perf_counter()
    feats_plot = {c: data.feats(c) for c in data.conditions}
    audio_s = sum(t.n_frames for t in trials) / design.sr
    design_d = {
        "mode": design.mode, "source": design.source, "sample_rate": design.sr,
        "unit": design.unit_name, "unit_duration": design.unit_duration,
        "levels": [{"name": n, "units_per_group": u, "rate": r} for n, u, r in design.rates],
        "window": design.window, "resolution": 1.0 / design.window,
        "analysed_units": design.n_units, "env_sr": data.env_sr,
        "conditions": {c: len(data.by_cond[c]) for c in data.conditions},
        "files": [m.name for c in data.conditions for m in data.by_cond[c]],
        "audio_seconds": audio_s,
    }
    timings = {"measure": t1 - t0, "tests": t2 - t1, "sensitivity": t3 - t2, "total": t3 - t0}
    location = trials[0].path.parent.parent if design.mode == "build" and trials[0].path else None
    return CheckReport(alpha=alpha, design=design_d, location=str(location or design.source), unit_rate=tuple(unit_rows),
                       spectral=tuple(spec), features=tuple(frows), joins=tuple(jrows),
                       join_summary=joins_summary, sensitivity=None if sens is None else tuple(sens),
                       warnings=tuple(warnings), timings=timings,
                       _plots={"spectra": plots, "features": feats_plot,
                               "joins": {c: data.joins(c) for c in data.conditions}})


def _join_summary(data: SetData) -> dict:
    allj = []
    for c in data.conditions:
        for m in data.by_cond[c]:
            for k in range(m.join_db.size):
                v = m.join_db[k]
                if np.isfinite(v):
                    allj.append((float(v), c, m.name, m.trial, float(m.join_time[k]), k))
    allj.sort(key=lambda t: -t[0])
    def rec(t):
        return {"score_db": t[0], "condition": t[1], "file": t[2], "trial": t[3],
                "time": t[4], "unit_index": t[5]}
    flagged = [rec(t) for t in allj if t[0] > JOIN_FLAG_DB]
    return {"worst": rec(allj[0]) if allj else None, "flagged": flagged[:20],
            "n_flagged": len(flagged), "n_boundaries": len(allj),
            "threshold_db": JOIN_FLAG_DB,
            "median_db": float(np.median([t[0] for t in allj])) if allj else None}


def check_build(build_dir: str | Path, *, alpha: float = ALPHA, sensitivity: bool = True,
                progress: bool = True):
    """Check a stimforge build folder for acoustic cues at its structure's rates.

    Parameters
    ----------
    build_dir : path
        Folder with ``manifest.json``, ``trials.tsv``, ``units.tsv`` and ``stimuli/``.
    alpha : float
        Family-wise error rate (Holm over every test of the set).
    sensitivity : bool
        Also estimate the smallest planted cues the set would reveal.
    progress : bool
        Show a progress bar.

    Returns
    -------
    CheckReport

    Raises
    ------
    CheckInputError
        Missing or inconsistent files, or a grid that does not match the audio.
    """
    design, trials = load_build(build_dir)
    return _run(design, trials, alpha=alpha, sensitivity_on=sensitivity, progress=progress)


def check_files(paths: Sequence[str | Path], *, unit_duration: float,
                levels: list[tuple[str, int]], offset: float = 0.0, unit_name: str = "unit",
                alpha: float = ALPHA, sensitivity: bool = True, progress: bool = True):
    """Check plain WAV files (one trial each) on a grid.

    Parameters
    ----------
    paths : list of path
        One file per trial, all at one sample rate.
    unit_duration : float, seconds
        Slot of the lowest unit (e.g. 0.25 for syllables at 4 Hz).
    levels : list of (name, size)
        From the lowest group upwards, e.g. ``[("line", 4), ("pair", 2)]``.
    offset : float, seconds
        Where the grid starts in every file.  The analysed part is the largest whole number
        of top-level cycles that fits in the shortest file.

    Returns
    -------
    CheckReport
    """
    design, trials = load_files(paths, unit_duration=unit_duration, levels=levels,
                                offset=offset, unit_name=unit_name)
    return _run(design, trials, alpha=alpha, sensitivity_on=sensitivity, progress=progress)


def check(source: str | Path | Sequence[str | Path], *, unit_duration: float | None = None,
          levels: list[tuple[str, int]] | None = None, offset: float = 0.0,
          alpha: float = ALPHA, sensitivity: bool = True, progress: bool = True):
    """Check a build folder, or plain WAV files on a grid given by ``unit_duration``/``levels``.

    ``check("build/my_set")`` is :func:`check_build`; ``check(["a.wav", "b.wav"],
    unit_duration=0.25, levels=[("word", 2)])`` is :func:`check_files`.
    """
    if isinstance(source, (str, Path)) and Path(source).is_dir():
        if unit_duration is not None or levels is not None:
            raise CheckInputError(f"{source}: a build folder carries its own grid; do not pass "
                                  "unit_duration or levels with it")
        return check_build(source, alpha=alpha, sensitivity=sensitivity, progress=progress)
    paths = [source] if isinstance(source, (str, Path)) else list(source)
    if unit_duration is None or not levels:
        raise CheckInputError("plain WAV files need the grid: pass unit_duration (seconds) and "
                              "levels, e.g. levels=[('word', 2)]")
    return check_files(paths, unit_duration=unit_duration, levels=levels, offset=offset,
                       alpha=alpha, sensitivity=sensitivity, progress=progress)

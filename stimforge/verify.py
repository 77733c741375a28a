"""The acoustic-leak checker: does a stimulus set carry a cue at the rates of its structure?

Two entry points, one pipeline:

* :func:`check_build` reads a stimforge build folder (``manifest.json``, ``trials.tsv``,
  ``units.tsv``, ``stimuli/*.wav``);
* :func:`check_files` reads plain WAV files (one trial each) on a grid given by the caller.

Both return a :class:`~stimforge.verify_report.CheckReport`.  What is computed, and why:

0. The inputs must agree before anything is tested: a build folder's tables with its
   manifest and with each other (analysis onsets, unit onsets and durations on the rate
   table's grid), and the grid with the audio (:mod:`stimforge.verify_fit`: no long silence at
   the window's ends, slot boundaries in the quiet joins, no digitally silent trial).  A grid
   that does not fit is an input error (exit 2, with the fix), not a cue.

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
   Praat analyses each trial once (at 8 kHz, 5 ms steps) and each unit takes the median of the
   frames inside its slot: within 0.3 semitone of a Praat analysis of the unit alone (tested).
4. Boundary contrasts (:mod:`stimforge.verify_contrast`): for every level, the first and the
   last unit of every group against the units that differ from it only in that boundary, for
   every feature and the join step; effects in the feature's own unit.
5. Joins: the largest sample step within 2 ms of every unit boundary against the units' own.
6. One Holm family per set (conditions x levels x measures x features x boundaries).
7. Sensitivity: cues planted into copies of the measured set (envelope and feature domains,
   see :func:`plant`), tested by the same family, for every level; the smallest revealed size
   of each, which conditions revealed it, and the same with the cue planted in the intact
   condition only.  The verdict compares them with reference cue sizes: when the set could not
   have revealed one, it says so first and the exit status is 3 ("inconclusive").
8. What drives a cue: every significant feature, boundary or join test gets a breakdown of the
   flagged position by label, token and file (:func:`stimforge.verify_contrast.breakdown`).

Only one trial's audio is in memory at a time (per worker with ``jobs > 1``); what is kept per
trial is small (envelopes at ``env_sr``, a feature table, join scores, a fit summary).

See ``README.md``, section "The acoustic check", for the plain-words version.
"""

from __future__ import annotations

import json
import logging
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np

from . import stats as vs
from .acoustics import FEATURES, praat_f0, semitones
from .audio_io import AudioFileProblem, probe_audio, read_audio, read_tsv, sha256_file
from .defaults import (ALPHA, MAX_JOBS, REFERENCE_GAP_MS, REFERENCE_LEVEL_STEP_DB,
                       REFERENCE_PITCH_STEP_ST)
from .envelopes import (AUDITORY_SR, COMPRESSION, auditory_envelope, broadband_envelope,
                        choose_env_sr, gammatone_bank)
from .errors import CheckInputError, GridError
from .grid import RateTable, checked_levels, grid_from_numbers
from .timing import seconds_to_samples, table_samples, unit_start, window_samples
from .verify_contrast import (BOUNDARIES, aligned_rank_test, boundary_units, breakdown,
                              element_units)
from .verify_fit import TrialFit, estimate_offset, fit_findings, quick_fit, trial_fit
from .verify_report import CheckReport

__all__ = ["check", "check_build", "check_files", "CheckReport", "broadband_envelope",
           "auditory_envelope", "gammatone_bank", "FEATURES", "AUDITORY_SR", "COMPRESSION",
           "REFERENCE_CUES", "estimate_offset"]

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
ACTIVE_THRESHOLD_DB = -30.0  # active part of a unit: within 30 dB of its smoothed peak
#: Reference cue sizes (planted-cue kinds -> size in their unit): the check vouches for a set
#: only if it would have revealed each of them at every level.
REFERENCE_CUES = {"level_step": REFERENCE_LEVEL_STEP_DB, "gap": REFERENCE_GAP_MS,
                  "pitch_step": REFERENCE_PITCH_STEP_ST}


# ---------------------------------------------------------------------------------------------
# Design and trials
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Design:
    """The grid the check works on (internal): a rate table and where it came from."""

    grid: RateTable
    mode: str  # "build" | "files"
    source: str
    kinds: Mapping[str, str] = field(default_factory=dict)  # condition -> kind (build folders)
    offset: float | None = None  # s, the grid start in plain files
    offset_note: str = ""  # what --offset auto chose
    notes: tuple[str, ...] = ()  # warnings found while reading
    recipe: Mapping = field(default_factory=dict)  # the build's recipe (manifest.json)

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
    def sizes(self) -> list[int]:
        return [s for _, s in self.grid.levels]

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
    labels: tuple[str, ...] | None = None  # per analysed unit (build folders)
    tokens: tuple[str, ...] | None = None

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
        log.debug("%s: %d channels, analysed as their mean", path, x.shape[1])
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
        v = float(row[key])
    except (KeyError, TypeError, ValueError) as exc:
        raise CheckInputError(f"{where}: column {key!r} missing or not a number "
                              f"(got {row.get(key)!r})") from exc
    if not math.isfinite(v):
        raise CheckInputError(f"{where}: column {key!r} is {row.get(key)!r}; rebuild the set")
    return v


def _hash_notes(root: Path, manifest: dict, files: Iterable[str]) -> list[str]:
    """Warnings for tables and stimuli whose SHA-256 differs from the manifest's outputs."""
    outputs = manifest.get("outputs") or {}
    if not isinstance(outputs, dict):
        return []
    notes = []
    changed_tables = [n for n in ("trials.tsv", "units.tsv")
                      if n in outputs and (root / n).is_file()
                      and sha256_file(root / n) != outputs[n]]
    if changed_tables:
        notes.append(f"{', '.join(changed_tables)} changed after the build (SHA-256 differs "
                     "from manifest.json's outputs); checked as they are now")
    changed = [f for f in files if f in outputs and (root / f).is_file()
               and sha256_file(root / f) != outputs[f]]
    if changed:
        notes.append(f"{len(changed)} stimulus file(s) changed after the build (SHA-256 differs "
                     f"from manifest.json), e.g. {changed[0]}: checked as they are now; the "
                     "check vouches for these files, not for the build")
    return notes


def _table_problems(root: Path, grid: RateTable, seen: dict[str, tuple[int, dict]],
                    unit_rows: dict[str, list[tuple[int, int, dict]]],
                    level_rows: list[tuple[int, dict]]) -> list[str]:
    """Contradictions between trials.tsv, units.tsv and the manifest's rate table."""
    sr, T = grid.sr, grid.rows[0].period
    unit_name = grid.rows[0].name
    lead_units = grid.units_per_trial - grid.analysed_units
    lead0 = seconds_to_samples(grid.silence_before, sr=sr)
    tol = 1.5 / sr + 2e-6  # half a sample of rounding plus the tables' microseconds
    problems: list[str] = []
    tpath, upath = root / "trials.tsv", root / "units.tsv"
    expect_onset = (lead0 + unit_start(lead_units, unit_duration=T, sr=sr)) / sr
    bad_onset = [(line, f, _num(r, "analysis_onset", f"{tpath} line {line}"))
                 for f, (line, r) in seen.items()
                 if abs(_num(r, "analysis_onset", f"{tpath} line {line}") - expect_onset) > tol]
    if bad_onset:
        line, f, v = bad_onset[0]
        problems.append(
            f"{tpath} line {line} ({f}): analysis_onset {v:.6f} s, but the manifest's rate table "
            f"puts the analysed window at {expect_onset:.6f} s ({grid.silence_before:g} s of "
            f"silence + {lead_units} lead-in {unit_name} units of {T:g} s); {len(bad_onset)} "
            f"file(s) like this: the tables contradict the manifest: rebuild the set (or restore "
            f"trials.tsv)")
    shifted = []
    for f, rows in unit_rows.items():
        if f not in seen:
            continue
        onset = _num(seen[f][1], "analysis_onset", f"{tpath} ({f})")
        for line, idx, r in rows:
            k = idx - lead_units
            want = onset + unit_start(k, unit_duration=T, sr=sr) / sr
            got = _num(r, "onset", f"{upath} line {line}")
            if abs(got - want) > tol:
                shifted.append((f, line, got, want))
                break
    if shifted:
        f, line, got, want = shifted[0]
        problems.append(
            f"{upath} line {line}: {unit_name} onset {got:.6f} s in {f}, but its trials.tsv "
            f"analysis_onset and the grid put it at {want:.6f} s ({got - want:+.4f} s); "
            f"{len(shifted)} file(s) like this: units.tsv contradicts trials.tsv: rebuild the "
            "set (or restore units.tsv)")
    per = {r.name: r.units_per_group for r in grid.rows}
    bad_dur = []
    for line, r in level_rows:
        P = per.get(str(r.get("level")))
        if P is None:
            continue
        try:
            i = int(float(r["index"]))
            d = float(r["duration"])
        except (KeyError, TypeError, ValueError):
            continue
        want = (unit_start(P * (i + 1), unit_duration=T, sr=sr)
                - unit_start(P * i, unit_duration=T, sr=sr)) / sr
        if abs(d - want) > tol:
            bad_dur.append((line, r.get("level"), d, want))
    if bad_dur:
        line, lv, d, want = bad_dur[0]
        problems.append(
            f"{upath} line {line}: a {lv} lasts {d:.6f} s, but on the manifest's rate table it "
            f"is {want:.6f} s long; {len(bad_dur)} row(s) like this: units.tsv contradicts the "
            "manifest: rebuild the set (or restore units.tsv)")
    return problems


def _two_top_cycles(grid: RateTable, *, where: str) -> None:
    """Refuse a window of one top-level cycle: every bin is then a structure bin, none is noise."""
    if grid.top_bin < 2:
        top = grid.rows[-1]
        raise CheckInputError(
            f"{where}: the analysed window ({grid.window:g} s) holds one {top.name} cycle; every "
            "frequency bin is then a multiple of the slowest rate and none is left to measure "
            f"the noise beside the tested rates: use trials of at least two {top.name}s "
            f"({2 * top.period:g} s analysed; trials.groups_per_trial >= 2)")


def load_build(build_dir: str | Path) -> tuple[Design, list[Trial]]:
    """Read a build folder into a design and its distinct trials.

    Refuses (:class:`CheckInputError`) a folder whose tables contradict each other or the
    manifest: analysis onsets off the rate table's grid, unit onsets off their trial's analysis
    onset, durations that are not the grid's; every such problem is named at once.
    """
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
    seen: dict[str, tuple[int, dict[str, str]]] = {}
    kinds: dict[str, str] = {}
    for i, r in enumerate(rows, start=2):
        if str(r.get("repetition", "1")).strip() not in ("1", "1.0", "n/a", ""):
            continue
        f = r.get("stim_file")
        if not f:
            raise CheckInputError(f"{root / 'trials.tsv'} line {i}: empty stim_file")
        seen.setdefault(f, (i, r))
        kinds.setdefault(str(r.get("condition", "all")), str(r.get("kind", "")))
    units_path = root / "units.tsv"
    unit_rows: dict[str, list[tuple[int, int, dict]]] = {}
    level_rows: list[tuple[int, dict]] = []
    if units_path.is_file():
        for line, r in enumerate(_read_tsv(units_path), start=2):
            level_rows.append((line, r))
            if r.get("level") != unit_name or str(r.get("lead_in", "0")).strip() == "1":
                continue
            try:
                idx = int(float(r["index"]))
            except (KeyError, TypeError, ValueError) as exc:
                raise CheckInputError(f"{units_path} line {line}: column 'index' missing or not "
                                      f"a number (got {r.get('index')!r})") from exc
            unit_rows.setdefault(r.get("stim_file", ""), []).append((line, idx, r))
    problems = _table_problems(root, grid, seen, unit_rows, level_rows)
    if problems:
        raise CheckInputError(problems[0] if len(problems) == 1 else
                              f"{len(problems)} contradictions in {root}:\n  "
                              + "\n  ".join(problems))
    window = grid.window
    trials: list[Trial] = []
    n_units = None
    for f, (line, r) in seen.items():
        where = f"{root / 'trials.tsv'} line {line} ({f})"
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
        labels = tokens = None
        if f in unit_rows:
            ons = sorted(unit_rows[f], key=lambda t: t[1])
            starts = [table_samples(_num(r2, "onset", str(units_path)), sr=sr) for _, _, r2 in ons]
            if len(starts) != nu:
                raise CheckInputError(f"{units_path}: {len(starts)} analysed {unit_name} rows "
                                      f"for {f}, expected {nu}; the build folder is inconsistent")
            labels = tuple(str(r2.get("label", "")) for _, _, r2 in ons)
            tokens = tuple(str(r2.get("token", "")) for _, _, r2 in ons)
        else:
            s0 = table_samples(onset, sr=sr)
            starts = [s0 + unit_start(k, unit_duration=T, sr=sr) for k in range(nu)]
        end = table_samples(onset, sr=sr) + unit_start(nu, unit_duration=T, sr=sr)
        bounds = np.array(starts + [end], dtype=np.int64)
        if bounds[-1] > n_frames or bounds[0] < 0 or np.any(np.diff(bounds) <= 0):
            raise CheckInputError(f"{root / f}: {n_frames / sr:.3f} s long; the grid needs "
                                  f"{end / sr:.3f} s (file truncated or grid wrong)")
        trials.append(Trial(name=f, condition=str(r.get("condition", "all")),
                            trial=str(r.get("trial", len(trials) + 1)), path=root / f,
                            n_frames=n_frames, bounds=bounds, file_onset=onset,
                            labels=labels, tokens=tokens))
    if not trials:
        raise CheckInputError(f"{root / 'trials.tsv'}: no first-hearing rows (repetition == 1)")
    assert n_units is not None
    if n_units != grid.analysed_units:
        raise CheckInputError(f"{root / 'trials.tsv'}: {n_units} analysed units per trial, the "
                              f"manifest's rate table says {grid.analysed_units}; the build "
                              "folder is inconsistent: rebuild the set")
    notes = tuple(_hash_notes(root, manifest, seen))
    recipe = manifest.get("recipe") if isinstance(manifest.get("recipe"), dict) else {}
    _two_top_cycles(grid, where=str(mpath))
    design = Design(grid=grid, mode="build", source=".", kinds=kinds, notes=notes,
                    recipe=recipe)
    return design, trials


def _check_offset(offset) -> float:
    try:
        off = float(offset)
    except (TypeError, ValueError):
        raise CheckInputError(f"--offset must be seconds >= 0 or 'auto', got {offset!r}") from None
    if not (off >= 0 and math.isfinite(off)):
        raise CheckInputError(f"--offset must be seconds >= 0 or 'auto', got {offset!r}")
    return off


def load_files(paths: Sequence[str | Path], *, unit_duration: float,
               levels: Sequence[tuple[str, int]], offset: float = 0.0,
               unit_name: str = "unit") -> tuple[Design, list[Trial]]:
    """Read plain WAV files (one trial each) onto the grid starting at ``offset`` seconds."""
    if not paths:
        raise CheckInputError("no files given; pass one WAV file per trial")
    try:
        T, lv = checked_levels(unit_duration, levels)
    except GridError as exc:
        raise CheckInputError(str(exc)) from None
    offset = _check_offset(offset)
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
    off = table_samples(offset, sr=sr0)
    shortest = int(np.argmin(lens))
    top_samples = top_units * T * sr0
    n_top = int(math.floor((lens[shortest] - off) / top_samples + 1e-9)) if lens[shortest] > off else 0
    if n_top < 1 and offset >= lens[shortest] / sr0:
        raise CheckInputError(
            f"{paths[shortest]}: the file is {lens[shortest] / sr0:.3f} s long, so --offset "
            f"{offset:g} s starts the grid after its end; give an offset below "
            f"{lens[shortest] / sr0:.3f} s (where the first unit starts), or --offset auto")
    if n_top < 1:
        raise CheckInputError(
            f"{paths[shortest]}: the {lens[shortest] / sr0 - offset:.3f} s after the "
            f"{offset:g} s offset do not hold one {lv[-1][0]} cycle ({top_units} x {T} s = "
            f"{top_units * T:.3f} s); check --unit-duration, --level and --offset")
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
    _two_top_cycles(grid, where=str(paths[0]))
    design = Design(grid=grid, mode="files", offset=offset,
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
    energy_ms: np.ndarray  # (n_units, n_ms + 1): cumulative energy at 1 ms steps (gap planting)
    join_db: np.ndarray  # (n_units,) boundary score before each unit, dB (NaN: no audio before)
    join_time: np.ndarray  # (n_units,) s from file start
    unit_len: np.ndarray  # (n_units,) samples
    fit: TrialFit | None = None
    labels: tuple[str, ...] | None = None
    tokens: tuple[str, ...] | None = None


def _centroid(x: np.ndarray, sr: int) -> float:
    if x.size < 8:
        return float("nan")
    p = np.abs(np.fft.rfft(x * np.hanning(x.size))) ** 2
    tot = float(p.sum())
    if tot <= 0:
        return float("nan")
    f = np.fft.rfftfreq(x.size, 1.0 / sr)
    return float(np.sum(f * p) / tot)


def moving_average(a: np.ndarray, n: int) -> np.ndarray:
    """Centred moving average of ``n`` samples along the last axis, zero outside.

    The same as ``np.convolve(row, np.ones(n) / n, mode="same")`` for every row (the smoother
    of :func:`stimforge.acoustics.smoothed_envelope`: the window is samples ``i - n//2`` to
    ``i + (n-1)//2``), in O(length) by ``scipy.ndimage.uniform_filter1d`` (tested equal).
    """
    if n <= 1:
        return a
    from scipy.ndimage import uniform_filter1d

    return uniform_filter1d(np.asarray(a, dtype=np.float64), n, axis=-1, mode="constant",
                            cval=0.0)


def unit_features(U: np.ndarray, *, sr: int) -> tuple[np.ndarray, np.ndarray]:
    """RMS, active duration, centroid and steepest-rise latency of stacked slots.

    Parameters
    ----------
    U : ndarray, shape (n_units, n_samples)
        Every slot cut to one length.
    sr : int, Hz

    Returns
    -------
    feats : ndarray, shape (n_units, len(FEATURES))
        As :data:`stimforge.acoustics.FEATURES`; the F0 column is NaN (filled by the caller).
    active : ndarray, shape (n_units, 2)
        Active part's start and end, seconds from the slot start (NaN for silence).

    The same definitions as :func:`stimforge.acoustics.rms_dbfs`, ``active_bounds`` (within
    30 dB of the 5-ms smoothed peak) and ``steepest_rise_time`` (20-ms boxcar twice), computed
    for all slots at once (tested against them).
    """
    n, L = U.shape
    feats = np.full((n, len(FEATURES)), np.nan)
    active = np.full((n, 2), np.nan)
    with np.errstate(divide="ignore"):
        feats[:, 0] = 10.0 * np.log10(np.mean(U * U, axis=1))
    A = np.abs(U)
    e5 = moving_average(A, window_samples(0.005, sr=sr, minimum=1))
    pk = e5.max(axis=1)
    thr = pk * 10.0 ** (ACTIVE_THRESHOLD_DB / 20.0)
    m = (e5 >= thr[:, None]) & (pk[:, None] > 0)
    has = m.any(axis=1)
    first = np.argmax(m, axis=1)
    last = L - np.argmax(m[:, ::-1], axis=1)
    active[has, 0] = first[has] / sr
    active[has, 1] = last[has] / sr
    feats[:, 1] = np.where(has, (last - first) / sr * 1000.0, 0.0)
    n20 = window_samples(0.020, sr=sr, minimum=1)
    e20 = moving_average(moving_average(A, n20), n20)
    rise = (np.argmax(np.diff(e20, axis=1), axis=1) + 0.5) / sr * 1000.0
    ok = has & (e20.max(axis=1) > 0) & (L >= 3)
    feats[:, 4] = np.where(ok, rise, np.nan)
    for k in np.flatnonzero(has):
        feats[k, 3] = _centroid(U[k, first[k]:last[k]], sr)
    return feats, active


def measure_trial(tr: Trial, *, design: Design, env_sr: float) -> Measured:
    """Envelopes over the window, per-unit features, join scores and grid fit of one trial."""
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
    # Praat F0 once per file (8 kHz, 5 ms steps); frames assigned to units.
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
    # Features over the same number of samples in every slot: the rounding rule makes slots
    # floor(T*fs) or ceil(T*fs) long, and a one-sample difference by position is not a cue.
    n_feat = int(np.min(np.diff(b)))
    U = np.stack([x[int(s):int(s) + n_feat] for s in b[:-1]])
    feats, active = unit_features(U, sr=sr)
    if times.size:
        for k in range(n):
            s, e = int(b[k]), int(b[k + 1])
            m = (times >= s / sr + 0.005) & (times < e / sr - 0.005)
            v = f0[m]
            v = v[np.isfinite(v)]
            if v.size >= 3:
                feats[k, 2] = float(semitones(float(np.median(v)), F0_REF))
    ms = window_samples(0.001, sr=sr, minimum=1)
    C = np.concatenate([np.zeros((n, 1)), np.cumsum(U * U, axis=1)], axis=1)
    energy_ms = C[:, np.minimum(np.arange(0, n_feat + ms, ms), n_feat)]
    d = np.abs(np.diff(x, prepend=x[0]))
    hw = window_samples(JOIN_HALF_WIDTH, sr=sr, minimum=1)
    interior_peaks = np.full(n, np.nan)
    boundary_peaks = np.full(n, np.nan)
    for k in range(n):
        s, e = int(b[k]), int(b[k + 1])
        if e - s > 4 * hw:
            interior_peaks[k] = float(np.max(d[s + hw:e - hw]))
        if s - hw >= 1:
            boundary_peaks[k] = float(np.max(d[s - hw:s + hw]))
    ref = float(np.nanmedian(interior_peaks)) if np.any(np.isfinite(interior_peaks)) else 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        join_db = 20.0 * np.log10(boundary_peaks / ref) if ref > 0 else np.full(n, np.nan)
    join_db = np.where(np.isfinite(join_db) | np.isnan(boundary_peaks), join_db, -200.0)
    fit = trial_fit(x, U, sr=sr, window=(w0 / sr, w1 / sr), name=tr.name,
                    condition=tr.condition)
    return Measured(name=tr.name, condition=tr.condition, trial=tr.trial, env=env,
                    env_bounds=env_bounds, feats=feats, active=active, energy_ms=energy_ms,
                    join_db=join_db, join_time=b[:-1] / sr, unit_len=np.full(n, n_feat),
                    fit=fit, labels=tr.labels, tokens=tr.tokens)


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
    sizes = design.sizes
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


def _quantised_features(F: np.ndarray) -> np.ndarray:
    return np.stack([_quantise(F[..., i], FEATURE_RESOLUTION[f]) for i, (f, _) in
                     enumerate(FEATURES)], axis=-1)


def _floored_joins(J: np.ndarray) -> np.ndarray:
    return _quantise(np.where(np.isfinite(J), np.maximum(J, JOIN_FLOOR_DB), J), 0.1)


def _block_means(tab: np.ndarray) -> list[float]:
    """Per position, the mean over the blocks the Friedman test uses (rows without NaN): a
    cue on a minority of a position's units moves the mean when the median stays put."""
    ok = tab[np.all(np.isfinite(tab), axis=1)]
    return [float(v) for v in ok.mean(axis=0)] if ok.size else [float("nan")] * tab.shape[1]


def feature_rows(F: np.ndarray, *, design: Design, condition: str,
                 features: Iterable[str] | None = None) -> list[dict]:
    """Friedman test of every feature across positions, for every level above the unit.

    Features are rounded to :data:`FEATURE_RESOLUTION` first: smaller differences are not
    measured, so exact copies of a token tie instead of being ordered by numerical noise.
    ``features`` restricts the rows to those feature names.
    """
    rows = []
    keep = None if features is None else set(features)
    F = _quantised_features(F)
    for li, (level, size) in enumerate(design.levels):
        tab = position_tables(F, design=design, level_index=li)
        for fi, (fname, unit) in enumerate(FEATURES):
            if keep is not None and fname not in keep:
                continue
            res = vs.friedman(tab[:, :, fi])
            med = np.asarray(res.medians)
            diff = float(np.nanmax(med) - np.nanmin(med)) if np.any(np.isfinite(med)) else float("nan")
            rows.append({"condition": condition, "level": level, "feature": fname,
                         "unit": unit, "test": res.test, "stat": res.statistic, "df": res.df,
                         "p": res.p, "value": res.effect, "effect": "kendall_w",
                         "n_blocks": res.n_blocks, "largest_difference": diff,
                         "position_medians": [float(v) for v in med],
                         "position_means": _block_means(tab[:, :, fi]),
                         "measure": "feature"})
    return rows


def join_rows(J: np.ndarray, *, design: Design, condition: str) -> list[dict]:
    rows = []
    for li, (level, size) in enumerate(design.levels):
        tab = _floored_joins(position_tables(J[:, :, None], design=design, level_index=li)[:, :, 0])
        res = vs.friedman(tab)
        med = np.asarray(res.medians)
        rows.append({"condition": condition, "level": level, "feature": "join_step_db",
                     "position_means": _block_means(tab),
                     "unit": "dB", "test": res.test, "stat": res.statistic, "df": res.df,
                     "p": res.p, "value": res.effect, "effect": "kendall_w",
                     "n_blocks": res.n_blocks,
                     "largest_difference": float(np.nanmax(med) - np.nanmin(med))
                     if np.any(np.isfinite(med)) else float("nan"),
                     "position_medians": [float(v) for v in med], "measure": "joins"})
    return rows


def boundary_rows(F: np.ndarray, J: np.ndarray | None, *, design: Design, condition: str,
                  features: Iterable[str] | None = None) -> list[dict]:
    """Boundary contrasts: each level's first and last unit against the units that differ
    from it only in that boundary (see :mod:`stimforge.verify_contrast`).

    Parameters
    ----------
    F : ndarray, shape (n_trials, n_units, len(FEATURES))
    J : ndarray, shape (n_trials, n_units), or None
        Join scores (dB); None leaves the join-step contrasts out.
    features : iterable of str, optional
        Restrict the rows to these features (``"join_step_db"`` for the joins).
    """
    keep = None if features is None else set(features)
    names = [f for f, _ in FEATURES]
    units = [u for _, u in FEATURES]
    Q = _quantised_features(F)
    cols = [i for i, f in enumerate(names) if keep is None or f in keep]
    if J is not None and (keep is None or "join_step_db" in keep):
        Q = np.concatenate([Q[:, :, cols], _floored_joins(J)[:, :, None]], axis=-1)
        fnames = [names[i] for i in cols] + ["join_step_db"]
        funits = [units[i] for i in cols] + ["dB"]
    else:
        Q = Q[:, :, cols]
        fnames = [names[i] for i in cols]
        funits = [units[i] for i in cols]
    rows: list[dict] = []
    if not fnames:
        return rows
    n_tr, n_u = Q.shape[:2]
    for li, (level, size) in enumerate(design.levels):
        for where in BOUNDARIES:
            tg, ot = boundary_units(design.sizes, li, where, n_u)
            X = np.concatenate([Q[:, tg][:, :, None, :], Q[:, ot]], axis=2)  # (n_tr, G, s, nF)
            X = np.moveaxis(X.reshape(n_tr * tg.size, size, len(fnames)), -1, 0)
            res = aligned_rank_test(X)
            for j, (fname, unit) in enumerate(zip(fnames, funits)):
                eff = float(res["effect"][j])
                rows.append({"condition": condition, "level": level, "feature": fname,
                             "unit": unit, "measure": "boundary", "where": where,
                             "test": "aligned_rank", "stat": float(res["z"][j]),
                             "p": float(res["p"][j]), "value": eff,
                             "effect": "median_difference",
                             "mean_difference": float(res["mean_effect"][j]),
                             "n_blocks": int(res["n_blocks"][j]),
                             "compared_units": int(size - 1),
                             "target_median": float(res["target_median"][j]),
                             "others_median": float(res["others_median"][j]),
                             "largest_difference": abs(eff) if np.isfinite(eff) else eff})
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

    def labels(self, cond: str, what: str = "labels") -> np.ndarray | None:
        vals = [getattr(m, what) for m in self.by_cond[cond]]
        if any(v is None for v in vals):
            return None
        return np.array(vals, dtype=object)

    @property
    def intact(self) -> list[str]:
        """Conditions of kind 'intact' (build folders with more than one condition)."""
        kinds = self.design.kinds
        out = [c for c in self.conditions if kinds.get(c) == "intact"]
        return out if out and len(out) < len(self.conditions) else []


def run_family(data: SetData, *, envs: dict[tuple[str, str], list[np.ndarray]] | None = None,
               feats: dict[str, np.ndarray] | None = None, conditions: Iterable[str] | None = None,
               features: Iterable[str] | None = None, spectral: bool = True,
               joins: bool = True) -> tuple[list[dict], list[dict], list[dict], list[dict]]:
    """Family tests (spectral, feature, boundary, join rows) with raw p-values.

    ``envs`` / ``feats`` override the measured envelopes / features (for planted cues);
    ``conditions``, ``features``, ``spectral`` and ``joins`` restrict what is computed (the
    sensitivity step recomputes only the tests a planted cue can change).
    """
    spec, frows, brows, jrows = [], [], [], []
    conds = data.conditions if conditions is None else list(conditions)
    for c in conds:
        ms = data.by_cond[c]
        if spectral:
            for kind in ENVELOPES:
                e = envs.get((c, kind)) if envs else None
                Z = spectra_of(ms, kind=kind, design=data.design, env_sr=data.env_sr, envs=e)
                spec += spectral_rows(Z, design=data.design, condition=c, kind=kind)
        F = feats[c] if feats is not None and c in feats else data.feats(c)
        frows += feature_rows(F, design=data.design, condition=c, features=features)
        J = data.joins(c) if joins else None
        bfeat = None if features is None else list(features) + (["join_step_db"] if joins else [])
        brows += boundary_rows(F, J, design=data.design, condition=c, features=bfeat)
        if joins:
            jrows += join_rows(data.joins(c), design=data.design, condition=c)
    return spec, frows, brows, jrows


def apply_holm(rows: list[dict], alpha: float) -> None:
    adj = vs.holm([r["p"] for r in rows])
    for r, a in zip(rows, adj):
        r["p_holm"] = float(a) if np.isfinite(a) else 1.0
        r["significant"] = bool(np.isfinite(a) and a < alpha)


def _test_id(r: dict) -> tuple:
    return (r["condition"], r.get("envelope", ""), r["level"], r.get("bin", -1),
            r["measure"], r.get("feature", ""), r.get("where", ""))


def evaluate(data: SetData, *, alpha: float, **over) -> tuple[list[dict], ...]:
    """:func:`run_family` with Holm over all its rows: (spectral, feature, boundary, join)."""
    out = run_family(data, **over)
    apply_holm([r for part in out for r in part], alpha)
    return out


# ---------------------------------------------------------------------------------------------
# What drives a cue
# ---------------------------------------------------------------------------------------------
def _flag_masks(r: dict, design: Design) -> tuple[np.ndarray, np.ndarray, str]:
    """(flagged, compared, what) for a significant feature / boundary / join row.

    A boundary row flags the level's first or last units against the units it was compared
    with; a position row flags the element whose median lies farthest from the others'.
    """
    li = [n for n, _ in design.levels].index(r["level"])
    n = design.n_units
    if r["measure"] == "boundary":
        tg, ot = boundary_units(design.sizes, li, r["where"], n)
        f = np.zeros(n, bool)
        c = np.zeros(n, bool)
        f[tg] = True
        c[ot.ravel()] = True
        return f, c, f"the {r['where']} unit of every {r['level']}"
    # the position whose mean lies farthest from the typical value (the median of the position
    # medians): with a cue on some units of one position, that position
    med = np.asarray(r["position_medians"], dtype=float)
    mean = np.asarray(r.get("position_means") or med, dtype=float)
    typical = float(np.nanmedian(med)) if np.any(np.isfinite(med)) else 0.0
    dev = np.where(np.isfinite(mean), np.abs(mean - typical), -1.0)
    j = int(np.argmax(dev))
    f = element_units(design.sizes, li, j, n)
    c = np.zeros(n, bool)
    for q in range(med.size):
        if q != j:
            c |= element_units(design.sizes, li, q, n)
    below = design.levels[li - 1][0] if li else design.unit_name
    return f, c, f"{below} {j + 1} of {med.size} in every {r['level']}"


def _attach_breakdowns(rows: list[dict], data: SetData) -> None:
    """Add a ``breakdown`` to every significant feature, boundary and join row."""
    names = [f for f, _ in FEATURES]
    for r in rows:
        if not r.get("significant") or r["measure"] not in ("feature", "boundary", "joins"):
            continue
        c = r["condition"]
        V = data.joins(c) if r["feature"] == "join_step_db" else \
            data.feats(c)[:, :, names.index(r["feature"])]
        f, cm, what = _flag_masks(r, data.design)
        nested = []
        if r["measure"] == "boundary":
            d = data.design
            li = [n for n, _ in d.levels].index(r["level"])
            for hi in range(li + 1, len(d.levels)):
                tg, _ = boundary_units(d.sizes, hi, r["where"], d.n_units)
                mask = np.zeros(d.n_units, bool)
                mask[tg] = True
                nested.append((d.levels[hi][0], mask))
        bd = breakdown(V, flagged=f, compared=cm, unit=r["unit"], feature=r["feature"],
                       labels=data.labels(c), tokens=data.labels(c, "tokens"),
                       files=[m.name for m in data.by_cond[c]],
                       build=data.design.mode == "build", nested=nested)
        in_use = _setting_in_use(data.design.recipe, r["feature"]) if bd.get("setting") else None
        if in_use:
            bd["explanation"] += (f"; this build's recipe already sets {in_use}, so the audio "
                                  "differs for another reason (were the stimulus files changed "
                                  "after the build? see the warnings)")
        r["breakdown"] = {"flagged_units": what, **bd}


#: The recipe value that already addresses a feature's cue: (section, key, value).
_IN_USE = {"f0_st": ("pitch", "policy", "flat"), "rise_ms": ("retime", "align", "steepest-rise"),
           "active_ms": ("retime", "backend", "world")}


def _setting_in_use(recipe: Mapping, feature: str) -> str | None:
    """'pitch.policy: flat' when the build's recipe already has the hinted setting."""
    want = _IN_USE.get(feature)
    if not want or not isinstance(recipe, Mapping):
        return None
    sec = recipe.get(want[0])
    return f"{want[0]}.{want[1]}: {want[2]}" if isinstance(sec, Mapping) and \
        sec.get(want[1]) == want[2] else None


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
#: Features a planted cue changes (the rest of the family is reused as measured).
CUE_FEATURES = {"level_step": ("rms_db",), "gap": ("rms_db", "active_ms"),
                "pitch_step": ("f0_st",)}


def _unit_targets(design: Design, level_index: int, where: str) -> np.ndarray:
    sizes = design.sizes
    per = int(np.prod(sizes[: level_index + 1]))
    k = np.arange(design.n_units)
    return (k % per == 0) if where == "first" else (k % per == per - 1)


def plant(data: SetData, cue: str, size: float, *, level_index: int = 0,
          conditions: Iterable[str] | None = None):
    """Envelopes and feature tables of the set with a cue planted (see module docs).

    * level_step: units first in each group of the level are ``size`` dB louder: broadband
      envelope x g, auditory envelope x g**COMPRESSION, RMS + size.
    * gap: the last ``size`` ms of the active part of each group's last unit are silenced:
      in both envelopes the unit's end (and the decay after it) moves forward by ``size``;
      active duration - size; RMS recomputed without the removed energy (1-ms energy profile).
    * pitch_step: the last unit of each group has its F0 raised by ``size`` semitones: F0 +
      size; envelopes unchanged (a perfect pitch shifter is assumed).

    ``conditions`` limits the planting to those conditions (default: all); only they appear in
    the returned dicts.
    """
    d = data.design
    sr_e = data.env_sr
    tgt = _unit_targets(d, level_index, CUE_WHERE[cue])
    idx = np.flatnonzero(tgt)
    envs: dict[tuple[str, str], list[np.ndarray]] = {}
    feats: dict[str, np.ndarray] = {}
    for c in (data.conditions if conditions is None else conditions):
        ms = data.by_cond[c]
        F = data.feats(c).copy()
        e_bb, e_au = [], []
        for ti, m in enumerate(ms):
            if cue == "pitch_step":  # planted in F0 only: the envelopes are not touched
                F[ti, idx, 2] += size
                continue
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
            e_bb.append(eb)
            e_au.append(ea)
        if cue != "pitch_step":
            envs[(c, "broadband")] = e_bb
            envs[(c, "auditory")] = e_au
        feats[c] = F
    return envs, feats


class _Family:
    """The measured family with raw p-values, re-evaluated for planted cues (internal).

    A planted cue changes only some tests (its conditions; the spectral tests unless it is a
    pitch step; the features it touches): those are recomputed, the rest keep their measured
    p-values, and Holm runs over the whole family again.
    """

    def __init__(self, data: SetData, *, alpha: float):
        self.data, self.alpha = data, alpha
        self.rows = [r for part in run_family(data) for r in part]
        self.ids = [_test_id(r) for r in self.rows]
        self.index = {t: i for i, t in enumerate(self.ids)}
        self.p = np.array([r["p"] for r in self.rows], dtype=float)
        adj = vs.holm(self.p)
        self.base_sig = np.isfinite(adj) & (adj < alpha)
        self.n_eval = 0

    def hits(self, cue: str, size: float, *, level_index: int,
             conditions: Sequence[str]) -> list[dict]:
        """Tests revealed by a planted cue (changed tests newly significant), by p_holm."""
        self.n_eval += 1
        envs, feats = plant(self.data, cue, size, level_index=level_index, conditions=conditions)
        new = [r for part in run_family(self.data, envs=envs, feats=feats, conditions=conditions,
                                        features=CUE_FEATURES[cue],
                                        spectral=cue != "pitch_step", joins=False)
               for r in part]
        p = self.p.copy()
        pos = [self.index[_test_id(r)] for r in new]
        p[pos] = [r["p"] for r in new]
        adj = vs.holm(p)
        out = []
        for r, i in zip(new, pos):
            if np.isfinite(adj[i]) and adj[i] < self.alpha and not self.base_sig[i]:
                out.append({**r, "p_holm": float(adj[i]), "significant": True})
        return sorted(out, key=lambda r: r["p_holm"])


def _search(hits_at, ladder: Sequence[float], keep, n_bisect: int) -> dict:
    """Smallest ladder size revealed (then ``n_bisect`` geometric bisections)."""
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
    return {"smallest_detected": hi, "largest_missed": lo if lo > 0 else None,
            "at_floor": bool(hi is not None and lo == 0),
            "detected_by": [_describe(r) for r in hi_hits[:3]],
            "detected_in": sorted({r["condition"] for r in hi_hits})}


def sensitivity(data: SetData, *, alpha: float, level_index: int = 0,
                cues: Iterable[str] = ("level_step", "gap", "pitch_step"),
                n_bisect: int = 3, reference: Mapping[str, float] | None = None,
                family: _Family | None = None, progress=None) -> list[dict]:
    """Smallest planted cue of each kind that the family flags (ladder + bisection).

    For each cue: planted in every condition (``smallest_detected``, ``detected_in``: the
    conditions whose tests revealed it), by the envelope tests alone (``envelope_only``), and
    planted in the intact condition(s) only (``intact``; build folders with an intact
    condition beside others).  ``reference_detected`` says whether the reference size is
    revealed on the figure that counts for the verdict (``vouch_on``: "intact" where there is
    one, else "all").
    """
    fam = family or _Family(data, alpha=alpha)
    ref = dict(REFERENCE_CUES if reference is None else reference)
    level = data.design.levels[level_index][0]
    slot_ms = data.design.unit_duration * 1000.0
    intact = data.intact
    out = []
    for cue in cues:
        t0 = time.perf_counter()
        n0 = fam.n_eval
        caches: dict[tuple, dict[float, list[dict]]] = {}

        def hits_fn(conds: tuple[str, ...]):
            cache = caches.setdefault(conds, {})

            def hits_at(size: float) -> list[dict]:
                if size not in cache:
                    cache[size] = fam.hits(cue, size, level_index=level_index, conditions=conds)
                return cache[size]
            return hits_at

        ladder = [s for s in LADDERS[cue] if cue != "gap" or s < slot_ms]
        every = hits_fn(tuple(data.conditions))
        rec = {"cue": cue, "level": level, "where": CUE_WHERE[cue], "unit": CUE_UNIT[cue],
               **_search(every, ladder, lambda r: True, n_bisect),
               "largest_tried": ladder[-1]}
        if cue == "pitch_step":  # planted in F0 only: the envelopes cannot show it
            rec["envelope_only"] = None
        else:
            env = _search(every, ladder, lambda r: r["measure"] in MEASURES, n_bisect)
            rec["envelope_only"] = env["smallest_detected"]
            rec["envelope_only_at_floor"] = env["at_floor"]
        rec["intact"] = None
        vouch_fn = every
        if intact:
            ih = hits_fn(tuple(intact))
            rec["intact"] = {"conditions": list(intact),
                             **_search(ih, ladder, lambda r: True, n_bisect)}
            vouch_fn = ih
        size = ref.get(cue)
        rec["reference"] = size
        rec["vouch_on"] = "intact" if intact else "all"
        rec["reference_detected"] = None if size is None or (cue == "gap" and size >= slot_ms) \
            else bool(vouch_fn(float(size)))
        rec["evaluations"] = fam.n_eval - n0
        rec["seconds"] = time.perf_counter() - t0
        out.append(rec)
        if progress is not None:
            progress.update(1)
    return out


def _describe(r: dict) -> str:
    if r["measure"] == "boundary":
        return f"{r['condition']}: {r['feature']} of the {r['level']}-{r['where']} unit"
    if r["measure"] in ("feature", "joins"):
        return f"{r['condition']}: {r['feature']} by position in {r['level']}"
    return f"{r['condition']}: {r['envelope']} {r['measure']} at {r['freq']:g} Hz"


def _limits(sens: list[dict] | None) -> list[dict]:
    """Reference cues the set could not have revealed (for the verdict)."""
    out = []
    for s in sens or ():
        if s.get("reference_detected") is False:
            fig = s["intact"] if s.get("vouch_on") == "intact" and s.get("intact") else s
            out.append({"cue": s["cue"], "level": s["level"], "where": s["where"],
                        "unit": s["unit"], "reference": s["reference"],
                        "smallest_detected": fig["smallest_detected"],
                        "largest_tried": s["largest_tried"], "on": s["vouch_on"]})
    return out


# ---------------------------------------------------------------------------------------------
# Entry points
# ---------------------------------------------------------------------------------------------
def _check_jobs(jobs) -> int:
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or not 1 <= jobs <= MAX_JOBS:
        raise CheckInputError(f"--jobs must be a whole number from 1 to {MAX_JOBS}, got {jobs!r}")
    return int(jobs)


def _measure_one(args) -> Measured:
    tr, design, env_sr = args
    return measure_trial(tr, design=design, env_sr=env_sr)


def _measure_all(design: Design, trials: list[Trial], *, progress: bool,
                 jobs: int = 1) -> SetData:
    """Measure every trial (in ``jobs`` worker processes; the results do not depend on it)."""
    from tqdm.auto import tqdm

    jobs = _check_jobs(jobs)
    env_sr = choose_env_sr(design.unit_duration)
    bar = tqdm(total=len(trials), desc="check: measuring", unit="trial", disable=not progress)
    measured: list[Measured] = []
    try:
        if jobs > 1 and len(trials) > 1:
            import multiprocessing as mp
            from concurrent.futures import ProcessPoolExecutor

            # spawn: no fork of a process that may hold threads (tqdm, BLAS)
            with ProcessPoolExecutor(max_workers=min(jobs, len(trials)),
                                     mp_context=mp.get_context("spawn")) as ex:
                for m in ex.map(_measure_one, [(t, design, env_sr) for t in trials]):
                    measured.append(m)
                    bar.update(1)
        else:
            for tr in trials:
                measured.append(measure_trial(tr, design=design, env_sr=env_sr))
                bar.update(1)
    finally:
        bar.close()
    by_cond: dict[str, list[Measured]] = {}
    for m in measured:
        by_cond.setdefault(m.condition, []).append(m)
    for c, ms in by_cond.items():
        if len(ms) < 2:
            raise CheckInputError(f"condition {c!r}: {len(ms)} trial; the phase statistics need "
                                  "at least 2 trials per condition (10 or more for useful power)")
        if len(ms) < 10:
            log.warning("condition %r has %d trials: the check has little power", c, len(ms))
    return SetData(design=design, env_sr=env_sr, conditions=sorted(by_cond), by_cond=by_cond)


def _reference(reference: Mapping[str, float] | None) -> dict[str, float]:
    ref = dict(REFERENCE_CUES)
    for k, v in (reference or {}).items():
        if k not in ref:
            raise CheckInputError(f"reference cue {k!r}: expected one of {sorted(ref)}")
        try:
            fv = float(v)
        except (TypeError, ValueError):
            fv = float("nan")
        if not (fv > 0 and math.isfinite(fv)):
            opt = {"level_step": "--ref-level-step", "gap": "--ref-gap",
                   "pitch_step": "--ref-pitch-step"}[k]
            raise CheckInputError(f"reference cue {k} = {v!r} ({opt}, or the recipe's "
                                  f"check.reference): give a size > 0 {CUE_UNIT[k]}")
        ref[k] = fv
    return ref


def _run(design: Design, trials: list[Trial], *, alpha: float, sensitivity_on: bool,
         progress: bool, sensitivity_level: int | None = None, jobs: int = 1,
         reference: Mapping[str, float] | None = None, suggest=None):
    from tqdm.auto import tqdm

    if not 0 < alpha < 0.5:
        raise CheckInputError(f"alpha must be in (0, 0.5), got {alpha!r}")
    ref = _reference(reference)
    t0 = time.perf_counter()
    data = _measure_all(design, trials, progress=progress, jobs=jobs)
    t1 = time.perf_counter()
    fits = [m.fit for c in data.conditions for m in data.by_cond[c] if m.fit is not None]
    try:
        fit = fit_findings(fits, unit_duration=design.unit_duration, mode=design.mode,
                           offset=design.offset, suggested=None)
    except CheckInputError:
        if design.mode == "files" and suggest is not None:  # again, naming the offset to pass
            fit_findings(fits, unit_duration=design.unit_duration, mode=design.mode,
                         offset=design.offset, suggested=suggest())
        raise
    unit_rows, plots, warnings = [], {}, list(design.notes) + list(fit.pop("warnings"))
    if design.offset_note:
        warnings.insert(0, design.offset_note)
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
    fam = _Family(data, alpha=alpha)
    apply_holm(fam.rows, alpha)
    _attach_breakdowns(fam.rows, data)
    spec = [r for r in fam.rows if r["measure"] in MEASURES]
    frows = [r for r in fam.rows if r["measure"] == "feature"]
    brows = [r for r in fam.rows if r["measure"] == "boundary"]
    jrows = [r for r in fam.rows if r["measure"] == "joins"]
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
        bar = tqdm(total=3 * len(levels), desc="check: sensitivity", unit="cue",
                   disable=not progress)
        try:
            sens = [row for li in levels
                    for row in sensitivity(data, alpha=alpha, level_index=li, reference=ref,
                                           family=fam, progress=bar)]
        finally:
            bar.close()
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
    if design.mode == "files":
        design_d["offset"] = design.offset
        design_d["offset_auto"] = bool(design.offset_note)
    timings = {"measure": t1 - t0, "tests": t2 - t1, "sensitivity": t3 - t2, "total": t3 - t0,
               "jobs": int(jobs)}
    location = trials[0].path.parent.parent if design.mode == "build" and trials[0].path else None
    return CheckReport(alpha=alpha, design=design_d, location=str(location or design.source),
                       unit_rate=tuple(unit_rows), spectral=tuple(spec), features=tuple(frows),
                       boundary=tuple(brows), joins=tuple(jrows), join_summary=joins_summary,
                       sensitivity=None if sens is None else tuple(sens),
                       warnings=tuple(warnings), timings=timings, reference=ref,
                       limits=tuple(_limits(sens)), grid_fit=fit,
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


def _manifest_reference(recipe: Mapping) -> dict[str, float]:
    """Reference cue sizes from the build's recipe (manifest.json -> recipe.check.reference)."""
    try:
        r = (recipe.get("check") or {}).get("reference") or {}
    except AttributeError:
        return {}
    keys = {"level_step_db": "level_step", "gap_ms": "gap", "pitch_step_st": "pitch_step"}
    return {keys[k]: float(v) for k, v in r.items() if k in keys and v is not None}


def check_build(build_dir: str | Path, *, alpha: float = ALPHA, sensitivity: bool = True,
                progress: bool = True, jobs: int = 1,
                reference: Mapping[str, float] | None = None):
    """Check a stimforge build folder for acoustic cues at its structure's rates.

    Parameters
    ----------
    build_dir : path
        Folder with ``manifest.json``, ``trials.tsv``, ``units.tsv`` and ``stimuli/``.
    alpha : float
        Family-wise error rate (Holm over every test of the set).
    sensitivity : bool
        Also estimate the smallest planted cues the set would reveal (and so whether it can
        vouch for the reference cues).
    progress : bool
        Show progress bars (measuring, sensitivity).
    jobs : int >= 1
        Worker processes for measuring; the report does not depend on it.
    reference : mapping, optional
        Reference cue sizes ``{"level_step": dB, "gap": ms, "pitch_step": semitones}``; missing
        keys come from the build's recipe (``check.reference``), then from
        :data:`REFERENCE_CUES`.

    Returns
    -------
    CheckReport
        ``state`` "pass" (exit 0), "cue" (exit 1) or "inconclusive" (exit 3: no cue found,
        but a reference cue could not have been revealed at some level).

    Raises
    ------
    CheckInputError
        Missing or inconsistent files, tables that contradict the manifest or each other, or a
        grid that does not fit the audio.
    """
    design, trials = load_build(build_dir)
    ref = {**_manifest_reference(design.recipe), **dict(reference or {})}
    return _run(design, trials, alpha=alpha, sensitivity_on=sensitivity, progress=progress,
                jobs=jobs, reference=ref)


def check_files(paths: Sequence[str | Path], *, unit_duration: float,
                levels: list[tuple[str, int]], offset: float | str = 0.0,
                unit_name: str = "unit", alpha: float = ALPHA, sensitivity: bool = True,
                progress: bool = True, jobs: int = 1,
                reference: Mapping[str, float] | None = None):
    """Check plain WAV files (one trial each) on a grid.

    Parameters
    ----------
    paths : list of path
        One file per trial, all at one sample rate.
    unit_duration : float, seconds
        Slot of the lowest unit (e.g. 0.25 for syllables at 4 Hz).
    levels : list of (name, size)
        From the lowest group upwards, e.g. ``[("line", 4), ("pair", 2)]``.
    offset : float, seconds, or "auto"
        Where the grid starts in every file.  ``"auto"`` estimates it from the files' first
        acoustic onsets (median, rounded down to 10 ms) and says what it chose in the report's
        warnings.  The analysed part is the largest whole number of top-level cycles that fits
        in the shortest file after the offset.
    jobs : int >= 1
        Worker processes for measuring.
    reference : mapping, optional
        Reference cue sizes (see :func:`check_build`).

    Returns
    -------
    CheckReport

    Raises
    ------
    CheckInputError
        Unreadable or unequal files, or a grid that does not fit the audio (e.g. silence before
        the grid: the message names the offset to pass).
    """
    note = ""
    read = lambda p: _read_wav(p)  # noqa: E731
    if isinstance(offset, str) and offset.strip().lower() == "auto":
        if not paths:
            raise CheckInputError("no files given; pass one WAV file per trial")
        est = estimate_offset(paths, read=read)
        offset = est["offset"]
        note = (f"--offset auto: units appear to start at {offset:.3f} s (median first acoustic "
                f"onset of {est['n_files']} file(s) at {est['median_onset']:.4f} s, spread "
                f"{est['spread'] * 1000:.0f} ms, rounded down to 10 ms); the grid starts there")
        log.info("%s", note)
    design, trials = load_files(paths, unit_duration=unit_duration, levels=levels,
                                offset=offset, unit_name=unit_name)
    quick_fit(paths, read=read, unit_duration=design.unit_duration, offset=design.offset,
              window=(design.offset, design.offset + design.window))
    if note:
        design = Design(grid=design.grid, mode=design.mode, source=design.source,
                        offset=design.offset, offset_note=note)

    def suggest() -> float:
        return estimate_offset(paths, read=read)["offset"]

    return _run(design, trials, alpha=alpha, sensitivity_on=sensitivity, progress=progress,
                jobs=jobs, reference=reference, suggest=None if note else suggest)


def check(source: str | Path | Sequence[str | Path], *, unit_duration: float | None = None,
          levels: list[tuple[str, int]] | None = None, offset: float | str = 0.0,
          alpha: float = ALPHA, sensitivity: bool = True, progress: bool = True,
          jobs: int = 1, reference: Mapping[str, float] | None = None):
    """Check a build folder, or plain WAV files on a grid given by ``unit_duration``/``levels``.

    ``check("build/my_set")`` is :func:`check_build`; ``check(["a.wav", "b.wav"],
    unit_duration=0.25, levels=[("word", 2)])`` is :func:`check_files`.
    """
    if isinstance(source, (str, Path)) and Path(source).is_dir():
        if unit_duration is not None or levels is not None:
            raise CheckInputError(f"{source}: a build folder carries its own grid; do not pass "
                                  "unit_duration or levels with it")
        from .export import unfinished_reason

        why = unfinished_reason(source)  # (the build checks its own unfinished folder directly)
        if why:
            raise CheckInputError(why)
        return check_build(source, alpha=alpha, sensitivity=sensitivity, progress=progress,
                           jobs=jobs, reference=reference)
    paths = [source] if isinstance(source, (str, Path)) else list(source)
    if unit_duration is None or not levels:
        raise CheckInputError("plain WAV files need the grid: pass unit_duration (seconds) and "
                              "levels, e.g. levels=[('word', 2)]")
    return check_files(paths, unit_duration=unit_duration, levels=levels, offset=offset,
                       alpha=alpha, sensitivity=sensitivity, progress=progress, jobs=jobs,
                       reference=reference)

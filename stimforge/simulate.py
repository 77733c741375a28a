"""Simulated continuous recordings of a build's plan, for trying the path to the analysis.

:func:`simulate_session` plays one list of a build "into" a fake EEG amplifier with
MNE-Python: every planned presentation sends its code (on a stim channel and as an
annotation), the sound reaches the listener ``audio_delay`` later (plus a random trigger
jitter), and while each trial plays, chosen channels carry phase-locked responses at chosen
rates on top of Gaussian noise.  :func:`write_recording` writes it as FIF, BrainVision (pybv,
through ``mne.export``), EDF (edfio, through ``mne.export``) or EEGLAB (eeglabio).

This is a test bench, not a model of the brain: the responses are sinusoids that start with
each trial's sound and stop when it ends.

Timing model
------------
The presentation program starts list ``N`` at ``start`` seconds into the recording and follows
the plan (``events/list-N_events.tsv``): code ``c_k`` is sent at ``start + onset_k`` seconds,
rounded to the amplifier's sample grid, and recorded at that sample ``e_k``.  Trial ``k``'s sound
starts at ``e_k / sfreq + audio_delay + jitter_k`` (``jitter_k`` drawn from a normal
distribution of SD ``trigger_jitter``).  A response ``a cos(2 pi f (t - t_k) + phi)`` at
rate ``f`` runs from the sound's start ``t_k`` to the end of the trial file.  With
``timing_channel=True`` a channel ``ONSET`` holds, within +-1 s of each trial's analysis onset,
the time in seconds since that onset (zero elsewhere): its value at an epoch's first sample is
the epoch's start error, to a fraction of a sample.
"""

from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .epochs import Plan, _mne, read_plan
from .errors import EpochError
from .timing import window_samples

__all__ = [
    "RECORDING_FORMATS",
    "Response",
    "SimulatedSession",
    "default_responses",
    "simulate_session",
    "write_recording",
]

log = logging.getLogger("stimforge")

#: Suffix -> format written by :func:`write_recording`.
RECORDING_FORMATS = {"_raw.fif": "fif", "-raw.fif": "fif", "_eeg.fif": "fif", ".vhdr": "brainvision",
                     ".edf": "edf", ".set": "eeglab"}


@dataclass(frozen=True)
class Response:
    """A phase-locked response planted while trials play.

    Attributes
    ----------
    rate : float, Hz
    amplitude : float, volts
        Peak amplitude of the sinusoid.
    channels : tuple of str
        Channels that carry it.
    conditions : tuple of str
        Conditions in which it appears (empty: every condition).
    phase : float, radians
        Phase at the sound's onset.
    phase_step : float, radians
        Added at every further hearing of a trial (a phase shift between hearings).
    """

    rate: float
    amplitude: float
    channels: tuple[str, ...]
    conditions: tuple[str, ...] = ()
    phase: float = 0.0
    phase_step: float = 0.0


@dataclass(frozen=True, repr=False)
class SimulatedSession:
    """A simulated recording and what was planted in it.

    Attributes
    ----------
    raw : mne.io.RawArray
        EEG channels (volts), the stim channel ``STI``, annotations with the codes.
    plan : Plan
    trigger_samples : dict of int -> int
        List order -> sample of its code (trials whose code was left out are absent).
    audio_onsets : dict of int -> float
        List order -> seconds (recording time) where the sound started.
    responses : tuple of Response
    audio_delay : float, seconds
    """

    raw: Any
    plan: Plan
    trigger_samples: dict[int, int]
    audio_onsets: dict[int, float]
    responses: tuple[Response, ...]
    audio_delay: float

    def __repr__(self) -> str:
        r = self.raw
        return (f"<SimulatedSession list {self.plan.list_number}: {len(r.ch_names)} channels, "
                f"{r.n_times / r.info['sfreq']:.1f} s at {r.info['sfreq']:g} Hz, "
                f"{len(self.trigger_samples)} codes, {len(self.responses)} planted response(s)>")


def default_responses(plan: Plan, *, channels: Sequence[str], amplitude: float = 1e-6,
                      intact: Sequence[str] | None = None) -> tuple[Response, ...]:
    """Responses a listener who groups the structure might show (a test bench, not a model).

    The unit rate in every condition except reversed ones, and every level's rate only in
    the intact conditions, on ``channels``; ``amplitude`` volts for the unit rate and half of
    it for the levels.
    """
    rates = plan.rates
    conds = sorted({t.condition for t in plan.trials})
    kinds = {t.condition: t.kind for t in plan.trials}
    if intact is None:
        intact = [c for c in conds if kinds.get(c) == "intact"]
    heard = tuple(c for c in conds if kinds.get(c) != "reverse")
    out = [Response(rate=float(rates.rows[0].rate), amplitude=amplitude,
                    channels=tuple(channels), conditions=heard, phase=0.3)]
    for i, row in enumerate(rates.rows[1:]):
        out.append(Response(rate=float(row.rate), amplitude=amplitude / 2,
                            channels=tuple(channels), conditions=tuple(intact),
                            phase=0.5 + 0.7 * i))
    return tuple(out)


def simulate_session(
    build: str | Path,
    *,
    list_number: int,
    sfreq: float,
    rng: np.random.Generator | int | None,
    channels: Sequence[str] = ("Fz", "Cz", "Pz", "Oz", "T7", "T8"),
    responses: Sequence[Response] | None = None,
    noise: float = 5e-6,
    audio_delay: float = 0.0,
    trigger_jitter: float = 0.0,
    start: float = 3.0,
    tail: float = 3.0,
    pulse: float = 0.01,
    missing: Sequence[int] = (),
    extra: Sequence[tuple[float, int]] = (),
    late: dict[int, float] | None = None,
    timing_channel: bool = False,
    first_samp: int = 0,
) -> SimulatedSession:
    """Simulate a continuous recording of one list of a build.

    Parameters
    ----------
    build : path
        A stimforge build folder.
    list_number : int
    sfreq : float, Hz
        The amplifier's sampling rate (any, e.g. 250, 256, 500, 1000, 1024, 2048).
    rng : Generator or int
        Source of the noise and the jitter.
    channels : sequence of str
        EEG channel names.
    responses : sequence of Response, optional
        Default: :func:`default_responses` on the first half of ``channels``.
    noise : float, volts
        SD of the white Gaussian noise per sample.
    audio_delay : float, seconds
        Sound onset after its code (what ``--delay`` corrects).
    trigger_jitter : float, seconds
        SD of the random part of that delay.
    start, tail : float, seconds
        Recording before the list-start code and after the last trial.
    pulse : float, seconds
        How long a code stays on the stim channel.
    missing : sequence of int
        List orders whose code is not recorded (the sound still plays).
    extra : sequence of (seconds, code)
        Codes recorded that the plan does not have (seconds into the recording).
    late : dict of int -> float, optional
        List order -> seconds that trial (and so every later one) starts later than planned
        (a presentation program that stalled).
    timing_channel : bool
        Add the channel ``ONSET`` (see the module docstring).
    first_samp : int
        MNE-Python's ``first_samp`` of the result (as a cropped recording has).

    Returns
    -------
    SimulatedSession
    """
    mne = _mne()
    if not (sfreq > 0 and math.isfinite(sfreq)):
        raise EpochError(f"--sfreq must be > 0 Hz, got {sfreq}")
    rng = np.random.default_rng(rng)
    plan = read_plan(build, list_number=list_number)
    channels = list(channels)
    if responses is None:
        responses = default_responses(plan, channels=channels[: max(1, len(channels) // 2)])
    for r in responses:
        bad = [c for c in r.channels if c not in channels]
        if bad:
            raise EpochError(f"response at {r.rate:g} Hz names unknown channels {bad}")
    end = plan.events[-1]["onset"] + max((t.duration for t in plan.trials
                                          if t.onset == plan.events[-1]["onset"]), default=0.0)
    last = max(t.onset + t.duration for t in plan.trials)
    total = (start + max(end, last) + tail + abs(audio_delay) + 4 * trigger_jitter
             + sum((late or {}).values()))
    n = int(math.ceil(total * sfreq))
    names = channels + (["ONSET"] if timing_channel else []) + ["STI"]
    data = rng.normal(0.0, noise, size=(len(names), n))
    data[len(channels):] = 0.0
    stim = data[-1]
    t_axis = np.arange(n) / sfreq
    ch_index = {c: i for i, c in enumerate(channels)}
    n_pulse = window_samples(pulse, sr=sfreq, minimum=1)
    trig: dict[int, int] = {}
    audio: dict[int, float] = {}
    onsets, descr = [], []
    by_order = {t.order: t for t in plan.trials}
    hearings: dict[tuple[str, int], int] = {}
    shift = 0.0
    for e in plan.events:
        shift += (late or {}).get(e["order"], 0.0) if e["order"] is not None else 0.0
        s = int(round((start + shift + e["onset"]) * sfreq))
        order = e["order"]
        if order is not None and order in by_order:
            t = by_order[order]
            t0 = s / sfreq + audio_delay + (rng.normal(0, trigger_jitter) if trigger_jitter else 0)
            audio[order] = t0
            a, b = int(np.ceil(t0 * sfreq)), int(np.ceil((t0 + t.duration) * sfreq))
            a, b = max(a, 0), min(b, n)
            k = hearings.get((t.condition, t.trial), 0)
            hearings[(t.condition, t.trial)] = k + 1
            for r in responses:
                if r.conditions and t.condition not in r.conditions:
                    continue
                wave = r.amplitude * np.cos(2 * np.pi * r.rate * (t_axis[a:b] - t0) + r.phase
                                            + k * r.phase_step)
                for c in r.channels:
                    data[ch_index[c], a:b] += wave
            if timing_channel:
                ta = t0 + float(t.analysis_onset)
                lo, hi = int(np.ceil((ta - 1) * sfreq)), int(np.floor((ta + 1) * sfreq))
                lo, hi = max(lo, 0), min(hi, n - 1)
                data[len(channels), lo:hi + 1] = t_axis[lo:hi + 1] - ta
            if order in set(missing):
                continue
            trig[order] = s + first_samp
        stim[s:s + n_pulse] = e["value"]
        onsets.append(s / sfreq)
        descr.append(str(e["value"]))
    for sec, code in extra:
        s = int(round(sec * sfreq))
        stim[s:s + n_pulse] = code
        onsets.append(s / sfreq)
        descr.append(str(int(code)))
    types = ["eeg"] * len(channels) + (["misc"] if timing_channel else []) + ["stim"]
    info = mne.create_info(names, sfreq, types)
    raw = mne.io.RawArray(data, info, first_samp=first_samp, verbose="error")
    order_idx = np.argsort(onsets, kind="stable")
    raw.set_annotations(mne.Annotations(
        onset=[onsets[i] for i in order_idx], duration=[0.0] * len(onsets),
        description=[descr[i] for i in order_idx]))
    return SimulatedSession(raw=raw, plan=plan, trigger_samples=trig, audio_onsets=audio,
                            responses=tuple(responses), audio_delay=float(audio_delay))


def _format_of(path: Path) -> str:
    name = path.name.lower()
    for suf, fmt in RECORDING_FORMATS.items():
        if name.endswith(suf):
            return fmt
    raise EpochError(f"{path}: choose a name ending in {', '.join(RECORDING_FORMATS)} "
                     "(FIF, BrainVision, EDF or EEGLAB)")


def write_recording(raw, path: str | Path, *, overwrite: bool = False) -> Path:
    """Write a (simulated) recording; the format follows the suffix.

    FIF (``_raw.fif``) keeps the stim channel and the annotations.  BrainVision (``.vhdr``)
    writes the codes as ``Stimulus/S n`` markers, EDF (``.edf``, EDF+ annotations) and EEGLAB
    (``.set``) as annotations named by the code; these three leave the stim channel out (EDF
    would return its codes through 16-bit scaling, a 200 reading 199, and all three would
    return it as an EEG channel).

    Returns
    -------
    Path
    """
    mne = _mne()
    path = Path(path)
    fmt = _format_of(path)
    if path.exists() and not overwrite:
        raise EpochError(f"{path} exists; choose another name or pass --overwrite")
    path.parent.mkdir(parents=True, exist_ok=True)
    if fmt == "fif":
        raw.save(path, overwrite=True, verbose="error")
        return path
    out = raw.copy().load_data()
    stims = [out.ch_names[i] for i in mne.pick_types(out.info, stim=True, exclude=())]
    if stims:
        out.drop_channels(stims)
    ann = out.annotations
    if fmt == "brainvision":
        # MNE-Python keeps annotation onsets to the microsecond and its BrainVision export
        # truncates onset * sfreq, so 1000/1024 s (kept as 0.976562) would land on sample 999:
        # move each onset 1 us later (less than half a sample below 500 kHz) first.
        out.set_annotations(mne.Annotations(
            onset=ann.onset + 1e-6, duration=ann.duration, orig_time=ann.orig_time,
            description=[f"Stimulus/S{int(d):3d}" if d.isdigit() else d
                         for d in ann.description]))
    with warnings.catch_warnings():
        # "Encountered data in 'double' format. Converting to float32." (BrainVision) and
        # similar notes about the target format are expected here
        warnings.simplefilter("ignore", RuntimeWarning)
        # pybv on a channel that is not in volts (the ONSET timing channel)
        warnings.filterwarnings("ignore", message="Encountered unsupported non-voltage units",
                                category=UserWarning)
        mne.export.export_raw(path, out, fmt=fmt, overwrite=True, verbose="error")
    return path

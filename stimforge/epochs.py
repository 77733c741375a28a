"""Recordings + a build's plan -> epochs of the analysed windows.

A continuous EEG/MEG recording (FIF, BrainVision, EDF/BDF, EEGLAB; read with MNE-Python) holds
the trigger codes the presentation program sent.  This module

1. reads the plan of one list from the build folder (:func:`read_plan`: the list's
   ``events/list-N_events.tsv`` when the build wrote one, otherwise the same plan recomputed
   from ``trials.tsv`` and the manifest);
2. finds the codes in the recording (:func:`find_codes`: a stim channel, or annotations);
3. matches the recorded sequence to the plan and lists **every** disagreement -- a planned
   trial with no code, a code that was not planned, a wrong or swapped code, a trial much
   longer or shorter than planned, a window past the end of the recording -- before anything
   is cut (:func:`match_plan`; :class:`~stimforge.errors.EpochError` names them all);
4. cuts each trial's analysed window, the lead-in dropped, shifted by the measured
   audio-to-trigger delay (:func:`cut_epochs`), into an :class:`mne.EpochsArray` with the
   design in its metadata, and writes ``-epo.fif`` and the ``.npz`` the analysis reads
   (:meth:`EpochResult.save`).

Windows and samples
-------------------
The window of trial ``k`` starts, exactly, at ``e_k + (analysis_onset + delay) * sfreq``
samples (``e_k`` the sample of its trigger, ``analysis_onset`` the exact start of the
analysed part in the trial file, from the build's rate table).  That is rarely a whole
sample, and the window itself (e.g. 0.32 s units at 1024 Hz) need not be one either.  The rule
here: **each start is rounded half up to a whole sample; every epoch holds the same
``round_half_up(window * sfreq)`` samples**.  The data are not resampled or interpolated.  The
sub-sample offset of each start (exact minus taken, in [-0.5, 0.5) samples) is kept in the
metadata column ``start_offset`` and in the ``.npz``, and the length error is reported (see
:class:`WindowInfo`); the analysis evaluates its DFT at the exact frequencies ``k / window``
over the samples given, so a window that is not whole samples costs at most half a sample of
phase (1.8 degrees at 4 Hz and 1024 Hz) and never a bin.

The delay is ``+`` when the sound reaches the ear after the trigger (the usual case: sound-card
buffers); measure it on the recording hardware.
"""

from __future__ import annotations

import difflib
import logging
import math
import re
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np

from .assemble import trial_layout
from .errors import EpochError, EpochMismatch, StimforgeError
from .timing import exact, round_half_up

__all__ = [
    "RECORDING_SUFFIXES",
    "Disagreement",
    "EpochResult",
    "MatchReport",
    "Plan",
    "PlannedTrial",
    "RecordedCodes",
    "WindowInfo",
    "cut_epochs",
    "epoch_recording",
    "find_codes",
    "match_plan",
    "read_plan",
    "read_recording",
]

log = logging.getLogger("stimforge")

#: File suffixes read (MNE-Python's reader chooses by suffix).
RECORDING_SUFFIXES = (".fif", ".fif.gz", ".vhdr", ".edf", ".bdf", ".set", ".gdf")

_CODE_RE = re.compile(r"^\s*(?:Stimulus\s*/\s*)?S?\s*(\d{1,3})\s*$")


# --------------------------------------------------------------------------- the plan
@dataclass(frozen=True)
class PlannedTrial:
    """One planned presentation of a list.

    Attributes
    ----------
    order : int
        Position in the list (1-based).
    stim_file, condition, kind : str
    trial : int
        Trial number within its condition (the item: the two hearings of an item share it).
    repetition : int
        Hearing (1 first, 2 second ...).
    value : int
        Its trigger code.
    onset : float, seconds
        Planned onset from the list-start code.
    duration : float, seconds
        Length of the trial file.
    analysis_onset : Fraction, seconds
        Exact start of the analysed window in the trial file (lead-in and silence before it).
    """

    order: int
    stim_file: str
    condition: str
    kind: str
    trial: int
    repetition: int
    value: int
    onset: float
    duration: float
    analysis_onset: Fraction = field(repr=False)

    def describe(self) -> str:
        return (f"trial {self.order} of the list ({self.condition}, hearing {self.repetition}, "
                f"{self.stim_file}, code {self.value})")


@dataclass(frozen=True)
class Plan:
    """The planned presentation of one list of a build.

    Attributes
    ----------
    build : Path
    list_number : int
    trials : tuple of PlannedTrial
        In playing order.
    reserved : dict of str -> int
        ``list_start`` / ``list_end`` / ``catch`` codes.
    events : tuple of dict
        Every planned event, the reserved ones included, in time order (``onset``, ``value``,
        ``trial_type``, ``order``).
    window : Fraction, seconds
        The analysed window of every trial (whole cycles of every rate).
    rates : RateTable
    source : str
        Where the plan came from (the events file, or "recomputed from trials.tsv").
    meaning : dict of int -> str
        What each code means.
    """

    build: Path
    list_number: int
    trials: tuple[PlannedTrial, ...]
    reserved: dict[str, int]
    events: tuple[dict[str, Any], ...]
    window: Fraction
    rates: Any
    source: str
    meaning: dict[int, str] = field(default_factory=dict, repr=False)

    def __repr__(self) -> str:
        return (f"<Plan list {self.list_number} of {self.build}: {len(self.trials)} trials, "
                f"window {float(self.window):g} s, from {self.source}>")


def _analysis_onset_exact(row: dict[str, Any], starts: Any, sr: int, where: str) -> Fraction:
    """Exact analysis onset (s) on the build's grid (``assemble.trial_layout``'s unit starts),
    checked against the rounded TSV value."""
    lead = int(row.get("lead_in_units") or 0)
    t = Fraction(int(starts[lead]), int(sr))
    stored = row.get("analysis_onset")
    if stored is not None and abs(float(stored) - float(t)) > 2e-6:
        raise EpochError(f"{where}: analysis_onset {stored} s of {row.get('stim_file')} does not "
                         f"agree with the rate table ({float(t):.6f} s); rebuild the set")
    return t


def read_plan(build: str | Path, *, list_number: int) -> Plan:
    """Read the planned presentation of one list from a build folder.

    Parameters
    ----------
    build : path
        A stimforge build folder.
    list_number : int
        The list that was played (``list`` column of ``trials.tsv``).

    Returns
    -------
    Plan

    Raises
    ------
    EpochError
        If the folder is not a build, the list does not exist, or the events file and
        ``trials.tsv`` disagree.
    """
    from . import events as ev
    from .audio_io import read_build, read_tsv

    try:
        bt = read_build(build)
    except StimforgeError as exc:
        raise EpochError(f"--build: {exc}") from exc
    root = Path(bt.root)
    rates = bt.rates
    _, starts, _ = trial_layout(rates)  # the build's own unit starts (samples in the file)
    lists = sorted({int(r["list"]) for r in bt.trials})
    if int(list_number) not in lists:
        raise EpochError(f"--list {list_number}: {root} has lists {', '.join(map(str, lists))}")
    recipe = bt.manifest.get("recipe") or {}
    conditions = [c["name"] for c in recipe.get("conditions", [])] or list(
        dict.fromkeys(str(r["condition"]) for r in bt.trials))
    settings = ev.EventSettings.from_any(recipe.get("events"))
    table = ev.code_table(bt.trials, conditions=conditions, settings=settings)
    rows = [r for r in bt.trials if int(r["list"]) == int(list_number)]
    rows.sort(key=lambda r: int(r["order"]))
    for r in rows:
        if r.get("value") is not None and int(r["value"]) != table.code_for(r):
            raise EpochError(f"{root / 'trials.tsv'}: value {r['value']} of {r['stim_file']} "
                             f"(list {list_number}, order {r['order']}) is not the code the "
                             f"recipe gives it ({table.code_for(r)}); rebuild the set")
    efile = root / "events" / f"list-{int(list_number)}_events.tsv"
    if efile.is_file():
        from .audio_io import _number

        planned = [{k: _number(v) for k, v in e.items()} for e in read_tsv(efile)]
        source = str(efile.relative_to(root))
    else:
        rng = ev.jitter_rng(int(bt.manifest.get("seed", 0)), int(list_number))
        planned = ev.plan_list(bt.trials, list_number=int(list_number), table=table,
                               settings=settings, rng=rng)
        source = "recomputed from trials.tsv and manifest.json"
    by_order = {int(e["order"]): e for e in planned if e.get("order") is not None}
    trials = []
    for r in rows:
        e = by_order.get(int(r["order"]))
        if e is None or str(e["stim_file"]) != str(r["stim_file"]):
            raise EpochError(f"{source}: order {r['order']} does not name {r['stim_file']} as "
                             "trials.tsv does; rebuild the set")
        trials.append(PlannedTrial(
            order=int(r["order"]), stim_file=str(r["stim_file"]), condition=str(r["condition"]),
            kind=str(r.get("kind") or ""), trial=int(r["trial"]), repetition=int(r["repetition"]),
            value=int(e["value"]), onset=float(e["onset"]), duration=float(r["duration"]),
            analysis_onset=_analysis_onset_exact(r, starts, rates.sr, str(root / "trials.tsv"))))
    window = rates.rows[0].period_exact * rates.analysed_units
    evs = tuple(sorted(({"onset": float(e["onset"]), "value": int(e["value"]),
                         "trial_type": str(e["trial_type"]),
                         "order": None if e.get("order") is None else int(e["order"])}
                        for e in planned), key=lambda e: e["onset"]))
    meaning = {int(e["value"]): str(e["trial_type"]) for e in planned}
    for c in meaning:
        meaning[c] = table.meaning(c) if "not in the code table" not in table.meaning(c) \
            else meaning[c]
    return Plan(build=root, list_number=int(list_number), trials=tuple(trials),
                reserved=dict(table.reserved), events=evs, window=window, rates=rates,
                source=source, meaning=meaning)


# --------------------------------------------------------------------------- reading
def _mne():
    try:
        import mne
    except ImportError as exc:  # pragma: no cover - the extra is installed by the tests
        raise EpochError("reading recordings needs MNE-Python: pip install 'stimforge[analysis]'"
                         ) from exc
    return mne


def read_recording(path: str | Path, *, preload: bool = False):
    """Open a continuous recording with MNE-Python.

    Parameters
    ----------
    path : path
        ``.fif``, ``.vhdr`` (BrainVision), ``.edf``, ``.bdf``, ``.set`` (EEGLAB) or ``.gdf``.
    preload : bool

    Returns
    -------
    mne.io.BaseRaw

    Raises
    ------
    EpochError
        Missing file, unknown suffix, or a file MNE-Python cannot read.
    """
    mne = _mne()
    p = Path(path)
    name = p.name.lower()
    if not any(name.endswith(s) for s in RECORDING_SUFFIXES):
        raise EpochError(f"{p}: not a recording format read here (suffixes: "
                         f"{', '.join(RECORDING_SUFFIXES)})")
    if not p.is_file():
        raise EpochError(f"{p}: recording not found")
    try:
        return mne.io.read_raw(p, preload=preload, verbose="error")
    except Exception as exc:  # MNE raises many kinds; each names the problem
        raise EpochError(f"{p}: MNE-Python cannot read it: {exc}") from exc


@dataclass(frozen=True)
class RecordedCodes:
    """Trigger codes found in a recording.

    Attributes
    ----------
    samples : ndarray of int, shape (n,)
        Sample of each code, counted as MNE-Python counts them (``raw.first_samp`` included).
    values : ndarray of int, shape (n,)
    sfreq : float, Hz
    first_samp : int
    source : str
        "stim channel NAME" or "annotations".
    ignored : dict of str -> int
        Annotation descriptions (or codes) that were not taken as codes, with counts.
    """

    samples: np.ndarray
    values: np.ndarray
    sfreq: float
    first_samp: int
    source: str
    ignored: dict[str, int] = field(default_factory=dict)

    @property
    def times(self) -> np.ndarray:
        """Seconds from the start of the recording."""
        return (self.samples - self.first_samp) / self.sfreq

    def __repr__(self) -> str:
        return f"<RecordedCodes: {len(self.values)} codes from {self.source} at {self.sfreq:g} Hz>"


def annotation_code(description: str) -> int | None:
    """The code in an annotation description ("11", "S 11", "Stimulus/S 11"), else None."""
    m = _CODE_RE.match(str(description))
    if m is None:
        return None
    v = int(m.group(1))
    return v if 1 <= v <= 65535 else None


def find_codes(raw, *, source: str = "auto", stim_channel: str | None = None,
               ignore: Sequence[int] = ()) -> RecordedCodes:
    """Find the trigger codes of a recording.

    Parameters
    ----------
    raw : mne.io.BaseRaw
    source : {"auto", "stim", "annotations"}
        ``stim``: onsets of non-zero values on a stim channel (``mne.find_events`` with
        ``shortest_event=1``, every change of value counted); ``annotations``: annotations
        whose description is a code (``11``, ``S 11``, ``Stimulus/S 11``; others such as
        ``BAD_ACQ_SKIP`` or ``Comment/...`` are skipped and counted); ``auto``: the stim
        channel when there is one with codes on it, else the annotations.  EDF files carry
        codes as annotations (a stim channel there comes back through 16-bit scaling, a code
        of 200 reading 199).
    stim_channel : str, optional
        Which stim channel (needed when there are several).
    ignore : sequence of int
        Codes to drop (e.g. response buttons on the same port).

    Returns
    -------
    RecordedCodes

    Raises
    ------
    EpochError
        No stim channel / no code annotations where asked, or an ambiguous stim channel.
    """
    mne = _mne()
    if source not in ("auto", "stim", "annotations"):
        raise EpochError(f"--events-from: expected stim, annotations or auto, got {source!r}")
    sfreq = float(raw.info["sfreq"])
    first = int(raw.first_samp)
    ignore = {int(v) for v in ignore}
    stims = [raw.ch_names[i] for i in mne.pick_types(raw.info, stim=True, exclude=())]
    if stim_channel is not None and stim_channel not in raw.ch_names:
        close = difflib.get_close_matches(stim_channel, raw.ch_names, n=1)
        raise EpochError(f"--stim-channel {stim_channel!r}: no such channel"
                         + (f"; did you mean {close[0]!r}?" if close else
                            f" (stim channels: {', '.join(stims) or 'none'})"))
    want_stim = source == "stim" or (source == "auto" and (stims or stim_channel))
    if want_stim:
        if stim_channel is None:
            if not stims:
                raise EpochError(
                    "--events-from stim: the recording has no stim channel; use --events-from "
                    f"annotations ({len(raw.annotations)} annotations) or name one with "
                    "--stim-channel")
            if len(stims) > 1:
                raise EpochError(f"several stim channels ({', '.join(stims)}); choose one with "
                                 "--stim-channel")
            stim_channel = stims[0]
        data = raw.get_data(picks=[stim_channel])[0]
        high = np.nanmax(np.abs(data)) if data.size else 0
        mask = 255 if high > 255 else None
        if mask is not None:
            log.info("stim channel %s holds values above 255: reading its low 8 bits",
                     stim_channel)
        events = mne.find_events(raw, stim_channel=stim_channel, shortest_event=1,
                                 consecutive=True, mask=mask, mask_type="and",
                                 initial_event=True, verbose="error")
        if len(events) or source == "stim":
            keep = np.array([int(v) not in ignore for v in events[:, 2]], dtype=bool)
            ign = Counter(str(int(v)) for v in events[~keep, 2]) if len(events) else Counter()
            return RecordedCodes(samples=events[keep, 0].astype(np.int64),
                                 values=events[keep, 2].astype(np.int64), sfreq=sfreq,
                                 first_samp=first, source=f"stim channel {stim_channel}",
                                 ignored=dict(ign))
        log.info("stim channel %s carries no codes: reading annotations", stim_channel)
    ignored: Counter = Counter()
    for d in raw.annotations.description:
        c = annotation_code(d)
        if c is None or c in ignore:
            ignored[str(d)] += 1
    codes = {d: annotation_code(d) for d in set(raw.annotations.description)}
    event_id = {d: c for d, c in codes.items() if c is not None and c not in ignore}
    if not event_id:
        raise EpochError(
            "no trigger codes in the recording's annotations"
            + (f" (descriptions seen: {', '.join(sorted(ignored)[:8])})" if ignored else
               " (it has none)")
            + (f"; try --events-from stim (stim channels: {', '.join(stims)})" if stims else ""))
    # codes are not unique ids here (two descriptions may carry one code): map each
    # description to itself first, then to its code
    ids = {d: i + 1 for i, d in enumerate(sorted(event_id))}
    events, _ = mne.events_from_annotations(raw, event_id=ids, regexp=None, use_rounding=True,
                                            verbose="error")
    back = {i: event_id[d] for d, i in ids.items()}
    values = np.array([back[int(v)] for v in events[:, 2]], dtype=np.int64)
    order = np.argsort(events[:, 0], kind="stable")
    return RecordedCodes(samples=events[order, 0].astype(np.int64), values=values[order],
                         sfreq=sfreq, first_samp=first, source="annotations",
                         ignored=dict(ignored))


# --------------------------------------------------------------------------- matching
@dataclass(frozen=True)
class Disagreement:
    """One place where the recording and the plan differ.

    ``kind`` is one of ``missing`` (a planned code not recorded), ``extra`` (a recorded code
    not planned), ``wrong_code``, ``swapped`` (two trials' codes exchanged), ``too_long`` /
    ``too_short`` (onset-to-next-onset interval off the plan by more than the tolerance),
    ``outside`` (the window runs past the recording).
    """

    kind: str
    message: str
    orders: tuple[int, ...] = ()
    sample: int | None = None
    time: float = 0.0  # seconds into the recording, for sorting

    @property
    def order(self) -> int | None:
        """The (first) list position it concerns, if any."""
        return self.orders[0] if self.orders else None

    def __str__(self) -> str:
        return self.message


@dataclass(frozen=True)
class MatchReport:
    """The recorded codes laid against the plan.

    Attributes
    ----------
    pairs : dict of int -> int
        Planned event index (into ``plan.events``) -> recorded code index.
    trial_samples : dict of int -> int
        Trial ``order`` -> sample of its code (matched trials only).
    problems : tuple of Disagreement
    method : str
        "timing" (codes matched by time after fitting the recording's clock to the plan) or
        "order" (the recorded intervals did not follow the plan; codes aligned by sequence).
    clock : tuple of float
        (offset s, rate) of ``t_recorded = offset + rate * t_planned`` for "timing".
    notes : tuple of str
    """

    pairs: dict[int, int]
    trial_samples: dict[int, int]
    problems: tuple[Disagreement, ...]
    method: str
    clock: tuple[float, float]
    notes: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        return not self.problems

    def format(self) -> str:
        head = (f"{len(self.trial_samples)} trial codes matched by {self.method}"
                + (f"; {len(self.problems)} disagreement(s):" if self.problems else ""))
        return "\n".join([head] + [f"  - {p}" for p in self.problems])


def _fmt_t(t: float) -> str:
    return f"{t:.3f} s"


def _time_pairs(p: np.ndarray, pc: np.ndarray, r: np.ndarray, rc: np.ndarray, *,
                max_window: float) -> tuple[dict[int, int], float, float]:
    """Match planned onsets ``p`` (codes ``pc``) to recorded ones ``r`` (codes ``rc``).

    The recording's offset is the one that lines up the most equal codes; then, in planned
    order, each event is predicted from the last matched one plus the planned gap (so a
    stalled program or a drifting clock does not carry over) and paired with the nearest
    unpaired recorded code within its window -- a code-equal one when there is one --
    ``min(max_window, 0.45 x the planned gap to either neighbour)``.  Returns the pairs and
    ``(offset, rate)`` of a straight line fitted through the code-equal pairs.
    """
    cand: list[float] = []
    for code in set(pc.tolist()) & set(rc.tolist()):
        cand.extend((r[rc == code][None, :] - p[pc == code][:, None]).ravel().tolist())
    if not cand:
        return {}, 0.0, 1.0
    best = (-1, 0.0)
    for o in np.unique(np.round(np.asarray(cand), 2)):
        d = np.abs(r[None, :] - (p[:, None] + o))
        ok = (d < max_window) & (rc[None, :] == pc[:, None])
        score = int(ok.any(axis=1).sum())
        if score > best[0]:
            best = (score, float(o))
    gaps = np.diff(p)
    prev_gap = np.concatenate([[np.inf], gaps])
    next_gap = np.concatenate([gaps, [np.inf]])
    win = np.minimum(max_window, 0.45 * np.minimum(prev_gap, next_gap))
    win = np.where(win > 0, win, max_window)
    pairs: dict[int, int] = {}
    used: set[int] = set()
    anchor: tuple[float, float] | None = None  # (planned, recorded) of the last good pair
    for i in range(len(p)):
        pred = p[i] + best[1] if anchor is None else anchor[1] + (p[i] - anchor[0])
        near = [k for k in np.flatnonzero(np.abs(r - pred) < win[i]).tolist() if k not in used]
        if not near:
            continue
        same = [k for k in near if rc[k] == pc[i]]
        k = min(same or near, key=lambda k: abs(r[k] - pred))
        pairs[i] = k
        used.add(k)
        if rc[k] == pc[i]:
            anchor = (float(p[i]), float(r[k]))
    good = [(i, k) for i, k in pairs.items() if pc[i] == rc[k]]
    a, b = best[1], 1.0
    if len(good) >= 2:
        x = np.array([p[i] for i, _ in good])
        y = np.array([r[k] for _, k in good])
        if np.ptp(x) > 0:
            bb, aa = np.polyfit(x, y, 1)
            a, b = (float(aa), float(bb)) if abs(bb - 1) < 2e-3 else (float(np.median(y - x)),
                                                                      1.0)
    return pairs, a, b


def _order_pairs(pc: list[int], rc: list[int]) -> dict[int, int]:
    sm = difflib.SequenceMatcher(None, pc, rc, autojunk=False)
    pairs = {}
    for tag, i1, i2, j1, j2 in sm.get_opcodes():
        if tag == "equal" or (tag == "replace" and i2 - i1 == j2 - j1):
            for d in range(i2 - i1):
                pairs[i1 + d] = j1 + d
    return pairs


def _window_start(trigger: int, trial: Any, *, delay_s: Any, fs: Fraction) -> Fraction:
    """The exact (absolute, sub-sample) sample where a trial's analysed window starts: its
    trigger, plus the analysis onset and the audio delay, in samples."""
    return Fraction(int(trigger)) + (trial.analysis_onset + exact(delay_s)) * fs


def match_plan(recorded: RecordedCodes, plan: Plan, *, tolerance: float = 0.25,
               delay: float = 0.0, n_samples: int | None = None) -> MatchReport:
    """Lay the recorded codes against the plan and list every disagreement.

    Codes are paired by time: the offset that lines up the most equal codes, then each planned
    event predicted from the last matched one plus the planned gap and paired with the nearest
    recorded code within ``max(2 s, 10 x tolerance)`` and less than half the planned gap to
    either neighbour.  If fewer than half of the planned codes pair up so (a presentation
    program that kept its own intervals), the codes are aligned by sequence instead and the
    interval check is left out.

    Parameters
    ----------
    recorded : RecordedCodes
    plan : Plan
    tolerance : float, seconds > 0
        How far a trial's onset-to-next-onset interval may stray from the plan.
    delay : float, seconds
        The audio-to-trigger delay (only for the end-of-recording check).
    n_samples : int, optional
        Length of the recording in samples (``raw.n_times``), for the end-of-recording check.

    Returns
    -------
    MatchReport
    """
    if not tolerance > 0:
        raise EpochError(f"--tolerance must be > 0 seconds, got {tolerance}")
    evs = list(plan.events)
    rec_t = recorded.times
    rec_c = recorded.values
    notes: list[str] = []
    # reserved codes that never appear in the recording are not asked for
    for name, code in plan.reserved.items():
        if name in ("list_start", "list_end") and code not in set(rec_c.tolist()):
            if any(e["value"] == code and e["order"] is None for e in evs):
                notes.append(f"no {name} code ({code}) in the recording: not checked")
                evs = [e for e in evs if not (e["value"] == code and e["order"] is None)]
    p = np.array([e["onset"] for e in evs], dtype=float)
    pc = np.array([e["value"] for e in evs], dtype=np.int64)
    win = max(2.0, 10 * tolerance)
    pairs, a, b = (_time_pairs(p, pc, rec_t, rec_c, max_window=win) if len(rec_t)
                   else ({}, 0.0, 1.0))
    n_good = sum(1 for i, k in pairs.items() if pc[i] == rec_c[k])
    method = "timing"
    if n_good < max(1, len(evs) / 2):
        method = "order"
        pairs = _order_pairs(pc.tolist(), rec_c.tolist())
        notes.append("the recorded intervals do not follow the plan's: codes aligned by their "
                     "order only, intervals not checked")
    problems: list[Disagreement] = []
    trial_by_order = {t.order: t for t in plan.trials}

    def _o(e: dict[str, Any]) -> tuple[int, ...]:
        return () if e["order"] is None else (int(e["order"]),)

    def what(e: dict[str, Any]) -> str:
        if e["order"] is not None:
            return trial_by_order[e["order"]].describe()
        return f"the {e['trial_type']} code {e['value']}"

    matched_rec = set(pairs.values())
    wrong = {i: k for i, k in pairs.items() if pc[i] != rec_c[k]}
    done: set[int] = set()
    for i, k in sorted(wrong.items()):
        if i in done:
            continue
        # a swap: two paired events whose codes are exchanged
        mate = next((i2 for i2, k2 in wrong.items() if i2 != i and i2 not in done
                     and pc[i2] == rec_c[k] and rec_c[k2] == pc[i]), None)
        if mate is not None:
            done |= {i, mate}
            problems.append(Disagreement(
                "swapped",
                f"swapped codes: {what(evs[i])} and {what(evs[mate])} were recorded as "
                f"{rec_c[k]} at {_fmt_t(rec_t[k])} and {rec_c[pairs[mate]]} at "
                f"{_fmt_t(rec_t[pairs[mate]])}",
                orders=tuple(o for o in (evs[i]["order"], evs[mate]["order"]) if o is not None),
                sample=int(recorded.samples[k]), time=float(rec_t[k])))
            continue
        done.add(i)
        problems.append(Disagreement(
            "wrong_code", f"wrong code: {what(evs[i])} was recorded as code {rec_c[k]} at "
            f"{_fmt_t(rec_t[k])} (sample {int(recorded.samples[k])})", orders=_o(evs[i]),
            sample=int(recorded.samples[k]), time=float(rec_t[k])))
    for i, e in enumerate(evs):
        if i not in pairs:
            where = ""
            if method == "timing":
                where = f" near {_fmt_t(a + b * p[i])} in the recording"
            problems.append(Disagreement(
                "missing", f"missing: no code for {what(e)}, planned {_fmt_t(p[i])} after the "
                f"list start{where}", orders=_o(e), time=float(a + b * p[i])))
    for k in range(len(rec_c)):
        if k not in matched_rec:
            problems.append(Disagreement(
                "extra", f"extra: code {rec_c[k]} at {_fmt_t(rec_t[k])} (sample "
                f"{int(recorded.samples[k])}) is not in the plan"
                + (f" there (code {int(rec_c[k])} = {plan.meaning[int(rec_c[k])]})"
                   if int(rec_c[k]) in plan.meaning else ""), sample=int(recorded.samples[k]),
                time=float(rec_t[k])))
    if method == "timing":
        idx = sorted(pairs)
        for i, i2 in zip(idx[:-1], idx[1:]):
            if i2 != i + 1 or evs[i]["order"] is None:
                continue
            got = rec_t[pairs[i2]] - rec_t[pairs[i]]
            want = b * (p[i2] - p[i])
            if abs(got - want) > tolerance:
                kind = "too_long" if got > want else "too_short"
                problems.append(Disagreement(
                    kind, f"{'longer' if got > want else 'shorter'} than planned: "
                    f"{what(evs[i])} ran {got:.3f} s from its code to the next, planned "
                    f"{want:.3f} s ({got - want:+.3f} s; --tolerance {tolerance:g} s)",
                    orders=_o(evs[i]), sample=int(recorded.samples[pairs[i]]),
                    time=float(rec_t[pairs[i]])))
    trial_samples = {evs[i]["order"]: int(recorded.samples[k]) for i, k in pairs.items()
                     if evs[i]["order"] is not None and pc[i] == rec_c[k]}
    if n_samples is not None:
        fs = exact(recorded.sfreq)
        n_win = round_half_up(plan.window * fs)
        for t in plan.trials:
            s = trial_samples.get(t.order)
            if s is None:
                continue
            # the window exactly as cut_epochs will cut it
            a = round_half_up(_window_start(s, t, delay_s=delay, fs=fs)) - recorded.first_samp
            end = a + n_win
            if end > n_samples or a < 0:
                problems.append(Disagreement(
                    "outside", f"outside the recording: the analysed window of {t.describe()} "
                    f"ends at {end / recorded.sfreq:.3f} s, the recording at "
                    f"{n_samples / recorded.sfreq:.3f} s", orders=(t.order,), sample=s,
                    time=(s - recorded.first_samp) / recorded.sfreq))
    problems.sort(key=lambda d: d.time)
    return MatchReport(pairs=pairs, trial_samples=trial_samples, problems=tuple(problems),
                       method=method, clock=(a, b), notes=tuple(notes))


# --------------------------------------------------------------------------- cutting
@dataclass(frozen=True)
class WindowInfo:
    """How the analysed window sits on the recording's samples.

    Attributes
    ----------
    sfreq : float, Hz
    window : float, seconds
        The analysed window (whole cycles of every rate).
    n_times : int
        Samples per epoch, ``round_half_up(window * sfreq)``.
    exact_samples : float
        ``window * sfreq``, possibly not whole.
    max_start_offset : float, samples
        Largest |exact start - taken start| over the epochs (<= 0.5).
    delay_ms : float
    """

    sfreq: float
    window: float
    n_times: int
    exact_samples: float
    max_start_offset: float
    delay_ms: float
    unit_rate: float = float("nan")

    @property
    def whole(self) -> bool:
        return abs(self.exact_samples - self.n_times) < 1e-9

    def describe(self) -> str:
        base = (f"analysed window {self.window:g} s = {self.exact_samples:g} samples at "
                f"{self.sfreq:g} Hz")
        if self.whole:
            base += f": every epoch holds {self.n_times} samples (whole)"
        else:
            d = self.n_times - self.exact_samples
            base += (f", not a whole number: every epoch holds {self.n_times} samples "
                     f"({d:+.3f} sample, {1000 * d / self.sfreq:+.3f} ms), no resampling")
        off = self.max_start_offset
        phase = 360 * self.unit_rate * off / self.sfreq if math.isfinite(self.unit_rate) else 0
        base += (f"; starts rounded half up to a sample, sub-sample offsets up to {off:.3f} "
                 f"sample ({1000 * off / self.sfreq:.3f} ms"
                 + (f", {phase:.2f} deg at the {self.unit_rate:g} Hz unit rate"
                    if math.isfinite(self.unit_rate) else "")
                 + ") kept in metadata column start_offset")
        if self.delay_ms:
            base += f"; audio delay {self.delay_ms:g} ms applied"
        return base


@dataclass(frozen=True, repr=False)
class EpochResult:
    """Epochs cut from one recording, with the plan and the checks that led to them.

    Attributes
    ----------
    epochs : mne.EpochsArray
        One epoch per matched trial, the analysed window only; ``epochs.metadata`` holds
        ``condition, kind, repetition, item, trial, stim_file, list, order, value,
        trigger_sample, start_sample, start_offset`` (samples), ``delay_ms``.
    plan : Plan
    match : MatchReport
    window : WindowInfo
    recorded : RecordedCodes
    participant : str or None
    dropped : tuple of int
        List orders left out (``drop_mismatched=True`` only).
    """

    epochs: Any
    plan: Plan
    match: MatchReport
    window: WindowInfo
    recorded: RecordedCodes
    participant: str | None = None
    dropped: tuple[int, ...] = ()

    def __repr__(self) -> str:
        e = self.epochs
        return (f"<EpochResult list {self.plan.list_number}: {len(e)} epochs x "
                f"{len(e.ch_names)} channels x {len(e.times)} samples at "
                f"{e.info['sfreq']:g} Hz; {self.match.method} match, "
                f"{len(self.match.problems)} disagreement(s)>")

    @property
    def metadata(self):
        return self.epochs.metadata

    def to_npz(self, path: str | Path) -> Path:
        """Write the ``.npz`` the analysis reads.

        Keys: ``data`` (trials, channels, times; volts as MNE-Python holds them), ``sfreq``,
        ``window`` (s), ``ch_names``, ``condition``, ``repetition``, ``item``, ``stim_file``,
        ``order``, ``value``, ``list``, ``start_offset`` (samples), ``delay_ms``, and
        ``participant`` when known.  Strings are unicode arrays (no pickles).
        """
        md = self.epochs.metadata
        out = dict(
            data=self.epochs.get_data(copy=True),
            sfreq=np.float64(self.epochs.info["sfreq"]),
            window=np.float64(self.window.window),
            ch_names=np.array(self.epochs.ch_names, dtype=str),
            condition=md["condition"].to_numpy(dtype=str),
            repetition=md["repetition"].to_numpy(dtype=np.int64),
            item=md["item"].to_numpy(dtype=np.int64),
            stim_file=md["stim_file"].to_numpy(dtype=str),
            order=md["order"].to_numpy(dtype=np.int64),
            value=md["value"].to_numpy(dtype=np.int64),
            list=np.int64(self.plan.list_number),
            start_offset=md["start_offset"].to_numpy(dtype=np.float64),
            delay_ms=np.float64(self.window.delay_ms),
        )
        if self.participant is not None:
            out["participant"] = np.array(str(self.participant))
        path = Path(path)
        np.savez(path, **out)
        return path

    def save(self, out: str | Path, *, overwrite: bool = False) -> tuple[Path, Path]:
        """Write ``<stem>-epo.fif`` and ``<stem>-epo.npz``.

        ``out`` is the ``-epo.fif`` path (or the ``.npz`` one; the other is put beside it).
        Existing files are refused unless ``overwrite``.
        """
        fif, npz = output_paths(out)
        for p in (fif, npz):
            if p.exists() and not overwrite:
                raise EpochError(f"{p} exists; choose another --out or pass --overwrite")
        fif.parent.mkdir(parents=True, exist_ok=True)
        self.epochs.save(fif, overwrite=True, verbose="error")
        self.to_npz(npz)
        return fif, npz


def output_paths(out: str | Path) -> tuple[Path, Path]:
    """The ``-epo.fif`` and ``.npz`` paths for ``--out`` (either may be given)."""
    p = Path(out)
    name = p.name
    for suf in ("-epo.fif", "_epo.fif"):
        if name.endswith(suf):
            return p, p.with_name(name[: -len(".fif")] + ".npz")
    if name.endswith(".npz"):
        stem = name[: -len(".npz")]
        if stem.endswith(("-epo", "_epo")):
            return p.with_name(stem + ".fif"), p
        return p.with_name(stem + "-epo.fif"), p
    raise EpochError(f"--out {out}: give a file ending in -epo.fif (MNE-Python's name for "
                     "epochs) or .npz; the other file is written beside it")


def _event_names(md_rows: list[dict[str, Any]]) -> dict[str, int]:
    by_code: dict[int, list[dict[str, Any]]] = {}
    for r in md_rows:
        by_code.setdefault(int(r["value"]), []).append(r)
    names = {}
    for code, rows in sorted(by_code.items()):
        conds = {r["condition"] for r in rows}
        reps = {r["repetition"] for r in rows}
        items = {r["item"] for r in rows}
        if len(conds) == 1 and len(reps) == 1:
            name = f"{rows[0]['condition']}/hearing{rows[0]['repetition']}"
            if len(items) == 1 and len(by_code) > 2 * len(conds) * max(1, len(reps)):
                name += f"/item{rows[0]['item']}"
        elif len(conds) == 1:
            name = rows[0]["condition"]
        else:
            name = f"code{code}"
        while name in names:
            name += f"/code{code}"
        names[name] = code
    return names


def cut_epochs(raw, plan: Plan, match: MatchReport, *, delay_ms: float = 0.0,
               picks: Any = "data", orders: Sequence[int] | None = None,
               participant: str | None = None, recorded: RecordedCodes | None = None
               ) -> EpochResult:
    """Cut the analysed window of every matched trial.

    Parameters
    ----------
    raw : mne.io.BaseRaw
    plan : Plan
    match : MatchReport
        From :func:`match_plan`; its problems are not looked at here (see
        :func:`epoch_recording`).
    delay_ms : float, milliseconds
        Audio-to-trigger delay (+ = the sound after the trigger).
    picks : MNE picks
        Channels to keep (default: the data channels, bad ones excluded).
    orders : sequence of int, optional
        Only these list positions (default: every matched trial).

    Returns
    -------
    EpochResult
    """
    mne = _mne()
    import pandas as pd

    sfreq = float(raw.info["sfreq"])
    fs = exact(sfreq)
    delay = exact(delay_ms) / 1000
    n_times = round_half_up(plan.window * fs)
    first = int(raw.first_samp)
    try:
        pick_idx = mne._fiff.pick._picks_to_idx(raw.info, picks, exclude="bads")
    except Exception as exc:
        raise EpochError(f"picks {picks!r}: {exc}") from exc
    if len(pick_idx) == 0:
        raise EpochError("no data channels to cut (all are stim/misc or marked bad); pass picks")
    chosen = [t for t in plan.trials if t.order in match.trial_samples
              and (orders is None or t.order in set(orders))]
    if not chosen:
        raise EpochError("no trial of the plan was found in the recording; nothing to cut")
    data = np.empty((len(chosen), len(pick_idx), n_times))
    rows = []
    events = np.zeros((len(chosen), 3), dtype=np.int64)
    max_off = 0.0
    for n, t in enumerate(chosen):
        trig = match.trial_samples[t.order]
        start_exact = _window_start(trig, t, delay_s=delay, fs=fs)
        start = round_half_up(start_exact)
        off = float(start_exact - start)
        max_off = max(max_off, abs(off))
        a = start - first
        if a < 0 or a + n_times > raw.n_times:
            raise EpochError(f"the analysed window of {t.describe()} runs past the recording "
                             f"(samples {a}..{a + n_times} of {raw.n_times})")
        data[n] = raw.get_data(picks=pick_idx, start=a, stop=a + n_times)
        events[n] = (start, 0, t.value)
        rows.append({"condition": t.condition, "kind": t.kind, "repetition": t.repetition,
                     "item": t.trial, "stim_file": t.stim_file, "list": plan.list_number,
                     "order": t.order, "value": t.value, "trigger_sample": trig,
                     "start_sample": start, "start_offset": off,
                     "delay_ms": float(delay_ms)})
    info = mne.pick_info(raw.info, pick_idx)
    md = pd.DataFrame(rows)
    epochs = mne.EpochsArray(data, info, events=events, tmin=0.0, event_id=_event_names(rows),
                             metadata=md, baseline=None, verbose="error")
    unit_rate = float(plan.rates.rows[0].rate) if plan.rates is not None else float("nan")
    win = WindowInfo(sfreq=sfreq, window=float(plan.window), n_times=int(n_times),
                     exact_samples=float(plan.window * fs), max_start_offset=max_off,
                     delay_ms=float(delay_ms), unit_rate=unit_rate)
    return EpochResult(epochs=epochs, plan=plan, match=match, window=win,
                       recorded=recorded if recorded is not None else RecordedCodes(
                           np.zeros(0, np.int64), np.zeros(0, np.int64), sfreq, first, "?"),
                       participant=participant)


def _better_list(rec: RecordedCodes, plan: Plan, *, tolerance: float) -> str:
    """A hint when another list of the build matches the recording with fewer problems."""
    from .audio_io import read_tsv

    try:
        lists = sorted({int(r["list"]) for r in read_tsv(plan.build / "trials.tsv")})
    except (OSError, KeyError, ValueError):
        return ""
    mine = len(match_plan(rec, plan, tolerance=tolerance).problems)
    best = None
    for n in lists:
        if n == plan.list_number:
            continue
        k = len(match_plan(rec, read_plan(plan.build, list_number=n),
                           tolerance=tolerance).problems)
        if k < mine and (best is None or k < best[1]):
            best = (n, k)
    if best is None:
        return ""
    return (f"List {best[0]} of the build matches this recording better ({best[1]} "
            f"disagreement(s) against {mine}): was --list {best[0]} played? ")


def epoch_recording(
    recording: Any,
    *,
    build: str | Path,
    list_number: int,
    events_from: str = "auto",
    stim_channel: str | None = None,
    delay_ms: float = 0.0,
    tolerance: float = 0.25,
    ignore_codes: Sequence[int] = (),
    picks: Any = "data",
    participant: str | None = None,
    drop_mismatched: bool = False,
) -> EpochResult:
    """Recording + build -> epochs of the analysed windows, after checking the codes.

    Parameters
    ----------
    recording : path or mne.io.BaseRaw
    build : path
        The stimforge build folder the stimuli came from.
    list_number : int
        The list that was played.
    events_from : {"auto", "stim", "annotations"}
        Where the codes are (see :func:`find_codes`).
    stim_channel : str, optional
    delay_ms : float, milliseconds
        Measured audio-to-trigger delay; every window moves by ``delay_ms * sfreq / 1000``
        samples (rounded as described in the module docstring).
    tolerance : float, seconds
        Largest accepted difference between a recorded and a planned onset-to-next-onset
        interval.
    ignore_codes : sequence of int
    picks : MNE picks
    participant : str, optional
        Written into the ``.npz``.
    drop_mismatched : bool
        Instead of refusing a recording whose codes disagree with the plan, leave out every
        trial a disagreement touches (logged) and cut the others.

    Returns
    -------
    EpochResult

    Raises
    ------
    EpochError
        Listing every disagreement between the recorded codes and the plan (nothing is cut),
        or naming the unreadable file / missing channel.
    """
    raw = recording if not isinstance(recording, (str, Path)) else read_recording(recording)
    plan = read_plan(build, list_number=list_number)
    rec = find_codes(raw, source=events_from, stim_channel=stim_channel, ignore=ignore_codes)
    delay = float(exact(delay_ms)) / 1000
    match = match_plan(rec, plan, tolerance=tolerance, delay=delay, n_samples=int(raw.n_times))
    for note in match.notes:
        log.info("epoch: %s", note)
    name = getattr(recording, "filenames", None)
    where = str(recording) if isinstance(recording, (str, Path)) else (
        str(name[0]) if name and name[0] else "the recording")
    orders = None
    dropped: tuple[int, ...] = ()
    if match.problems:
        listing = "\n".join(f"  - {p}" for p in match.problems)
        counts = Counter(p.kind for p in match.problems)
        head = (f"{where}: the recorded codes ({rec.source}, {len(rec.values)} codes) do not "
                f"match list {plan.list_number} of {plan.build} ({len(plan.trials)} trials; "
                f"{', '.join(f'{n} {k}' for k, n in sorted(counts.items()))}):")
        if not drop_mismatched:
            hint = _better_list(rec, plan, tolerance=tolerance)
            raise EpochMismatch(head + "\n" + listing + "\n" + hint + "Nothing was cut. Check the "
                             "list number, "
                             "the presentation log and the trigger cable; --drop-mismatched "
                             "cuts only the trials no disagreement touches.")
        bad = {o for p in match.problems for o in p.orders}
        orders = [t.order for t in plan.trials if t.order not in bad]
        dropped = tuple(sorted(bad))
        log.warning("%s\n%s\n-> %d trial(s) left out: %s", head, listing, len(dropped),
                    ", ".join(map(str, dropped)))
    result = cut_epochs(raw, plan, match, delay_ms=delay_ms, picks=picks, orders=orders,
                        participant=participant, recorded=rec)
    if dropped:
        result = EpochResult(epochs=result.epochs, plan=plan, match=match, window=result.window,
                             recorded=rec, participant=participant, dropped=dropped)
    log.info("epoch: %s", result.window.describe())
    return result

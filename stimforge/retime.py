"""Exact-duration re-timing of syllable tokens, with pitch, level, alignment and fades.

Every token becomes exactly one slot long (``n_samples``, as the build's rounding rule asks)
and leaves with a pitch and a level that cannot tell where in a word or line it will sit.

Pipeline for one token and one slot length ``N``
------------------------------------------------
1. **Plan**: stretch factor ``N / len(token)``; outside ``retime.stretch_range`` the
   ``retime.out_of_range`` policy decides (``error`` / ``warn`` / ``cut-pad``).
2. **Backend** (``BACKENDS``), each returning exactly ``N`` samples:
   ``world`` (WORLD vocoder, default), ``cut-pad`` (speech untouched, truncated or padded with
   silence), ``overlap-add`` (Praat PSOLA).  The pitch policy is applied inside the backend
   (WORLD F0 track, Praat pitch tier).  ``cut-pad`` with a pitch policy other than ``keep``
   resynthesises the token with WORLD at its *own* length (no time change) and then cuts or
   pads it: that is what lets ``out_of_range: cut-pad`` work with the default ``flat`` pitch.
3. **Align**: ``onset`` moves the acoustic onset (envelope within ``onset_threshold_db`` of
   the peak) to the slot start; ``steepest-rise`` moves the steepest envelope rise to
   ``retime.align_offset`` seconds into the slot.  Content shifts; length stays ``N``.
4. **Fade**: raised cosine of ``loudness.fade`` seconds at both ends; first and last samples 0.
5. **Level**: gain so that the RMS over the active part equals ``loudness.target_dbfs``.
6. **Peak guard** (set-wide, in :func:`process_tokens`): if any token would peak above
   ``loudness.peak_ceiling_dbfs``, every token of the set is lowered by the same gain.

Records (:class:`TokenRecord`) carry F0 before/after measured by Praat (not WORLD), levels,
gains, the alignment shift and any warnings.
"""

from __future__ import annotations

import hashlib
import logging
import math
import threading
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np

from .acoustics import active_bounds, active_mask, as_signal, peak_dbfs, steepest_rise_time
from .cache import AnalysisCache, WorldAnalysis, analysis_key, default_cache_dir
from .audio_io import to_jsonable
from .errors import AudioInputError, RetimeError
from .prosody import (
    F0_CONTEXT_S,
    active_rms_dbfs,
    apply_fade,
    apply_pitch_policy,
    f0_summary,
    geometric_mean,
    level_gain_db,
    peak_guard_gain_db,
)
from .recipe import LevelSpecPolicy, PitchSpec, RetimeSpec
from .timing import seconds_to_samples, window_samples

__all__ = [
    "TokenRecord",
    "ProcessedToken",
    "ProcessedSet",
    "BackendRequest",
    "BackendResult",
    "BACKENDS",
    "register_backend",
    "retime_token",
    "process_tokens",
    "world_analysis",
    "world_resynthesize",
    "world_output_frames",
    "ANALYSIS_PAD_S",
    "MIN_TOKEN_S",
    "ALIGN_SMOOTH_S",
    "rise_time",
    "PSOLA_FACTOR_LIMITS",
]

logger = logging.getLogger("stimforge")

#: Seconds of silence added on each side of a token before analysis (WORLD and Praat), so
#: that short tokens keep their voicing (DIO finds none in clips <= 100 ms).
ANALYSIS_PAD_S = 0.1
#: Tokens shorter than this cannot be analysed or re-timed meaningfully.
MIN_TOKEN_S = 0.02
#: "onset" alignment: first sample whose 5 ms envelope is within this many dB of its peak
#: (the same default as the corpus trim threshold).
#: Envelope smoothing (s) of the ``steepest-rise`` alignment.
ALIGN_SMOOTH_S = 0.02
#: Praat's overlap-add silently caps stretching at 3x; stimforge refuses beyond these.
PSOLA_FACTOR_LIMITS = (1.0 / 3.0, 3.0)
#: D4C voiced/unvoiced threshold (pyworld's default, tuned for Harvest).
D4C_THRESHOLD = 0.85

_PRAAT_LOCK = threading.Lock()
_FACTOR_EPS = 1e-9


# =========================================================================== records
@dataclass(frozen=True)
class TokenRecord:
    """What happened to one token (for the first slot length it was built at).

    Attributes
    ----------
    token_id, label : str
    backend : str
        Backend actually used (``cut-pad`` when ``out_of_range: cut-pad`` fell back).
    n_samples : int
        Output length (the slot).
    n_token : int
        Input length.
    stretch_factor : float
        Time-scale factor applied to the speech (1.0 for ``cut-pad``).
    f0_before_hz, f0_after_hz : float, Hz
        Praat median F0 of the input / output (NaN if unvoiced or too short), both read with
        ``prosody.F0_CONTEXT_S`` (0.1 s) of silence either side.
    f0_sd_after_st : float, semitones
        Within-token SD of the output's Praat F0 (same reading).
    rms_before_dbfs, rms_after_dbfs : float, dBFS
        RMS over the active part, input / final output.
    gain_db : float, dB
        The token's own level gain.
    set_gain_db : float, dB
        The set-wide peak-guard gain (<= 0), the same in every record of a set.
    peak_after_dbfs : float, dBFS
    clipped_samples : int
        Output samples at or beyond full scale (0 by construction).
    align_shift_s : float, s
        Content shift of the alignment step (negative: earlier).
    pitch_method : str
        ``world``, ``praat-psola`` or ``none``.
    warnings : tuple of str
    """

    token_id: str
    label: str
    backend: str
    n_samples: int
    n_token: int
    stretch_factor: float
    f0_before_hz: float
    f0_after_hz: float
    f0_sd_after_st: float
    rms_before_dbfs: float
    rms_after_dbfs: float
    gain_db: float
    set_gain_db: float
    peak_after_dbfs: float
    clipped_samples: int
    align_shift_s: float
    pitch_method: str = "none"
    warnings: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dict; NaN and infinities become ``None``."""
        return {k: to_jsonable(v) for k, v in asdict(self).items()}

    def __repr__(self) -> str:
        w = f", {len(self.warnings)} warning(s)" if self.warnings else ""
        return (
            f"TokenRecord({self.token_id!r} {self.label!r}: {self.backend} x{self.stretch_factor:.3f}"
            f" -> {self.n_samples} samples, F0 {self.f0_before_hz:.1f} -> {self.f0_after_hz:.1f} Hz"
            f" (sd {self.f0_sd_after_st:.2f} st), RMS {self.rms_before_dbfs:.1f} -> "
            f"{self.rms_after_dbfs:.1f} dBFS, peak {self.peak_after_dbfs:.1f} dBFS{w})"
        )


@dataclass(frozen=True, repr=False)
class ProcessedToken:
    """One re-timed token: ``samples`` (float64, exactly ``record.n_samples``) and its record."""

    samples: np.ndarray
    record: TokenRecord

    def __repr__(self) -> str:
        return f"ProcessedToken({self.samples.size} samples, {self.record!r})"


@dataclass(frozen=True, repr=False)
class ProcessedSet:
    """A re-timed corpus: one array and one record per token, all at one slot length.

    Attributes
    ----------
    records : list of TokenRecord
        One per token, in input order.
    n_samples : int
        The slot length every token was rendered at (the shorter slot where the rounding rule
        makes two; assembly pads the longer one, see :func:`stimforge.assemble.fit_to_slot`).
    target_f0 : float or None, Hz
        The pitch target used (None for ``keep``).
    set_gain_db : float, dB
        Peak-guard gain applied to every token (0 if not needed).
    headroom_db : float, dB
        ``peak_ceiling_dbfs`` minus the highest output peak (>= 0).
    warnings : list of str
        Set-level warnings and every token warning (prefixed with the token id and length).
    """

    records: list[TokenRecord]
    n_samples: int
    target_f0: float | None
    set_gain_db: float
    headroom_db: float
    warnings: list[str]
    _samples: dict[str, np.ndarray] = field(default_factory=dict)

    def get(self, token_id: str) -> np.ndarray:
        """The processed samples of ``token_id`` (read-only, ``n_samples`` long)."""
        try:
            return self._samples[token_id]
        except KeyError:
            raise KeyError(f"token {token_id!r} was not processed") from None

    def __len__(self) -> int:
        return len(self.records)

    def __repr__(self) -> str:
        f0 = "n/a" if self.target_f0 is None else f"{self.target_f0:.1f} Hz"
        return (
            f"ProcessedSet({len(self.records)} tokens of {self.n_samples} samples, "
            f"target F0 {f0}, set gain {self.set_gain_db:.2f} dB, headroom "
            f"{self.headroom_db:.2f} dB, {len(self.warnings)} warning(s))"
        )

    def _repr_html_(self) -> str:
        import html

        cols = ["token_id", "label", "backend", "stretch_factor", "f0_before_hz", "f0_after_hz",
                "f0_sd_after_st", "rms_after_dbfs", "peak_after_dbfs", "align_shift_s"]
        head = "".join(f"<th>{c}</th>" for c in cols)
        rows = []
        for r in self.records:
            d = r.to_dict()
            cells = []
            for c in cols:
                v = d[c]
                cells.append(f"<td>{v:.3f}</td>" if isinstance(v, float) else
                             f"<td>{html.escape(str(v))}</td>")
            rows.append("<tr>" + "".join(cells) + "</tr>")
        return (f"<p>{html.escape(repr(self))}</p><table><tr>{head}</tr>{''.join(rows)}</table>")


# =========================================================================== backends
@dataclass(frozen=True)
class BackendRequest:
    """Everything a backend receives.

    Attributes
    ----------
    x : ndarray, (n,), float64, validated
    sr : int, Hz
    n_samples : int
        Exact output length.
    retime : RetimeSpec
    pitch_policy : {"flat", "contour", "keep"}
    target_hz : float or None, Hz
    cache : AnalysisCache or None
    token_id : str
    reference_f0_hz : float or None, Hz
        Geometric mean of the input token's voiced Praat F0: the height that the ``contour``
        policy moves to ``target_hz`` (None: use the backend's own F0 estimate).
    """

    x: np.ndarray
    sr: int
    n_samples: int
    retime: RetimeSpec
    pitch_policy: str
    target_hz: float | None
    cache: AnalysisCache | None
    token_id: str = ""
    reference_f0_hz: float | None = None


@dataclass(frozen=True)
class BackendResult:
    """A backend's answer: exactly ``n_samples`` samples, how pitch was set, warnings."""

    samples: np.ndarray
    pitch_method: str
    warnings: tuple[str, ...] = ()


Backend = Callable[[BackendRequest], BackendResult]
BACKENDS: dict[str, Backend] = {}
_FACTOR_LIMITS: dict[str, tuple[float, float]] = {}


def register_backend(
    name: str, *, factor_limits: tuple[float, float] | None = None
) -> Callable[[Backend], Backend]:
    """Register a re-timing backend under ``name``.

    Parameters
    ----------
    name : str
        The value of ``retime.backend`` that selects it.
    factor_limits : (float, float) or None
        Hard limits of the stretch factor the backend can do; checked for every token before
        any processing, so all offenders are listed in one error.
    """

    def deco(fn: Backend) -> Backend:
        BACKENDS[name] = fn
        if factor_limits is not None:
            _FACTOR_LIMITS[name] = factor_limits
        return fn

    return deco


def _fit_length(y: np.ndarray, n: int) -> np.ndarray:
    y = np.asarray(y, dtype=np.float64)
    if y.size >= n:
        return np.ascontiguousarray(y[:n])
    return np.concatenate([y, np.zeros(n - y.size)])


# --------------------------------------------------------------------------- WORLD
def _analysis_params(retime: RetimeSpec, sr: int) -> dict[str, Any]:
    import pyworld

    return {
        "f0_method": retime.f0_method,
        "frame_period": float(retime.frame_period),
        "f0_floor": float(retime.f0_floor),
        "f0_ceil": float(retime.f0_ceil),
        "fft_size": int(pyworld.get_cheaptrick_fft_size(int(sr), float(retime.f0_floor))),
        "pad_s": ANALYSIS_PAD_S,
        "d4c_threshold": D4C_THRESHOLD,
    }


def _validate_token(x: np.ndarray, *, sr: int, token_id: str = "") -> np.ndarray:
    name = f"token {token_id!r}" if token_id else "token"
    a = as_signal(x, name=name)
    if not isinstance(sr, (int, np.integer)) or sr <= 0:
        raise AudioInputError(f"{name}: sample rate must be a positive integer, got {sr!r}")
    if a.size < MIN_TOKEN_S * sr:
        raise AudioInputError(
            f"{name}: {a.size} samples ({a.size / sr * 1000:.1f} ms) is too short to analyse; "
            f"tokens need at least {MIN_TOKEN_S * 1000:.0f} ms (check the corpus trim threshold)"
        )
    if float(np.max(np.abs(a))) == 0.0:
        raise AudioInputError(f"{name}: the token is digital silence; its level cannot be set: "
                              "replace the recording or remove its row from the corpus index "
                              "(stimforge inspect flags silent tokens)")
    return a


def world_analysis(
    x: np.ndarray, *, sr: int, retime: RetimeSpec, cache: AnalysisCache | None = None
) -> WorldAnalysis:
    """WORLD analysis of a token with context padding (cached when ``cache`` is given).

    The token is padded with :data:`ANALYSIS_PAD_S` seconds of silence on each side; F0 by
    Harvest (default) or DIO + StoneMask; CheapTrick and D4C share one ``fft_size``, equal to
    ``pyworld.get_cheaptrick_fft_size(sr, retime.f0_floor)``.

    Parameters
    ----------
    x : ndarray, (n,)
    sr : int, Hz
    retime : RetimeSpec
    cache : AnalysisCache or None

    Returns
    -------
    WorldAnalysis
    """
    import pyworld

    x = _validate_token(x, sr=sr)
    params = _analysis_params(retime, sr)
    pad = window_samples(ANALYSIS_PAD_S, sr=sr)

    def compute() -> WorldAnalysis:
        xp = np.ascontiguousarray(np.concatenate([np.zeros(pad), x, np.zeros(pad)]))
        fp = params["frame_period"]
        if params["f0_method"] == "harvest":
            f0, t = pyworld.harvest(xp, sr, f0_floor=params["f0_floor"],
                                    f0_ceil=params["f0_ceil"], frame_period=fp)
        else:
            f0, t = pyworld.dio(xp, sr, f0_floor=params["f0_floor"], f0_ceil=params["f0_ceil"],
                                frame_period=fp)
            f0 = pyworld.stonemask(xp, f0, t, sr)
        sp = pyworld.cheaptrick(xp, f0, t, sr, fft_size=params["fft_size"])
        ap = pyworld.d4c(xp, f0, t, sr, threshold=D4C_THRESHOLD, fft_size=params["fft_size"])
        return WorldAnalysis(f0=np.ascontiguousarray(f0, dtype=np.float64),
                             sp=np.ascontiguousarray(sp), ap=np.ascontiguousarray(ap),
                             sr=int(sr), frame_period=fp, pad=pad, n_token=int(x.size),
                             fft_size=params["fft_size"], params=params)

    if cache is None:
        return compute()
    return cache.get_or_compute(analysis_key(x, sr=sr, params=params), compute)


def world_output_frames(n_samples: int, *, sr: int, frame_period: float) -> int:
    """Smallest frame count M whose last frame lies at or beyond the last output sample.

    Output frame ``j`` sits at ``j * frame_period`` ms, so M frames must satisfy
    ``(M - 1) * frame_period * sr / 1000 >= n_samples - 1``: the frames then span the whole
    slot, and the token's end is synthesised whatever the slot length (with one frame fewer,
    the last few ms of the token would never be rendered, and a slot one sample longer could
    get one frame more of the token than its neighbour).  ``pyworld.synthesize`` returns
    ``int(M * frame_period * sr / 1000)`` samples for M frames, which is then >= n_samples.
    """
    hop = frame_period * sr / 1000.0
    m = max(2, int(math.ceil((n_samples - 1) / hop)) + 1)
    while (m - 1) * hop < n_samples - 1:
        m += 1
    while m > 2 and (m - 2) * hop >= n_samples - 1:
        m -= 1
    return m


def world_resynthesize(
    ana: WorldAnalysis, *, n_samples: int, pitch_policy: str, target_hz: float | None,
    reference_f0_hz: float | None = None,
) -> tuple[np.ndarray, list[str]]:
    """Synthesise the analysed token time-scaled to exactly ``n_samples``.

    Output frame ``j`` (at ``j * frame_period``) reads the source at
    ``pad + j * frame_period * n_token / n_samples`` (the duration ratio): the log spectral
    envelope and the aperiodicity are interpolated linearly between the two nearest frames,
    voicing comes from the nearest frame, and log-F0 is interpolated over voiced frames only.
    The pitch policy then sets the voiced frames; aperiodicity is never overwritten.  For
    ``contour`` the token's height is ``reference_f0_hz`` (Praat's reading of the input, so the
    output's Praat geometric mean lands on the target), else the geometric mean of the
    token's voiced WORLD frames.

    Returns
    -------
    y : ndarray, (n_samples,)
    warnings : list of str
    """
    import pyworld

    fs, fp = ana.sr, ana.frame_period
    hop_s = fp / 1000.0
    m = world_output_frames(n_samples, sr=fs, frame_period=fp)
    n_frames = ana.f0.size
    t_out = np.arange(m) * hop_s
    t_src = ana.pad / fs + t_out * (ana.n_token / n_samples)
    idx = np.clip(t_src / hop_s, 0.0, n_frames - 1.0)
    i0 = np.floor(idx).astype(np.int64)
    i1 = np.minimum(i0 + 1, n_frames - 1)
    w = (idx - i0)[:, None]
    log_sp = np.log(np.maximum(ana.sp, 1e-300))
    sp = np.ascontiguousarray(np.exp((1.0 - w) * log_sp[i0] + w * log_sp[i1]))
    ap = np.ascontiguousarray((1.0 - w) * ana.ap[i0] + w * ana.ap[i1])
    src_voiced = ana.f0 > 0
    nearest = np.clip(np.floor(idx + 0.5).astype(np.int64), 0, n_frames - 1)
    out_voiced = src_voiced[nearest]
    f0 = np.zeros(m)
    if np.any(src_voiced) and np.any(out_voiced):
        vi = np.flatnonzero(src_voiced)
        f0[out_voiced] = np.exp(np.interp(idx[out_voiced], vi, np.log(ana.f0[vi])))
    k = np.arange(n_frames)
    lo = math.floor(ana.pad / fs / hop_s)
    hi = math.ceil((ana.pad + ana.n_token) / fs / hop_s)
    ref = ana.f0[(k >= lo) & (k <= hi) & src_voiced]
    if reference_f0_hz is not None and np.isfinite(reference_f0_hz) and reference_f0_hz > 0:
        ref = np.array([float(reference_f0_hz)])
    f0, warns = apply_pitch_policy(f0, policy=pitch_policy, target_hz=target_hz, reference=ref)
    y = pyworld.synthesize(np.ascontiguousarray(f0), sp, ap, fs, fp)
    if y.size < n_samples:  # pragma: no cover - guarded by world_output_frames
        logger.debug("WORLD returned %d samples for %d; padding", y.size, n_samples)
    return _fit_length(y, n_samples), warns


@register_backend("world")
def _world_backend(req: BackendRequest) -> BackendResult:
    ana = world_analysis(req.x, sr=req.sr, retime=req.retime, cache=req.cache)
    y, warns = world_resynthesize(ana, n_samples=req.n_samples, pitch_policy=req.pitch_policy,
                                  target_hz=req.target_hz, reference_f0_hz=req.reference_f0_hz)
    return BackendResult(samples=y, pitch_method="world", warnings=tuple(warns))


# --------------------------------------------------------------------------- cut-pad
@register_backend("cut-pad")
def _cut_pad_backend(req: BackendRequest) -> BackendResult:
    warns: list[str] = []
    if req.pitch_policy == "keep":
        y, method = req.x, "none"
    else:
        # No time change: WORLD resynthesis at the token's own length, then cut / pad.
        ana = world_analysis(req.x, sr=req.sr, retime=req.retime, cache=req.cache)
        y, w = world_resynthesize(ana, n_samples=req.x.size, pitch_policy=req.pitch_policy,
                                  target_hz=req.target_hz, reference_f0_hz=req.reference_f0_hz)
        warns += w
        method = "world"
    if req.x.size > req.n_samples:
        cut = (req.x.size - req.n_samples) / req.sr
        warns.append(
            f"cut-pad: token is {req.x.size / req.sr * 1000:.1f} ms, slot "
            f"{req.n_samples / req.sr * 1000:.1f} ms: the last {cut * 1000:.1f} ms were cut"
        )
    return BackendResult(samples=_fit_length(y, req.n_samples), pitch_method=method,
                         warnings=tuple(warns))


# --------------------------------------------------------------------------- overlap-add
def _praat_seed(x: np.ndarray) -> int:
    return int(hashlib.sha256(np.ascontiguousarray(x).tobytes()).hexdigest()[:7], 16)


@register_backend("overlap-add", factor_limits=PSOLA_FACTOR_LIMITS)
def _overlap_add_backend(req: BackendRequest) -> BackendResult:
    import parselmouth
    from parselmouth.praat import call

    n_tok = req.x.size
    factor = req.n_samples / n_tok
    lo, hi = PSOLA_FACTOR_LIMITS
    if not (lo - _FACTOR_EPS <= factor <= hi + _FACTOR_EPS):
        raise RetimeError(
            f"overlap-add: token {req.token_id!r} needs stretch factor {factor:.3f}, beyond what "
            f"Praat's overlap-add can do ({lo:.3f}..{hi:g}); use backend 'world' or 'cut-pad'"
        )
    pad = window_samples(ANALYSIS_PAD_S, sr=req.sr)
    xp = np.concatenate([np.zeros(pad), req.x, np.zeros(pad)])
    warns: list[str] = []
    with _PRAAT_LOCK:
        try:
            parselmouth.praat.run(
                f"random_initializeWithSeedUnsafelyButPredictably ({_praat_seed(req.x)})"
            )
            snd = parselmouth.Sound(xp, sampling_frequency=float(req.sr))
            t0, t1 = snd.xmin, snd.xmax
            manip = call(snd, "To Manipulation", 0.01, float(req.retime.f0_floor),
                         float(req.retime.f0_ceil))
            dur = call("Create DurationTier", "duration", t0, t1)
            call(dur, "Add point", t0, float(factor))
            call([manip, dur], "Replace duration tier")
            method = "none"
            if req.pitch_policy != "keep":
                method = "praat-psola"
                if req.target_hz is None:
                    raise RetimeError(
                        f"pitch.policy {req.pitch_policy!r} needs a target F0: set "
                        "pitch.target_hz or pass target_f0"
                    )
                tier = call(manip, "Extract pitch tier")
                n_pts = int(call(tier, "Get number of points"))
                if n_pts == 0:
                    warns.append(f"pitch policy {req.pitch_policy!r}: no voiced frame, "
                                 "nothing to change")
                elif req.pitch_policy == "flat":
                    flat = call("Create PitchTier", "flat", t0, t1)
                    call(flat, "Add point", 0.5 * (t0 + t1), float(req.target_hz))
                    call([manip, flat], "Replace pitch tier")
                else:
                    vals = np.array([call(tier, "Get value at index", i + 1)
                                     for i in range(n_pts)], dtype=np.float64)
                    ref = req.reference_f0_hz
                    if ref is None or not np.isfinite(ref) or ref <= 0:
                        ref = geometric_mean(vals[vals > 0])
                    ratio = float(req.target_hz) / float(ref)
                    call(tier, "Multiply frequencies", t0, t1, ratio)
                    call([manip, tier], "Replace pitch tier")
            out = call(manip, "Get resynthesis (overlap-add)")
            y = np.asarray(out.values[0], dtype=np.float64).copy()
        except parselmouth.PraatError as exc:
            raise RetimeError(
                f"overlap-add: Praat failed on token {req.token_id!r}: {str(exc).strip()}"
            ) from None
        finally:
            parselmouth.praat.run("random_initializeSafelyAndUnpredictably ()")
    start = int(round(pad * factor))
    return BackendResult(samples=_fit_length(y[start:], req.n_samples), pitch_method=method,
                         warnings=tuple(warns))


# =========================================================================== planning
@dataclass(frozen=True)
class _Plan:
    backend: str
    factor: float  # N / len(token)
    warnings: tuple[str, ...]
    problem: str | None  # "range" or "limit" when the token cannot be processed


def _plan(n_token: int, n_samples: int, retime: RetimeSpec) -> _Plan:
    factor = n_samples / n_token
    backend = retime.backend
    warns: list[str] = []
    if backend not in BACKENDS:
        raise RetimeError(
            f"retime.backend: unknown backend {backend!r}; available: {sorted(BACKENDS)}"
        )
    lo, hi = retime.stretch_range
    if backend != "cut-pad" and not (lo - _FACTOR_EPS <= factor <= hi + _FACTOR_EPS):
        msg = f"stretch factor {factor:.3f} outside retime.stretch_range [{lo:g}, {hi:g}]"
        if retime.out_of_range == "error":
            return _Plan(backend, factor, (), "range")
        if retime.out_of_range == "warn":
            warns.append(msg + ": stretched anyway (out_of_range: warn)")
        else:
            warns.append(msg + ": fell back to cut-pad (out_of_range: cut-pad)")
            backend = "cut-pad"
    limits = _FACTOR_LIMITS.get(backend)
    if limits is not None and not (limits[0] - _FACTOR_EPS <= factor <= limits[1] + _FACTOR_EPS):
        return _Plan(backend, factor, tuple(warns), "limit")
    return _Plan(backend, factor, tuple(warns), None)


def _raise_plan_problems(rows: list[tuple[str, int, int, _Plan]], retime: RetimeSpec) -> None:
    rng = [r for r in rows if r[3].problem == "range"]
    lim = [r for r in rows if r[3].problem == "limit"]
    parts = []
    if rng:
        lo, hi = retime.stretch_range
        listing = "; ".join(f"{tid!r} ({n_tok} -> {n} samples): {p.factor:.3f}"
                            for tid, n_tok, n, p in rng)
        parts.append(
            f"{len(rng)} token/slot pair(s) need a stretch factor outside retime.stretch_range "
            f"[{lo:g}, {hi:g}]: {listing}. Fix: widen retime.stretch_range, set "
            "retime.out_of_range to 'warn' or 'cut-pad', or use tokens closer to the slot"
        )
    if lim:
        listing = "; ".join(f"{tid!r} ({n_tok} -> {n} samples): {p.factor:.3f}"
                            for tid, n_tok, n, p in lim)
        parts.append(
            f"{len(lim)} token/slot pair(s) exceed the backend's stretch limits (overlap-add: "
            f"{PSOLA_FACTOR_LIMITS[0]:.3f}..{PSOLA_FACTOR_LIMITS[1]:g}): {listing}. Fix: use "
            "retime.backend 'world', or out_of_range 'cut-pad' with a narrower stretch_range"
        )
    if parts:
        raise RetimeError("retime: " + " | ".join(parts))


def _resolve_target(pitch: PitchSpec, target_f0: float | None) -> float | None:
    if pitch.policy == "keep":
        return None
    if pitch.target_hz is not None:
        return float(pitch.target_hz)
    return None if target_f0 is None else float(target_f0)


# =========================================================================== one token
@dataclass
class _Partial:
    n_samples: int
    samples: np.ndarray  # after fade and the token's own gain (before the set gain)
    backend: str
    factor: float
    pitch_method: str
    gain_db: float
    align_shift_s: float
    warnings: list[str]
    f0_after: float = float("nan")
    f0_sd_after: float = float("nan")


def rise_time(y: np.ndarray, *, sr: int) -> float:
    """Latency (s) of the steepest envelope rise used by ``steepest-rise`` alignment.

    :func:`stimforge.acoustics.steepest_rise_time` with ``ALIGN_SMOOTH_S`` smoothing (the same
    measure the acoustic check reports per position).
    """
    return steepest_rise_time(y, sr=sr, smooth=ALIGN_SMOOTH_S)


def _align(
    y: np.ndarray, *, sr: int, retime: RetimeSpec, level: LevelSpecPolicy,
) -> tuple[np.ndarray, int, list[str]]:
    n = y.size
    warns: list[str] = []
    if retime.align == "onset":
        b = active_bounds(y, sr=sr, threshold_db=retime.onset_threshold_db)
        shift = 0 if b is None else -b[0]
    else:
        r = rise_time(y, sr=sr)
        shift = 0 if not np.isfinite(r) else seconds_to_samples(retime.align_offset - r, sr=sr)
    shift = max(-n + 1, min(n - 1, shift))
    if shift == 0:
        return y, 0, warns
    act = active_mask(y, sr=sr, threshold_db=level.active_threshold_db)
    if shift > 0:
        lost = int(np.count_nonzero(act[n - shift:]))
        out = np.concatenate([np.zeros(shift), y[: n - shift]])
        where = "end"
    else:
        lost = int(np.count_nonzero(act[:-shift]))
        out = np.concatenate([y[-shift:], np.zeros(-shift)])
        where = "start"
    if lost and retime.align == "steepest-rise":
        hint = ("raise retime.align_offset" if where == "start" else "lower retime.align_offset")
        warns.append(f"steepest-rise alignment cut {lost / sr * 1000:.1f} ms of active signal at "
                     f"the {where} of the slot ({hint})")
    return out, shift, warns


def _process_one(
    x: np.ndarray, *, sr: int, n_samples: int, plan: _Plan, retime: RetimeSpec,
    pitch: PitchSpec, level: LevelSpecPolicy, target_hz: float | None,
    cache: AnalysisCache | None, token_id: str,
) -> _Partial:
    """Backend, alignment, fade and the token's own gain; Praat F0 of the result."""
    ref = None
    if pitch.policy == "contour":
        ref = _praat_in_context(x, sr=sr).geometric_mean_hz
        ref = float(ref) if np.isfinite(ref) else None
    req = BackendRequest(x=x, sr=sr, n_samples=n_samples, retime=retime,
                         pitch_policy=pitch.policy, target_hz=target_hz, cache=cache,
                         token_id=token_id, reference_f0_hz=ref)
    res = BACKENDS[plan.backend](req)
    y = np.asarray(res.samples, dtype=np.float64)
    if y.size != n_samples:  # a backend broke its contract
        raise RetimeError(f"backend {plan.backend!r} returned {y.size} samples for token "
                          f"{token_id!r}, not {n_samples}")
    warns = list(plan.warnings) + list(res.warnings)
    y, shift, w = _align(y, sr=sr, retime=retime, level=level)
    warns += w
    y = apply_fade(y, sr=sr, fade=level.fade)
    try:
        gain = level_gain_db(y, sr=sr, target_dbfs=level.target_dbfs,
                             threshold_db=level.active_threshold_db)
    except AudioInputError:
        raise AudioInputError(
            f"token {token_id!r}: silent after re-timing to {n_samples} samples; check the token"
        ) from None
    y = y * 10.0 ** (gain / 20.0)
    part = _Partial(n_samples=n_samples, samples=y, backend=plan.backend,
                    factor=1.0 if plan.backend == "cut-pad" else plan.factor,
                    pitch_method=res.pitch_method, gain_db=gain, align_shift_s=shift / sr,
                    warnings=warns)
    s = _praat_in_context(y, sr=sr)  # Praat F0 does not depend on the gain
    part.f0_after, part.f0_sd_after = s.median_hz, s.sd_st
    return part


def _praat_in_context(x: np.ndarray, *, sr: int):
    """Praat F0 of a token or slot, read with ``F0_CONTEXT_S`` of silence either side.

    Praat's frames cannot reach the first and last ~20 ms of an unpadded clip; reading input
    and output with the same silent context makes "before" and "after" comparable.
    """
    return f0_summary(x, sr=sr, context=F0_CONTEXT_S)


def _as_cache(cache: AnalysisCache | str | Path | None) -> AnalysisCache:
    if isinstance(cache, AnalysisCache):
        return cache
    return AnalysisCache(cache)


def retime_token(
    x: np.ndarray,
    *,
    sr: int,
    n_samples: int,
    retime: RetimeSpec,
    pitch: PitchSpec,
    level: LevelSpecPolicy,
    target_f0: float | None,
    token_id: str = "",
    label: str = "",
    cache: AnalysisCache | str | Path | None = None,
) -> ProcessedToken:
    """Re-time one token to exactly ``n_samples`` with the pitch and level policies.

    Parameters
    ----------
    x : ndarray, (n,), mono
        The (trimmed) token at ``sr``.
    sr : int, Hz
    n_samples : int, samples >= 2
        Slot length.
    retime, pitch, level : RetimeSpec, PitchSpec, LevelSpecPolicy
    target_f0 : float or None, Hz
        Pitch target when ``pitch.target_hz`` is not set (the build passes the corpus
        median, :meth:`stimforge.corpus.Corpus.median_f0`); ``pitch.target_hz`` wins.
    token_id, label : str
        For records and error messages.
    cache : AnalysisCache, path or None
        WORLD analysis cache; ``None`` keeps the analysis in memory only.

    Returns
    -------
    ProcessedToken
        ``samples`` has exactly ``n_samples`` samples; the peak guard applies to the token
        alone (use :func:`process_tokens` for the set-wide guard).

    Raises
    ------
    AudioInputError
        NaN, empty, 2-D, silent or too-short input.
    RetimeError
        Stretch factor out of range under ``out_of_range: error``, beyond the overlap-add
        limit, or a pitch policy without a target.

    Examples
    --------
    >>> import numpy as np
    >>> from stimforge.recipe import RetimeSpec, PitchSpec, LevelSpecPolicy
    >>> sr = 16000; t = np.arange(3200) / sr
    >>> x = 0.3 * np.sin(2 * np.pi * 150 * t)
    >>> p = retime_token(x, sr=sr, n_samples=4000, retime=RetimeSpec(backend="cut-pad"),
    ...                  pitch=PitchSpec(policy="keep"), level=LevelSpecPolicy(),
    ...                  target_f0=None)
    >>> p.samples.size, float(p.samples[0]), float(p.samples[-1])
    (4000, 0.0, 0.0)
    >>> round(p.record.rms_after_dbfs, 6)
    -26.0
    """
    x = _validate_token(x, sr=sr, token_id=token_id)
    n_samples = _check_length(n_samples)
    plan = _plan(x.size, n_samples, retime)
    _raise_plan_problems([(token_id, x.size, n_samples, plan)], retime)
    target = _resolve_target(pitch, target_f0)
    if pitch.policy != "keep" and target is None:
        raise RetimeError(
            f"pitch.policy {pitch.policy!r} needs a target F0: set pitch.target_hz, or pass "
            "target_f0 (e.g. the corpus median, Corpus.median_f0())"
        )
    part = _process_one(x, sr=sr, n_samples=n_samples, plan=plan, retime=retime, pitch=pitch,
                        level=level, target_hz=target, cache=_as_cache(cache), token_id=token_id)
    set_gain = peak_guard_gain_db([peak_dbfs(part.samples)], ceiling_dbfs=level.peak_ceiling_dbfs)
    warns = list(part.warnings)
    if set_gain < 0:
        warns.append(f"peak guard: lowered by {-set_gain:.2f} dB to stay at or below "
                     f"{level.peak_ceiling_dbfs:g} dBFS")
    y = part.samples * 10.0 ** (set_gain / 20.0)
    rec = _record(x, y, part, sr=sr, token_id=token_id, label=label, level=level,
                  set_gain=set_gain, warnings=warns, f0_before=_praat_in_context(x, sr=sr).median_hz)
    y.setflags(write=False)
    return ProcessedToken(samples=y, record=rec)


def _check_length(n: Any) -> int:
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 2:
        raise RetimeError(f"slot length must be an integer number of samples >= 2, got {n!r}")
    return int(n)


def _record(x, y, part: _Partial, *, sr, token_id, label, level, set_gain, warnings,
            f0_before) -> TokenRecord:
    return TokenRecord(
        token_id=str(token_id), label=str(label), backend=part.backend,
        n_samples=int(y.size), n_token=int(x.size), stretch_factor=float(part.factor),
        f0_before_hz=float(f0_before), f0_after_hz=float(part.f0_after),
        f0_sd_after_st=float(part.f0_sd_after),
        rms_before_dbfs=active_rms_dbfs(x, sr=sr, threshold_db=level.active_threshold_db),
        rms_after_dbfs=active_rms_dbfs(y, sr=sr, threshold_db=level.active_threshold_db),
        gain_db=float(part.gain_db), set_gain_db=float(set_gain), peak_after_dbfs=peak_dbfs(y),
        clipped_samples=int(np.count_nonzero(np.abs(y) >= 1.0)),
        align_shift_s=float(part.align_shift_s), pitch_method=part.pitch_method,
        warnings=tuple(warnings),
    )


# =========================================================================== the set
def _worker(payload: dict[str, Any]) -> tuple[_Partial, float]:
    """Process one token (runs in a worker process or inline): its part and Praat F0 before."""
    x, sr = payload["x"], payload["sr"]
    part = _process_one(x, sr=sr, n_samples=payload["n_samples"], plan=payload["plan"],
                        retime=payload["retime"], pitch=payload["pitch"],
                        level=payload["level"], target_hz=payload["target_hz"],
                        cache=AnalysisCache(payload["cache_dir"]), token_id=payload["token_id"])
    return part, _praat_in_context(x, sr=sr).median_hz


def _cache_dir(retime: RetimeSpec) -> Path | None:
    """The analysis cache folder the recipe asks for (None: in memory only)."""
    if not retime.cache:
        return None
    return Path(retime.cache_dir) if retime.cache_dir is not None else default_cache_dir()


def _validated_arrays(tokens: list[Any], *, sr: int) -> tuple[list[str], list[np.ndarray]]:
    """Token ids and validated float64 arrays; one error listing every unusable token."""
    if not tokens:
        raise RetimeError("process_tokens: no tokens given")
    ids = [str(t.id) for t in tokens]
    dup = sorted({i for i in ids if ids.count(i) > 1})
    if dup:
        raise RetimeError(f"process_tokens: token ids must be unique; repeated: {dup}")
    arrays, bad = [], []
    for t in tokens:
        t_sr = getattr(t, "sr", sr)
        if t_sr != sr:
            bad.append(f"token {t.id!r}: sample rate {t_sr} Hz, expected {sr} Hz")
            continue
        try:
            arrays.append(_validate_token(t.samples, sr=sr, token_id=str(t.id)))
        except AudioInputError as exc:
            bad.append(str(exc))
    if bad:
        raise AudioInputError(f"{len(bad)} unusable token(s): " + "; ".join(bad))
    return ids, arrays


def _set_target(pitch: PitchSpec, target_f0: float | None) -> tuple[float | None, list[str]]:
    """The pitch target of the set, and a warning when an argument was overridden."""
    warns = []
    target = _resolve_target(pitch, target_f0)
    if pitch.policy != "keep":
        if pitch.target_hz is not None and target_f0 is not None and \
                abs(float(target_f0) - float(pitch.target_hz)) > 1e-9:
            warns.append(f"pitch.target_hz {pitch.target_hz:g} Hz used; the target_f0 "
                         f"argument {target_f0:g} Hz was ignored")
        if target is None:
            raise RetimeError(
                f"pitch.policy {pitch.policy!r} needs a target F0: set pitch.target_hz, or pass "
                "target_f0 (the build passes the corpus median, Corpus.median_f0())")
    return target, warns


def _run_workers(payloads: list[dict[str, Any]], *, jobs: int, progress: bool) -> list[Any]:
    """Run :func:`_worker` over the payloads, in order, on ``jobs`` processes."""
    from tqdm.auto import tqdm

    results: list[Any] = [None] * len(payloads)
    bar = tqdm(total=len(payloads), desc="re-timing tokens", unit="token", disable=not progress)
    try:
        if jobs > 1 and len(payloads) > 1:
            import multiprocessing as mp
            from concurrent.futures import ProcessPoolExecutor, as_completed

            ctx = mp.get_context("spawn")
            ex = ProcessPoolExecutor(max_workers=min(int(jobs), len(payloads)), mp_context=ctx)
            try:
                futs = {ex.submit(_worker, p): i for i, p in enumerate(payloads)}
                for fut in as_completed(futs):
                    results[futs[fut]] = fut.result()
                    bar.update(1)
            except BaseException:
                # an error, Ctrl-C or SIGTERM: drop the tokens not started, do not wait for them
                ex.shutdown(wait=False, cancel_futures=True)
                raise
            ex.shutdown(wait=True)
        else:
            for i, p in enumerate(payloads):
                results[i] = _worker(p)
                bar.update(1)
    finally:
        bar.close()
    return results


def process_tokens(
    tokens: Iterable[Any],
    *,
    sr: int,
    n_samples: int,
    retime: RetimeSpec,
    pitch: PitchSpec,
    level: LevelSpecPolicy,
    target_f0: float | None = None,
    jobs: int | None = None,
    progress: bool = True,
) -> ProcessedSet:
    """Re-time every token to exactly ``n_samples``, with the set-wide peak guard.

    Parameters
    ----------
    tokens : iterable
        Objects with ``.id``, ``.label`` and ``.samples`` (1-D, at ``sr``); ids unique.
    sr : int, Hz
    n_samples : int, samples >= 2
        The slot length (the rate table's shorter slot where it has two).
    retime, pitch, level : RetimeSpec, PitchSpec, LevelSpecPolicy
        The recipe's sections; the alignment threshold, the analysis cache folder
        (``retime.cache``, ``retime.cache_dir``, else the user cache folder) and the number of
        workers (``retime.jobs``) come from ``retime``.
    target_f0 : float or None, Hz
        Pitch target if ``pitch.target_hz`` is unset (the build passes the corpus median,
        :meth:`stimforge.corpus.Corpus.median_f0`); needed unless the policy is ``keep``.
    jobs : int, optional
        Overrides ``retime.jobs`` (results are identical for any value).
    progress : bool
        Show a tqdm progress bar.

    Returns
    -------
    ProcessedSet

    Raises
    ------
    AudioInputError
        Listing every unusable token (NaN, empty, silent, too short).
    RetimeError
        Listing every token whose stretch factor breaks the policy or a backend limit; a
        pitch policy without a target.
    """
    tokens = list(tokens)
    n = _check_length(n_samples)
    ids, arrays = _validated_arrays(tokens, sr=sr)
    plans = [_plan(x.size, n, retime) for x in arrays]
    _raise_plan_problems([(tid, x.size, n, pl) for tid, x, pl in zip(ids, arrays, plans)], retime)
    target, set_warnings = _set_target(pitch, target_f0)
    cdir = _cache_dir(retime)
    payloads = [
        {"x": x, "sr": sr, "n_samples": n, "plan": pl, "retime": retime, "pitch": pitch,
         "level": level, "target_hz": target, "cache_dir": cdir, "token_id": tid}
        for tid, x, pl in zip(ids, arrays, plans)
    ]
    results = _run_workers(payloads, jobs=int(retime.jobs if jobs is None else jobs),
                           progress=progress)

    peaks = [peak_dbfs(part.samples) for part, _ in results]
    set_gain = peak_guard_gain_db(peaks, ceiling_dbfs=level.peak_ceiling_dbfs)
    if set_gain < 0:
        msg = (f"peak guard: a token would peak at {max(peaks):.2f} dBFS, above "
               f"loudness.peak_ceiling_dbfs {level.peak_ceiling_dbfs:g}: the whole set was lowered "
               f"by {-set_gain:.2f} dB (active RMS now {level.target_dbfs + set_gain:.2f} dBFS)")
        logger.warning(msg)
        set_warnings.append(msg)
    scale = 10.0 ** (set_gain / 20.0)
    samples: dict[str, np.ndarray] = {}
    records: list[TokenRecord] = []
    token_warnings: list[str] = []
    for t, tid, x, (part, f0_before) in zip(tokens, ids, arrays, results):
        y = part.samples * scale
        y.setflags(write=False)
        samples[tid] = y
        token_warnings += [f"{tid}: {w}" for w in part.warnings]
        records.append(_record(x, y, part, sr=sr, token_id=tid, label=getattr(t, "label", ""),
                               level=level, set_gain=set_gain, warnings=part.warnings,
                               f0_before=f0_before))
    top = max(peak_dbfs(y) for y in samples.values())
    headroom = float(level.peak_ceiling_dbfs - top)
    logger.info("re-timed %d token(s) to %d samples; set gain %.2f dB; headroom %.2f dB below "
                "the %g dBFS ceiling", len(records), n, set_gain, headroom,
                level.peak_ceiling_dbfs)
    return ProcessedSet(records=records, n_samples=n, target_f0=target, set_gain_db=set_gain,
                        headroom_db=headroom, warnings=set_warnings + token_warnings,
                        _samples=samples)

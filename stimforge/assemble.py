"""Sample-exact trial assembly: processed tokens placed on the unit grid, and the unit tables.

Unit ``k`` of a trial starts at sample ``S + round_half_up(k * T * fs)`` of the file, where
``S`` is the leading silence in samples; its slot is ``start(k+1) - start(k)`` samples long and
the processed token (rendered once, at the shorter slot length) fills it.  Onsets never drift, however long the
trial.  Memory: one trial at a time.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from .grid import RateTable
from .timing import seconds_to_samples, table_seconds, unit_start

__all__ = ["trial_layout", "assemble_trial", "unit_rows", "fit_to_slot"]


def fit_to_slot(token: np.ndarray, n_samples: int) -> np.ndarray:
    """A processed token placed in a slot of ``n_samples``: zeros appended at its end.

    When ``T * fs`` is not whole, slots are ``floor(T*fs)`` or ``ceil(T*fs)`` samples long and
    the two lengths alternate with position (at 22.05 kHz and 250 ms, even slots are 5513 and
    odd slots 5512 samples).  So that this cannot become a cue, every token is rendered once,
    at the shorter length, and a longer slot gets one trailing zero sample: a token sounds the
    same in every slot, and its onset is on the grid.
    """
    extra = int(n_samples) - token.size
    if extra < 0 or extra > 1:
        raise ValueError(f"token of {token.size} samples cannot fill a slot of {n_samples}")
    return np.concatenate([token, np.zeros(extra)]) if extra else token


def trial_layout(rates: RateTable) -> tuple[int, np.ndarray, int]:
    """Return (leading silence samples, unit start samples incl. the end, total samples).

    ``starts`` has ``units_per_trial + 1`` entries: ``starts[k]`` is unit k's first sample in
    the file and ``starts[-1]`` the end of the last unit.
    """
    lead = seconds_to_samples(rates.silence_before, sr=rates.sr)
    T = rates.rows[0].period
    starts = np.array(
        [lead + unit_start(k, unit_duration=T, sr=rates.sr) for k in range(rates.units_per_trial + 1)],
        dtype=np.int64,
    )
    total = int(starts[-1]) + seconds_to_samples(rates.silence_after, sr=rates.sr)
    return lead, starts, total


def assemble_trial(
    units: list[tuple[str, bool]] | tuple,
    *,
    get: Callable[[str], np.ndarray],
    rates: RateTable,
) -> np.ndarray:
    """Place each unit's processed token at its grid onset.

    Parameters
    ----------
    units : sequence of (token_id, reversed)
        One entry per unit of the trial, lead-in first.
    get : callable token_id -> ndarray
        Returns the processed token, rendered once at the shorter slot length: it fills a
        slot of that length exactly, a slot one sample longer with a trailing zero (reversed
        first if asked, see :func:`fit_to_slot`).
    rates : RateTable
        Grid, sample rate and silences.

    Returns
    -------
    ndarray, float64, shape (rates.trial_samples,)
    """
    _, starts, total = trial_layout(rates)
    if len(units) != rates.units_per_trial:
        raise ValueError(f"trial has {len(units)} units, the rate table expects {rates.units_per_trial}")
    out = np.zeros(total, dtype=np.float64)
    for k, (token_id, rev) in enumerate(units):
        a, b = int(starts[k]), int(starts[k + 1])
        seg = np.asarray(get(token_id))
        if seg.ndim != 1 or seg.size not in (b - a, b - a - 1):
            raise ValueError(f"token {token_id!r}: processed length {seg.shape} != slot {b - a}")
        out[a:b] = fit_to_slot(seg[::-1] if rev else seg, b - a)
    return out


def unit_rows(
    plan: Any,
    *,
    stim_file: str,
    rates: RateTable,
) -> list[dict[str, Any]]:
    """Rows of units.tsv for one trial: every unit of every level (lead-in included, flagged).

    ``plan`` is a :class:`stimforge.design.TrialPlan`; the tiling is
    :func:`stimforge.design.level_units`, to which this adds onsets and durations in seconds.
    """
    from .design import level_units

    _, starts, _ = trial_layout(rates)
    sr = rates.sr
    return [
        {
            "stim_file": stim_file,
            "condition": plan.condition,
            "trial": plan.trial,
            "level": u.level,
            "index": u.index,
            "position": u.position,
            "label": u.label,
            "onset": table_seconds(starts[u.first_unit], sr=sr),
            "duration": table_seconds(starts[u.first_unit + u.n_units] - starts[u.first_unit],
                                      sr=sr),
            "token": u.token,
            "lead_in": int(u.lead_in),
            "reversed": int(u.reversed),
        }
        for u in level_units(plan, rates=rates)
    ]

"""Grid placement without the rest of the pipeline."""

from __future__ import annotations

import warnings
from types import SimpleNamespace

import numpy as np
import pytest

from stimforge.assemble import assemble_trial, fit_to_slot, trial_layout, unit_rows
from stimforge.grid import RateWarning, rate_table


def _rates(sr, n_top, T=0.25, levels=(("word", 2), ("line", 2)), lead_in=False, sb=0.0, sa=0.0,
           unit="syllable"):
    with warnings.catch_warnings():  # short windows put rates close together: not the point here
        warnings.simplefilter("ignore", RateWarning)
        return rate_table(unit_name=unit, unit_duration=T, levels=list(levels), sr=sr,
                          n_top_groups=n_top, lead_in=lead_in, silence_before=sb,
                          silence_after=sa)


@pytest.mark.parametrize("sr", [16000, 22050, 44100, 48000])
def test_an_hour_without_drift(sr):
    # one hour of 250 ms units = 14400 units; the last onset is exactly 3600 * sr samples after
    # the first, and every onset is within half a sample of k * T * fs (calc)
    rt = _rates(sr, 3600)
    lead, starts, total = trial_layout(rt)
    assert lead == 0 and len(starts) == 14401
    assert starts[-1] == 3600 * sr
    k = np.arange(14401)
    assert np.max(np.abs(starts - k * 0.25 * sr)) <= 0.5
    assert set(np.diff(starts)) == set(rt.slot_lengths)


def test_placement_and_reversal():
    rt = _rates(22050, 1, sb=0.1, sa=0.2)
    lead, starts, total = trial_layout(rt)
    assert lead == 2205 and total == 2205 + 22050 + 4410  # 0.1 s, 1 s, 0.2 s at 22.05 kHz (calc)

    slot = int(np.diff(starts).min())  # 22050 / 4: every slot is 5512 or 5513 samples

    def get(token_id):
        return np.linspace(0.1, 0.2, slot) * (1 + int(token_id))

    units = [(str(i), i == 2) for i in range(4)]
    x = assemble_trial(units, get=get, rates=rt)
    assert x.shape == (total,)
    assert not np.any(x[:lead]) and not np.any(x[starts[-1]:])
    for i in range(4):
        seg = x[starts[i]:starts[i + 1]]
        ref = fit_to_slot(get(str(i))[::-1] if i == 2 else get(str(i)), starts[i + 1] - starts[i])
        np.testing.assert_array_equal(seg, ref)
    with pytest.raises(ValueError, match="trial has 3 units"):
        assemble_trial(units[:3], get=get, rates=rt)
    with pytest.raises(ValueError, match="processed length"):
        assemble_trial(units, get=lambda t: np.zeros(slot + 2), rates=rt)
    with pytest.raises(ValueError, match="processed length"):
        assemble_trial(units, get=lambda t: np.zeros(slot - 2), rates=rt)


def test_one_rendering_for_both_slot_lengths():
    """250 ms at 22.05 kHz: slots of 5513 and 5512 samples alternate with position (calc).
    A token rendered once at 5512 sounds the same in both: a 5513 slot gets a trailing zero,
    and a reversed token is reversed before that, so its onset is on the grid too."""
    rt = _rates(22050, 1)
    _, starts, _ = trial_layout(rt)
    assert list(np.diff(starts)[:4]) == [5513, 5512, 5513, 5512]
    tok = np.sin(np.linspace(0, np.pi, 5512)) + 0.1  # nonzero at both ends, to see placement
    x = assemble_trial([("a", False), ("a", False), ("a", True), ("a", True)],
                       get=lambda t: tok, rates=rt)
    np.testing.assert_array_equal(x[starts[0]:starts[0] + 5512], tok)
    np.testing.assert_array_equal(x[starts[1]:starts[1] + 5512], tok)
    assert x[starts[1] - 1] == 0.0  # the 5513 slot's trailing zero
    np.testing.assert_array_equal(x[starts[2]:starts[2] + 5512], tok[::-1])
    np.testing.assert_array_equal(x[starts[3]:starts[3] + 5512], tok[::-1])
    assert np.array_equal(fit_to_slot(tok, 5513), np.r_[tok, 0.0])
    with pytest.raises(ValueError, match="cannot fill a slot"):
        fit_to_slot(tok, 5514)


def test_unit_rows_positions():
    rt = _rates(16000, 2, levels=(("word", 3), ("line", 2)), lead_in=True, unit="syl")
    U = SimpleNamespace
    plan = U(condition="c", trial=1, lead_in_units=6,
             units=tuple(U(label=f"s{i}", token_id=f"t{i}", reversed=False) for i in range(18)))
    rows = unit_rows(plan, stim_file="stimuli/c_001.wav", rates=rt)
    syl = [r for r in rows if r["level"] == "syl"]
    words = [r for r in rows if r["level"] == "word"]
    lines = [r for r in rows if r["level"] == "line"]
    assert [r["position"] for r in syl[:6]] == [1, 2, 3, 1, 2, 3]
    assert [r["position"] for r in words] == [1, 2, 1, 2, 1, 2]
    assert [r["position"] for r in lines] == [1, 2, 3]
    assert [r["lead_in"] for r in lines] == [1, 0, 0]
    assert words[1]["label"] == "s3-s4-s5" and words[1]["onset"] == pytest.approx(0.75)
    assert lines[2]["duration"] == pytest.approx(1.5) and lines[2]["token"] is None

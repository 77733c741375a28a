"""Pitch policies on F0 tracks, level, the set-wide peak guard, fades and the corpus target."""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import pytest

from stimforge.acoustics import active_mask, rms_dbfs
from stimforge.errors import AudioInputError, RetimeError
from stimforge.prosody import (
    active_rms_dbfs,
    apply_fade,
    apply_pitch_policy,
    geometric_mean,
    level_gain_db,
    peak_guard_gain_db,
)
from stimforge.recipe import LevelSpecPolicy, PitchSpec, RetimeSpec
from stimforge.retime import process_tokens

SEED = 1202  # the one seed of this module's random signals



@dataclass(frozen=True)
class Tok:
    id: str
    label: str
    samples: np.ndarray


def tone(sr: int, dur: float, f0: float, amp: float, n_harm: int = 10,
         ramp: float = 0.01) -> np.ndarray:
    """Steady harmonic complex with linear ramps, peak ``amp``."""
    n = int(round(dur * sr))
    t = np.arange(n) / sr
    x = sum((0.6 ** k) * np.sin(2 * np.pi * (k + 1) * f0 * t) for k in range(n_harm))
    env = np.clip(np.minimum(t / ramp, (dur - t) / ramp), 0, 1)
    return amp * x * env / np.max(np.abs(x))


# --------------------------------------------------------------------------- pitch on tracks
def test_flat_sets_voiced_only():
    f0 = np.array([0, 100, 120, 0, 140, 0.0])
    out, w = apply_pitch_policy(f0, policy="flat", target_hz=130.0)
    np.testing.assert_array_equal(out, [0, 130, 130, 0, 130, 0])  # calc
    assert w == []


def test_level_keeps_ratios_and_hits_geometric_mean():
    f0 = np.array([0, 100, 150, 0, 200, 0.0])
    out, _ = apply_pitch_policy(f0, policy="level", target_hz=120.0)
    v = out > 0
    assert geometric_mean(out[v]) == pytest.approx(120.0)  # calc
    np.testing.assert_allclose(out[v] / out[v][0], f0[v] / f0[v][0])  # shape kept
    assert np.all(out[~v] == 0)
    # an explicit reference height (e.g. Praat's reading of the token)
    out2, _ = apply_pitch_policy(f0, policy="level", target_hz=120.0, reference=np.array([60.0]))
    np.testing.assert_allclose(out2[v], f0[v] * 2.0)  # 120 / 60 (calc)


def test_keep_and_all_unvoiced():
    f0 = np.array([0, 100, 0.0])
    np.testing.assert_array_equal(apply_pitch_policy(f0, policy="keep", target_hz=None)[0], f0)
    out, w = apply_pitch_policy(np.zeros(4), policy="flat", target_hz=120.0)
    assert np.all(out == 0) and "no voiced frame" in w[0]


@pytest.mark.parametrize(
    "policy, target, match",
    [("flat", None, "needs a target"), ("level", -5.0, "needs a target"),
     ("wobble", 100.0, "unknown policy")],
)
def test_pitch_policy_errors(policy, target, match):
    with pytest.raises(RetimeError, match=match):
        apply_pitch_policy(np.array([100.0]), policy=policy, target_hz=target)


# --------------------------------------------------------------------------- level
def test_active_rms_ignores_silence():
    sr = 16000
    x = tone(sr, 0.1, 150.0, 0.5)
    padded = np.concatenate([np.zeros(3200), x, np.zeros(3200)])
    # plain RMS drops by 10*log10(5) = 6.99 dB with 4x the length in silence (calc)
    assert rms_dbfs(padded) == pytest.approx(rms_dbfs(x) - 6.99, abs=0.01)
    # ... the active-part RMS does not (0.1 dB: the 5 ms smoother sees zeros beyond the ends
    # of the unpadded clip, calc)
    assert active_rms_dbfs(padded, sr=sr, threshold_db=-30) == pytest.approx(
        active_rms_dbfs(x, sr=sr, threshold_db=-30), abs=0.1)


def test_level_gain_and_silence():
    sr = 16000
    x = tone(sr, 0.2, 150.0, 0.1)
    g = level_gain_db(x, sr=sr, target_dbfs=-20.0, threshold_db=-30.0)
    y = x * 10 ** (g / 20)
    assert active_rms_dbfs(y, sr=sr, threshold_db=-30.0) == pytest.approx(-20.0, abs=1e-9)
    with pytest.raises(AudioInputError, match="silent"):
        level_gain_db(np.zeros(100), sr=sr, target_dbfs=-20.0, threshold_db=-30.0)


@pytest.mark.parametrize("backend", ("world", "cut-pad", "overlap-add"))
def test_set_levels_fades_and_full_scale(backend):
    sr = 16000
    amps = (0.02, 0.2, 0.9)
    toks = [Tok(f"t{i}", "a", tone(sr, 0.2 + 0.01 * i, 120 + 10 * i, a))
            for i, a in enumerate(amps)]
    lvl = LevelSpecPolicy(target_dbfs=-24.0, fade=0.02)
    s = process_tokens(toks, sr=sr, n_samples=4000, retime=RetimeSpec(backend=backend),
                       pitch=PitchSpec(policy="keep"), level=lvl, progress=False)
    assert s.set_gain_db == 0.0 and s.headroom_db > 0
    L = int(round(0.02 * sr))
    for t, r in zip(toks, s.records):
        y = s.get(t.id)
        m = active_mask(y, sr=sr, threshold_db=lvl.active_threshold_db)
        assert rms_dbfs(y[m]) == pytest.approx(-24.0, abs=0.1)  # spec bound, not a published value
        assert r.rms_after_dbfs == pytest.approx(-24.0, abs=0.1)
        assert np.max(np.abs(y)) < 1.0 and r.clipped_samples == 0
        assert y[0] == 0.0 and y[-1] == 0.0
        # the raised-cosine ramp: non-decreasing envelope bound over the fade-in
        ramp = 0.5 - 0.5 * np.cos(np.pi * np.arange(L) / (L - 1))  # Hann half (calc)
        assert np.all(np.abs(y[:L]) <= ramp * np.max(np.abs(y)) + 1e-12)
    # the quiet token got about +20 dB more gain than the loud one (0.02 vs 0.2 peak, calc)
    assert s.records[0].gain_db - s.records[1].gain_db == pytest.approx(20.0, abs=1.5)


def test_peak_guard_lowers_the_whole_set(caplog):
    sr = 16000
    # a spiky token (crest factor high) and a smooth one; target -6 dBFS RMS forces the guard
    spiky = tone(sr, 0.2, 100.0, 0.3, n_harm=40)
    smooth = tone(sr, 0.2, 150.0, 0.3, n_harm=1)
    toks = [Tok("spiky", "a", spiky), Tok("smooth", "a", smooth)]
    lvl = LevelSpecPolicy(target_dbfs=-6.0, peak_ceiling_dbfs=-1.0)
    with caplog.at_level(logging.WARNING, logger="stimforge"):
        s = process_tokens(toks, sr=sr, n_samples=4000,
                           retime=RetimeSpec(backend="cut-pad"),
                           pitch=PitchSpec(policy="keep"), level=lvl, progress=False)
    assert s.set_gain_db < 0
    assert "peak guard" in caplog.text and any("peak guard" in w for w in s.warnings)
    assert {r.set_gain_db for r in s.records} == {s.set_gain_db}
    peaks = [np.max(np.abs(s.get(t.id))) for t in toks]
    assert 20 * np.log10(max(peaks)) == pytest.approx(-1.0, abs=1e-9)  # at the ceiling
    assert s.headroom_db == pytest.approx(0.0, abs=1e-9)
    # relative levels untouched: both tokens sit at target + set gain
    for r in s.records:
        assert r.rms_after_dbfs == pytest.approx(-6.0 + s.set_gain_db, abs=0.1)
        assert r.gain_db + r.rms_before_dbfs == pytest.approx(-6.0, abs=0.3)


def test_peak_guard_gain():
    assert peak_guard_gain_db([-10.0, -3.0], ceiling_dbfs=-1.0) == 0.0
    assert peak_guard_gain_db([-10.0, 2.5], ceiling_dbfs=-1.0) == pytest.approx(-3.5)  # calc
    assert peak_guard_gain_db([float("-inf")], ceiling_dbfs=-1.0) == 0.0


@pytest.mark.parametrize("fade", (0.001, 0.01, 0.1))
def test_fade_ends_zero(fade):
    sr = 16000
    y = apply_fade(np.ones(4000), sr=sr, fade=fade)
    assert y[0] == 0.0 and y[-1] == 0.0
    assert np.all(np.diff(y[: max(2, int(round(fade * sr)))]) >= 0)
    assert y[2000] == 1.0

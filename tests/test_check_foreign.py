"""The checker on sets stimforge did not make: tokens from another voice and language.

The sets here are made with this file's own code, the way a lab's hand script would make them:
espeak-ng syllables in a German voice at varied rates and pitches, trimmed, cut or padded to
250 ms with 10 ms raised-cosine fades, RMS-equalised, in random order; 20 trials of 8 s; lines
of 4 units, pairs of 2 lines (4 / 1 / 0.5 Hz).  Cues are planted with plain numpy (and pyworld
for the pitch step, applied to every unit so that only the pitch differs by position).  None of
stimforge's build code touches these files; the CLI must give exit 0 for the clean set and
exit 1, through the right measure, for each planted cue.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import soundfile as sf

from stimforge.cli import main

tts = pytest.importorskip("stimforge.tts")

SR = 16000
UNIT = 4000  # 250 ms at 16 kHz
N_TRIALS, N_UNITS = 20, 32  # 20 trials of 8 s (the set)
SYLLABLES = ["ba", "de", "gi", "ko", "mu", "na", "pe", "ri", "so", "tu", "la", "fi"]


def _fade(x: np.ndarray, n: int = 160) -> np.ndarray:
    ramp = 0.5 - 0.5 * np.cos(np.pi * np.arange(n) / (n - 1))
    y = x.copy()
    y[:n] *= ramp
    y[-n:] *= ramp[::-1]
    return y


def _tokens() -> list[np.ndarray]:
    import soxr

    rng = np.random.default_rng(77)
    out = []
    for syl in SYLLABLES:
        x, sr = tts.synthesize(f"[[{syl}]]", voice="de", rate_wpm=int(rng.integers(120, 220)),
                               pitch=int(rng.integers(30, 70)))
        x = soxr.resample(np.asarray(x, dtype=np.float64), sr, SR)
        env = np.abs(x)
        keep = np.flatnonzero(env > 0.01 * env.max())
        x = x[keep[0]:keep[-1] + 1][:UNIT]
        x = np.pad(x, (0, UNIT - x.size))
        x = _fade(x)
        out.append(0.1 * x / np.sqrt(np.mean(x[x != 0] ** 2)))
    return out


def _world_shift(x: np.ndarray, semitones: float) -> np.ndarray:
    import pyworld

    pad = np.zeros(1600)
    y = np.ascontiguousarray(np.concatenate([pad, x, pad]))
    f0, t = pyworld.harvest(y, SR, frame_period=5.0)
    fft = pyworld.get_cheaptrick_fft_size(SR, 71.0)
    sp = pyworld.cheaptrick(y, f0, t, SR, fft_size=fft)
    ap = pyworld.d4c(y, f0, t, SR, fft_size=fft)
    z = pyworld.synthesize(f0 * 2.0 ** (semitones / 12), sp, ap, SR, frame_period=5.0)
    z = z[1600:1600 + UNIT]
    z = _fade(np.pad(z, (0, UNIT - z.size)))
    return z * np.sqrt(np.mean(x ** 2) / np.mean(z ** 2))


@pytest.fixture(scope="module")
def sets(tmp_path_factory):
    base = tmp_path_factory.mktemp("foreign")
    toks = _tokens()
    rng = np.random.default_rng(78)
    order = [rng.integers(0, len(toks), N_UNITS) for _ in range(N_TRIALS)]
    shifted = {(i, s): _world_shift(toks[i], s) for i in range(len(toks)) for s in (0.0, 3.0)}

    def unit(i: int, pos: int, cue: str) -> np.ndarray:
        if cue == "pitch":  # every unit through WORLD; line-final ones 3 semitones up
            return shifted[(i, 3.0 if pos % 4 == 3 else 0.0)].copy()
        u = toks[i].copy()
        if cue == "level" and pos % 4 == 0:
            u *= 10 ** (3 / 20)  # +3 dB on line-initial units
        if cue == "gap" and pos % 4 == 3:
            u[UNIT - 960:] = 0.0  # 60 ms of silence at the end of each line (960 samples)
        return u

    out = {}
    for cue in ("clean", "level", "gap", "pitch"):
        folder = base / cue
        folder.mkdir()
        files = []
        for t in range(N_TRIALS):
            x = np.concatenate([unit(int(i), p, cue) for p, i in enumerate(order[t])])
            f = folder / f"trial{t + 1:02d}.wav"
            sf.write(f, x, SR, subtype="PCM_24")
            files.append(str(f))
        out[cue] = files
    return base, out


def _check(files, tmp, name):
    js = tmp / f"{name}.json"
    rc = main(["check", *files, "--unit-duration", "0.25", "--level", "line=4",
               "--level", "pair=2", "--no-sensitivity", "--quiet", "--json", str(js)])
    return rc, json.loads(js.read_text())


def _significant_features(report) -> set[str]:
    return {r["feature"] for r in report["features"] if r["significant"]}


def _significant_spectral(report) -> list[dict]:
    return [r for r in report["spectral"] if r["significant"]]


def test_clean_foreign_set_passes(sets, tmp_path):
    rc, rep = _check(sets[1]["clean"], tmp_path, "clean")
    assert rc == 0 and rep["verdict"]["passed"]


def test_level_step_caught_by_level(sets, tmp_path):
    rc, rep = _check(sets[1]["level"], tmp_path, "level")
    assert rc == 1
    assert "rms_db" in _significant_features(rep)
    # a line-initial step is phase-locked: the envelope tests see it at the line rate too
    assert any(r["level"] == "line" for r in _significant_spectral(rep))


def test_line_final_gap_caught_by_duration(sets, tmp_path):
    rc, rep = _check(sets[1]["gap"], tmp_path, "gap")
    assert rc == 1
    assert "active_ms" in _significant_features(rep)


def test_pitch_rise_caught_by_f0_only(sets, tmp_path):
    rc, rep = _check(sets[1]["pitch"], tmp_path, "pitch")
    assert rc == 1
    # a pitch cue leaves the envelope alone: only the F0 feature may find it
    assert _significant_features(rep) == {"f0_st"} and not _significant_spectral(rep)
    line = [r for r in rep["features"] if r["feature"] == "f0_st" and r["level"] == "line"][0]
    # the planted step is 3 semitones on the 4th position; with only 12 tokens the position
    # medians fall on discrete token pitches, so ask for the right position and >= 2 st
    med = line["position_medians"]
    assert max(range(4), key=lambda i: med[i]) == 3
    assert med[3] - max(med[:3]) >= 2.0
    # the boundary contrast of the line's last unit finds it too, with the step in semitones
    last = [r for r in rep["boundary"] if (r["feature"], r["level"], r["where"]) ==
            ("f0_st", "line", "last")][0]
    assert last["significant"] and last["value"] >= 2.0

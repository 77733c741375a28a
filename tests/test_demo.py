"""End to end on the bundled demo: what a new user gets from `stimforge demo`.

Two demo builds into fresh folders (the second with two workers) are byte-identical; a third
into a non-empty folder is refused and changes nothing; every slot has the exact duration,
flat pitch and equal level as measured by Praat (an estimator independent of WORLD); the
acoustic check passes.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from stimforge.acoustics import praat_f0, rms_dbfs, semitones
from stimforge.cli import main
from stimforge.export import read_tsv
from stimforge.timing import unit_start

ROOT = Path(__file__).resolve().parents[1]


def digest(folder: Path) -> dict[str, str]:
    # build.log holds the timestamps and is the one file allowed to differ (README, "Outputs")
    return {
        p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file() and p.name != "build.log"
    }


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    base = tmp_path_factory.mktemp("demo")
    mp = pytest.MonkeyPatch()
    mp.setenv("XDG_CACHE_HOME", str(base / "cache"))
    try:
        rc1 = main(["demo", "--out", str(base / "a"), "--quiet"])
        rc2 = main(["demo", "--out", str(base / "b"), "--quiet", "--jobs", "2"])
    finally:
        mp.undo()
    return base, rc1, rc2


def test_demo_exits_clean_and_check_passes(demo):
    base, rc1, rc2 = demo
    assert rc1 == 0 and rc2 == 0
    assert (base / "a" / "check" / "check.json").is_file()


def test_two_demo_builds_are_byte_identical(demo):
    base, _, _ = demo
    a, b = digest(base / "a"), digest(base / "b")
    assert len(a) > 30 and a == b


def test_demo_build_bytes_match_the_recorded_digests(demo):
    """Refactors leave the demo's files byte-identical.

    ``tests/data/demo_build_sha256.txt`` holds the digests of every file of a demo build (check
    JSON and HTML included; build.log holds timestamps and is left out).  A change that *means*
    to change the outputs regenerates that file in the same commit and says why
    (``sha256sum`` over the build folder, build.log excluded).
    """
    base, _, _ = demo
    recorded = {}
    for line in (ROOT / "tests" / "data" / "demo_build_sha256.txt").read_text().splitlines():
        digest_, name = line.split(None, 1)
        recorded[name.strip()] = digest_
    got = digest(base / "a")
    changed = sorted(k for k in set(got) | set(recorded) if got.get(k) != recorded.get(k))
    assert not changed, f"demo build files differ from the recorded digests: {changed}"


def test_third_build_into_non_empty_folder_refused(demo, capsys):
    base, _, _ = demo
    before = {**digest(base / "a"), "build.log": (base / "a" / "build.log").read_bytes()}
    assert main(["demo", "--out", str(base / "a"), "--quiet"]) == 2
    assert "not empty" in capsys.readouterr().err
    assert {**digest(base / "a"), "build.log": (base / "a" / "build.log").read_bytes()} == before


def test_lengths_grid_and_balance(demo):
    out = demo[0] / "a"
    trials = read_tsv(out / "trials.tsv")
    for r in trials:
        info = sf.info(out / r["stim_file"])
        assert info.frames / info.samplerate == pytest.approx(float(r["duration"]), abs=1e-6)
    units = read_tsv(out / "units.tsv")
    sr = 22050
    lead = round(0.5 * sr)
    syl = [u for u in units if u["level"] == "syllable"]
    onsets = {(u["stim_file"], float(u["onset"])) for u in syl}
    for u in syl:
        grid = lead + unit_start(int(u["index"]), unit_duration=0.25, sr=sr)
        assert abs(float(u["onset"]) * sr - grid) < 1.0  # on the grid within one sample
    for u in units:
        if u["level"] != "syllable":  # every higher unit starts on a unit onset
            assert (u["stim_file"], float(u["onset"])) in onsets
    counts: dict[str, dict[str, int]] = {}
    for u in syl:
        c = counts.setdefault(u["condition"], {})
        c[u["label"]] = c.get(u["label"], 0) + 1
    first = counts["intact"]
    assert all(c == first for c in counts.values()) and len(counts) == 4


def test_slots_exact_flat_pitch_and_equal_level(demo):
    """Issue 3's bar: exact slots; F0 sd < 0.3 st within and across slots (Praat); level sd < 1 dB."""
    out = demo[0] / "a"
    units = [u for u in read_tsv(out / "units.tsv")
             if u["level"] == "syllable" and u["condition"] == "intact"]
    audio: dict[str, np.ndarray] = {}
    within, medians, levels = [], [], []
    sr = 22050
    for u in units:
        x = audio.setdefault(u["stim_file"], sf.read(out / u["stim_file"])[0])
        k = int(u["index"])
        a = round(0.5 * sr) + unit_start(k, unit_duration=0.25, sr=sr)
        n = unit_start(k + 1, unit_duration=0.25, sr=sr) - unit_start(k, unit_duration=0.25, sr=sr)
        assert round(float(u["duration"]) * sr) == n and n in (5512, 5513)  # 0.25 s x 22050 Hz
        seg = x[a:a + n]
        pad = np.zeros(int(0.1 * sr))  # Praat needs context to read a clip's edges
        _, f0 = praat_f0(np.concatenate([pad, seg, pad]), sr=sr)
        v = f0[np.isfinite(f0)]
        assert v.size >= 5, f"no voicing read in {u['stim_file']} unit {k}"
        within.append(np.std(semitones(v, np.median(v))))
        medians.append(np.median(v))
        levels.append(rms_dbfs(seg))
    assert max(within) < 0.3
    assert np.std(semitones(np.array(medians), np.median(medians))) < 0.3
    assert np.std(levels) < 1.0

"""Benchmark of the acoustic check.

Prints, measured in one run on this machine:
* the cost of each stage on ``--minutes`` of audio (default 60): the broadband envelope alone
  (the reference), the auditory envelope, Praat F0 as the check runs it (one analysis per trial
  at 8 kHz) and, on a subset, Praat on every unit alone (what it replaces) with the agreement
  of the two;
* the whole check (measuring, tests, grid fit, sensitivity) with ``--jobs 1`` and with
  ``--jobs N`` (default 2), each as a ratio to the broadband envelopes alone (the issue's aim:
  at most 3x), and whether the two reports are identical;
* the demo-sized case (32 trials x 12 s at 22.05 kHz) end to end with sensitivity;
* peak memory (VmHWM of a fresh process running ``check_files``; tracemalloc's peak during the
  check) at two set lengths: trials are read one at a time, so it should not grow much with
  the set's length.

The audio is synthetic syllable-like tokens (harmonic complexes, two formants, noise onset,
random durations, 10 ms fades) placed on a 250 ms grid, 8 s per trial, lines of 4, pairs of 2.

Run:  python tests/bench/bench_verify.py  [--minutes 60] [--jobs 2] [--mem 10 30]
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

SR = 22050
SLOT = 0.25
LEVELS = [("line", 4), ("pair", 2)]


def _token(rng, sr):
    f0, f1, f2 = rng.uniform(100, 140), rng.uniform(300, 800), rng.uniform(900, 2300)
    dur = rng.uniform(0.15, 0.24)
    n = int(dur * sr)
    t = np.arange(n) / sr
    h = np.arange(1, int(4000 // f0) + 1)
    g = 1 / (1 + ((h * f0 - f1) / 90) ** 2) + 0.6 / (1 + ((h * f0 - f2) / 130) ** 2) + 0.02
    v = (g[:, None] * np.sin(2 * np.pi * np.outer(h, t) * f0)).sum(0)
    nb = int(0.012 * sr)
    v[:nb] += rng.standard_normal(nb) * 2.0
    L = int(0.01 * sr)
    r = 0.5 - 0.5 * np.cos(np.pi * np.arange(L) / L)
    v[:L] *= r
    v[-L:] *= r[::-1]
    return v * (0.05 / np.sqrt(np.mean(v ** 2)))


def make_set(folder: Path, n_trials: int, *, seconds: float = 8.0, sr: int = SR, seed: int = 1):
    rng = np.random.default_rng(seed)
    pool = [_token(rng, sr) for _ in range(60)]
    n_units = int(round(seconds / SLOT))
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i in range(n_trials):
        x = np.zeros(math.floor(n_units * SLOT * sr + 0.5))
        for k in range(n_units):
            tok = pool[int(rng.integers(len(pool)))]
            s = math.floor(k * SLOT * sr + 0.5)
            x[s:s + tok.size] = tok
        p = folder / f"t{i:04d}.wav"
        sf.write(p, x, sr, subtype="PCM_16")
        paths.append(p)
    return paths


def _hwm_kb() -> float:
    """Peak RSS of this process in kB: VmHWM (ru_maxrss would carry the parent's peak across
    fork + exec on Linux)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return float(line.split()[1])
    except OSError:
        pass
    return float(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def child(folder: str) -> None:
    """Run check_files on a made set in a fresh process; print memory figures as JSON."""
    import tracemalloc

    from stimforge.verify import check_files

    paths = sorted(Path(folder).glob("*.wav"))
    base = _hwm_kb()
    tracemalloc.start()
    rep = check_files(paths, unit_duration=SLOT, levels=LEVELS, sensitivity=True, progress=False)
    _, traced_peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    peak = _hwm_kb()
    print(json.dumps({"trials": len(paths), "max_rss_mb": peak / 1024,
                      "rss_after_imports_mb": base / 1024,
                      "traced_peak_mb": traced_peak / 2 ** 20, "passed": rep.passed}))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=float, default=60.0)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--mem", type=float, nargs=2, default=(10.0, 30.0))
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--memory-only", action="store_true")
    a = ap.parse_args()
    if a.child:
        child(a.child)
        return
    from stimforge import verify as V

    if not a.memory_only:
        speed(a, V)
    for m in a.mem:
        with tempfile.TemporaryDirectory() as d:
            make_set(Path(d), int(round(m * 60 / 8)))
            out = subprocess.run([sys.executable, __file__, "--child", d], check=True,
                                 capture_output=True, text=True).stdout.strip().splitlines()[-1]
        r = json.loads(out)
        print(f"memory, {m:g}-minute set ({r['trials']} trials): max RSS {r['max_rss_mb']:.0f} MB "
              f"(after imports {r['rss_after_imports_mb']:.0f} MB); peak traced by tracemalloc "
              f"during the check {r['traced_peak_mb']:.1f} MB")


def _praat_paths(V, paths, n_units: int):
    """Seconds of the per-trial Praat path and of Praat on every unit alone, and their
    difference per unit (semitones), on the given files."""
    import soxr

    from stimforge.acoustics import praat_f0, semitones

    t_trial = t_unit = 0.0
    diffs = []
    for p in paths:
        x, sr = sf.read(p)
        b = [math.floor(k * SLOT * sr + 0.5) for k in range(n_units + 1)]
        t = time.perf_counter()
        times, f0 = praat_f0(soxr.resample(x, sr, V.F0_SR, quality="HQ"), sr=V.F0_SR)
        per_trial = []
        for k in range(n_units):
            m = (times >= b[k] / sr + 0.005) & (times < b[k + 1] / sr - 0.005)
            v = f0[m][np.isfinite(f0[m])]
            per_trial.append(float(semitones(np.median(v), V.F0_REF)) if v.size >= 3 else np.nan)
        t_trial += time.perf_counter() - t
        t = time.perf_counter()
        for k in range(n_units):
            _, f = praat_f0(x[b[k]:b[k + 1]], sr=sr)
            f = f[np.isfinite(f)]
            if f.size >= 3 and np.isfinite(per_trial[k]):
                diffs.append(per_trial[k] - float(semitones(np.median(f), V.F0_REF)))
        t_unit += time.perf_counter() - t
    return t_trial, t_unit, np.abs(np.array(diffs))


def speed(a, V) -> None:
    with tempfile.TemporaryDirectory() as d:
        n_trials = int(round(a.minutes * 60 / 8))
        t0 = time.perf_counter()
        paths = make_set(Path(d) / "hour", n_trials)
        print(f"made {n_trials} trials x 8 s at {SR} Hz ({a.minutes:g} min) in "
              f"{time.perf_counter() - t0:.0f} s")
        audio_s = n_trials * 8.0
        tb = ta = 0.0
        for p in paths:  # envelopes alone, on every trial
            x, sr = sf.read(p)
            t = time.perf_counter()
            V.broadband_envelope(x, sr=sr, env_sr=200.0)
            tb += time.perf_counter() - t
            t = time.perf_counter()
            V.auditory_envelope(x, sr=sr, env_sr=200.0)
            ta += time.perf_counter() - t
        print(f"broadband envelope alone: {tb:.1f} s ({audio_s / tb:.0f}x real time) = the "
              "reference (1.0x)")
        print(f"auditory envelope:        {ta:.1f} s ({audio_s / ta:.0f}x real time), "
              f"{ta / tb:.1f}x the broadband")
        sub = paths[: min(20, len(paths))]
        tp, tu, diffs = _praat_paths(V, sub, 32)
        scale = len(paths) / len(sub)
        print(f"Praat F0, one analysis per trial at 8 kHz (as the check runs it): {tp * scale:.1f} s "
              f"({tp * scale / tb:.1f}x the broadband); Praat on every unit alone at "
              f"{SR} Hz: {tu * scale:.1f} s ({tu / tp:.1f}x the per-trial path; both scaled from "
              f"{len(sub)} trials); per-unit medians agree within {np.percentile(diffs, 95):.3f} "
              f"semitones (95th percentile), {diffs.max():.3f} at most ({diffs.size} units)")
        reports = {}
        for jobs in sorted({1, max(1, a.jobs)}):
            t = time.perf_counter()
            rep = V.check_files(paths, unit_duration=SLOT, levels=LEVELS, sensitivity=True,
                                progress=False, jobs=jobs)
            tt = time.perf_counter() - t
            tm = rep.timings
            reports[jobs] = rep
            n_eval = sum(s["evaluations"] for s in rep.sensitivity)
            print(f"whole check, --jobs {jobs}: {tt:.1f} s ({audio_s / tt:.0f}x real time) = "
                  f"{tt / tb:.1f}x the broadband envelopes alone (aim: <= 3x); measuring "
                  f"{tm['measure']:.1f} s ({tm['measure'] / tb:.1f}x), tests + grid fit "
                  f"{tm['tests']:.2f} s, sensitivity {tm['sensitivity']:.1f} s "
                  f"({n_eval} family evaluations, {tm['sensitivity'] / tb:.2f}x)")
        if len(reports) > 1:
            same = reports[1].to_dict() == reports[max(reports)].to_dict()
            print(f"--jobs 1 and --jobs {max(reports)} reports identical: {same}")
        print("verdict:", reports[1].summary_line())
        demo = make_set(Path(d) / "demo", 32, seconds=12.0, seed=2)
        t = time.perf_counter()
        rep = V.check_files(demo, unit_duration=SLOT, levels=LEVELS, sensitivity=True,
                            progress=False)
        print(f"demo-sized (32 x 12 s, 22.05 kHz) with sensitivity: "
              f"{time.perf_counter() - t:.1f} s; timings {json.dumps(rep.timings)}")


if __name__ == "__main__":
    main()

"""Benchmark of the acoustic check.

Prints, measured in one run on this machine:
* real-time factors (CPU-bound wall time / audio duration) of the broadband envelope, the
  auditory envelope, the whole measurement step (envelopes + per-unit features incl. Praat F0 +
  joins), the tests, and the sensitivity step, on ``--minutes`` of audio (default 60);
* the demo-sized case (32 trials x 12 s at 22.05 kHz) end to end with sensitivity;
* peak memory (VmHWM of a fresh process running ``check_files``; tracemalloc's peak during the
  check) at two set lengths: trials
  are read one at a time, so it should not grow much with the set's length.

The audio is synthetic syllable-like tokens (harmonic complexes, two formants, noise onset,
random durations, 10 ms fades) placed on a 250 ms grid, 8 s per trial, lines of 4, pairs of 2.

Run:  python tests/bench/bench_verify.py  [--minutes 60] [--mem 10 30]
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
    rep = check_files(paths, unit_duration=SLOT, levels=[("line", 4), ("pair", 2)],
                      sensitivity=True, progress=False)
    _, traced_peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    peak = _hwm_kb()
    print(json.dumps({"trials": len(paths), "max_rss_mb": peak / 1024,
                      "rss_after_imports_mb": base / 1024,
                      "traced_peak_mb": traced_peak / 2 ** 20, "passed": rep.passed}))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=float, default=60.0)
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


def speed(a, V) -> None:
    with tempfile.TemporaryDirectory() as d:
        n_trials = int(round(a.minutes * 60 / 8))
        t0 = time.perf_counter()
        paths = make_set(Path(d) / "hour", n_trials)
        print(f"made {n_trials} trials x 8 s at {SR} Hz ({a.minutes:g} min) in "
              f"{time.perf_counter() - t0:.0f} s")
        audio_s = n_trials * 8.0
        # envelopes alone, on every trial
        tb = ta = 0.0
        for p in paths:
            x, sr = sf.read(p)
            t = time.perf_counter()
            V.broadband_envelope(x, sr=sr, env_sr=200.0)
            tb += time.perf_counter() - t
            t = time.perf_counter()
            V.auditory_envelope(x, sr=sr, env_sr=200.0)
            ta += time.perf_counter() - t
        print(f"broadband envelope: {tb:.1f} s, real-time factor {tb / audio_s:.4f}")
        print(f"auditory envelope:  {ta:.1f} s, real-time factor {ta / audio_s:.4f}")
        t = time.perf_counter()
        rep = V.check_files(paths, unit_duration=SLOT, levels=[("line", 4), ("pair", 2)],
                            sensitivity=True, progress=False)
        tt = time.perf_counter() - t
        tm = rep.timings
        print(f"whole check: {tt:.1f} s (RTF {tt / audio_s:.4f}); measure {tm['measure']:.1f} s "
              f"(RTF {tm['measure'] / audio_s:.4f}), tests {tm['tests']:.2f} s, sensitivity "
              f"{tm['sensitivity']:.1f} s (RTF {tm['sensitivity'] / audio_s:.4f}, "
              f"{sum(s['evaluations'] for s in rep.sensitivity)} family evaluations)")
        print("verdict:", rep.summary_line())
        # demo-sized case
        demo = make_set(Path(d) / "demo", 32, seconds=12.0, seed=2)
        t = time.perf_counter()
        rep = V.check_files(demo, unit_duration=SLOT, levels=[("line", 4), ("pair", 2)],
                            sensitivity=True, progress=False)
        print(f"demo-sized (32 x 12 s, 22.05 kHz) with sensitivity: "
              f"{time.perf_counter() - t:.1f} s; timings {json.dumps(rep.timings)}")


if __name__ == "__main__":
    main()

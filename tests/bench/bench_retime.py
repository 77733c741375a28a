"""Benchmark of the re-timing engine (a script, not a test).

Run:  python tests/bench/bench_retime.py [--slot 0.25] [--max-tokens 48]

Uses the demo corpus WAVs (demo_corpus/tokens/*.wav, trimmed at -40 dB like the corpus
loader) if present, else synthetic gliding harmonic complexes.  Prints, from one run:
WORLD analysis and synthesis real-time factors, cold vs warm cache, jobs=1 vs jobs=2, and
each backend's cost per second of output.  Real-time factor = seconds of computation per
second of audio (lower is faster).
"""

from __future__ import annotations

import argparse
import math
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from stimforge.acoustics import active_bounds
from stimforge.recipe import LevelSpecPolicy, PitchSpec, RetimeSpec
from stimforge.retime import (
    BACKENDS,
    process_tokens,
    world_analysis,
    world_resynthesize,
)

ROOT = Path(__file__).resolve().parents[2]


@dataclass(frozen=True)
class Tok:
    id: str
    label: str
    samples: np.ndarray


def load_tokens(max_tokens: int) -> tuple[list[Tok], int, str]:
    files = sorted((ROOT / "demo_corpus" / "tokens").glob("*.wav"))
    if files:
        import soundfile as sf

        out, sr = [], None
        for f in files[:max_tokens]:
            x, fs = sf.read(f, dtype="float64", always_2d=True)
            x = x.mean(axis=1)
            sr = fs if sr is None else sr
            b = active_bounds(x, sr=fs, threshold_db=-40.0)
            out.append(Tok(f.name, f.stem.split("_")[0], np.ascontiguousarray(x[b[0]:b[1]])))
        return out, int(sr), f"demo corpus ({len(out)} tokens)"
    sr = 22050
    out = []
    for i in range(min(max_tokens, 24)):
        dur = 0.18 + 0.1 * (i % 5) / 4
        n = int(dur * sr)
        t = np.arange(n) / sr
        f = 100 + 10 * (i % 7) + 40 * t / dur
        ph = 2 * np.pi * np.cumsum(f) / sr
        x = sum((0.6 ** k) * np.sin((k + 1) * ph) for k in range(10))
        env = np.clip(np.minimum(t / 0.01, (dur - t) / 0.02), 0, 1)
        out.append(Tok(f"syn{i}", "syn", 0.3 * x * env / np.max(np.abs(x))))
    return out, sr, f"synthetic ({len(out)} tokens)"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--slot", type=float, default=0.25, help="slot duration, s")
    ap.add_argument("--max-tokens", type=int, default=48)
    args = ap.parse_args()

    toks, sr, what = load_tokens(args.max_tokens)
    audio_s = sum(t.samples.size for t in toks) / sr
    tfs = args.slot * sr
    lengths = sorted({math.floor(tfs), math.ceil(tfs)})
    out_s = len(toks) * lengths[0] / sr
    print(f"tokens: {what}, sr {sr} Hz, {audio_s:.2f} s of input; slot {args.slot} s -> "
          f"lengths {lengths}")

    rt = RetimeSpec(out_of_range="warn")
    # ---- WORLD analysis / synthesis alone
    t0 = time.perf_counter()
    anas = [world_analysis(t.samples, sr=sr, retime=rt) for t in toks]
    t_ana = time.perf_counter() - t0
    t0 = time.perf_counter()
    for a in anas:
        world_resynthesize(a, n_samples=lengths[0], pitch_policy="flat", target_hz=100.0)
    t_syn = time.perf_counter() - t0
    print(f"WORLD analysis (harvest, padded): {t_ana:.2f} s -> real-time factor "
          f"{t_ana / audio_s:.3f} (per second of input)")
    print(f"WORLD synthesis: {t_syn:.2f} s -> real-time factor {t_syn / out_s:.3f} "
          "(per second of output)")

    common = dict(sr=sr, lengths=lengths, pitch=PitchSpec(policy="flat"),
                  level=LevelSpecPolicy(), progress=False)
    with tempfile.TemporaryDirectory() as d:
        t0 = time.perf_counter()
        process_tokens(toks, retime=rt, jobs=1, cache_dir=Path(d) / "a", **common)
        cold = time.perf_counter() - t0
        t0 = time.perf_counter()
        process_tokens(toks, retime=rt, jobs=1, cache_dir=Path(d) / "a", **common)
        warm = time.perf_counter() - t0
        t0 = time.perf_counter()
        process_tokens(toks, retime=rt, jobs=2, cache_dir=Path(d) / "b", **common)
        cold2 = time.perf_counter() - t0
        size = sum(p.stat().st_size for p in (Path(d) / "a").rglob("*.npz"))
    print(f"process_tokens world, {len(lengths)} length(s): cold cache {cold:.2f} s, warm "
          f"{warm:.2f} s -> cold/warm {cold / warm:.2f}; cache size {size / 1e6:.1f} MB")
    print(f"jobs=1 {cold:.2f} s vs jobs=2 {cold2:.2f} s (both cold) -> ratio "
          f"{cold / cold2:.2f}")

    for name in BACKENDS:
        rtb = RetimeSpec(backend=name, out_of_range="warn", cache=False)
        t0 = time.perf_counter()
        process_tokens(toks, retime=rtb, jobs=1, **{**common, "lengths": lengths[:1]})
        dt = time.perf_counter() - t0
        print(f"backend {name:<12} (flat pitch, no cache, incl. Praat F0 records): "
              f"{dt / out_s:.3f} s per second of output")


if __name__ == "__main__":
    main()

"""Benchmark: a ~30-minute, 3-condition set from ~100 distinct tokens.

Prints, measured in one run on this machine:
* the build cold (empty WORLD cache) and warm (cache filled), real-time factors;
* the same set processed the way a hand script does it: every occurrence re-timed separately
  (measured on a sample of occurrences and scaled to the set's count; said so in the output);
* peak memory (max RSS of a fresh process) for a 10- and a 30-minute set: assembly streams one
  trial at a time, so it should not grow with set length.

Run:  python tests/bench/bench_build.py  [--minutes 30] [--sample 150]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf
import yaml

SR = 22050
N_LABELS = 50  # x 2 takes = 100 distinct tokens


def make_tokens(folder: Path) -> list[str]:
    """100 tokens: espeak-ng syllables (stimforge.tts) when available, else synthetic vowels."""
    folder.mkdir(parents=True, exist_ok=True)
    cons, vows = "bdgkmnpstv", "aeiou"
    labels = [c + v for c in cons for v in vows][:N_LABELS]
    rows = ["label,file"]
    rng = np.random.default_rng(1)
    try:
        from stimforge.tts import synthesize
    except ImportError:  # pragma: no cover
        synthesize = None
    for lab in labels:
        for take in (1, 2):
            if synthesize is not None:
                x, sr = synthesize(lab, voice="it", rate_wpm=int(rng.integers(140, 220)),
                                   pitch=int(rng.integers(35, 65)))
            else:  # pragma: no cover
                sr = SR
                t = np.arange(int(0.22 * sr)) / sr
                x = sum(np.sin(2 * np.pi * h * 120 * t) / h for h in range(1, 10)) * np.hanning(t.size)
            name = f"{lab}_{take}.wav"
            sf.write(folder / name, np.asarray(x) * 0.5 / max(1e-9, np.max(np.abs(x))), sr)
            rows.append(f"{lab},{name}")
    (folder / "index.csv").write_text("\n".join(rows) + "\n")
    return labels


def write_recipe(folder: Path, labels: list[str], minutes: float, cache: Path) -> Path:
    # word = 2 syllables, line = 2 words: 1 s per line; trials of 20 analysed lines + lead-in
    per_trial_s = 0.5 + 21 + 0.5
    per_condition = max(1, int(round(minutes * 60 / 3 / per_trial_s)))
    data = {
        "name": "bench",
        "seed": 1,
        "hierarchy": {"unit": {"name": "syllable", "duration": 0.25},
                      "levels": [{"name": "word", "size": 2}, {"name": "line", "size": 2}]},
        "corpus": {"index": "tokens/index.csv"},
        "material": {"generate": {"mode": "units", "units": labels}},
        "conditions": [{"name": "a", "kind": "intact"},
                       {"name": "b", "kind": "scramble", "level": "word"},
                       {"name": "c", "kind": "reverse"}],
        "trials": {"groups_per_trial": 20, "lead_in": True, "silence_before": 0.5,
                   "silence_after": 0.5, "per_condition": per_condition},
        "retime": {"backend": "world", "cache_dir": str(cache), "stretch_range": [0.3, 3.0],
                   "out_of_range": "cut-pad"},
        "output": {"sample_rate": SR},
        "check": {"run": False},
    }
    p = folder / f"bench_{minutes:g}.yaml"
    p.write_text(yaml.safe_dump(data))
    return p


def child_build(recipe: str, out: str) -> None:
    """Run in a fresh process: build, print wall time and max RSS as JSON."""
    from stimforge.build import build

    t = time.perf_counter()
    res = build(recipe, out=out, progress=False)
    wall = time.perf_counter() - t
    audio_s = sum(r["duration"] for r in res.trial_rows if r["list"] == 1)
    rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"wall": wall, "audio_s": audio_s, "rss_mb": rss_mb}))


def run_child(recipe: Path, out: Path) -> dict:
    cmd = [sys.executable, __file__, "--child", str(recipe), str(out)]
    res = subprocess.run(cmd, capture_output=True, text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def per_occurrence_cost(recipe_path: Path, sample: int) -> tuple[float, int]:
    """Seconds per occurrence when every occurrence is analysed and re-timed on its own."""
    from stimforge.corpus import load_corpus
    from stimforge.recipe import load_recipe
    from stimforge.retime import retime_token

    recipe = load_recipe(recipe_path)
    rt = recipe.rates()
    corpus = load_corpus(recipe.corpus, sr=rt.sr)
    toks = corpus.tokens
    f0 = corpus.median_f0()
    t = time.perf_counter()
    for i in range(sample):
        tok = toks[i % len(toks)]
        retime_token(tok.samples, sr=rt.sr, n_samples=rt.slot_lengths[0], retime=recipe.retime,
                     pitch=recipe.pitch, level=recipe.level, target_f0=f0, cache=None)
    return (time.perf_counter() - t) / sample, rt.units_per_trial


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=float, default=30.0)
    ap.add_argument("--sample", type=int, default=150)
    ap.add_argument("--child", nargs=2)
    a = ap.parse_args()
    if a.child:
        child_build(*a.child)
        return
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        labels = make_tokens(d / "tokens")
        cache = d / "cache"
        small = write_recipe(d, labels, a.minutes / 3, cache)
        big = write_recipe(d, labels, a.minutes, cache)
        cold = run_child(big, d / "cold")
        warm = run_child(big, d / "warm")
        mem_small = run_child(small, d / "small")
        per_occ, units_per_trial = per_occurrence_cost(big, a.sample)
        n_files = len(list((d / "cold" / "stimuli").glob("*.wav")))
        occurrences = n_files * units_per_trial
        hand = per_occ * occurrences
        print(f"set: {cold['audio_s'] / 60:.1f} min of audio, {n_files} files, {occurrences} "
              f"unit occurrences from 100 distinct tokens")
        print(f"build cold : {cold['wall']:7.1f} s   real-time factor {cold['wall'] / cold['audio_s']:.4f}")
        print(f"build warm : {warm['wall']:7.1f} s   real-time factor {warm['wall'] / warm['audio_s']:.4f}")
        print(f"cold / warm ratio: {cold['wall'] / warm['wall']:.2f}")
        print(f"every occurrence separately: {per_occ * 1000:.1f} ms each (measured on {a.sample}), "
              f"x {occurrences} = {hand:.0f} s (extrapolated)")
        print(f"per-occurrence / stimforge cold ratio: {hand / cold['wall']:.1f}; "
              f"/ warm: {hand / warm['wall']:.1f}")
        print(f"peak memory (max RSS): {mem_small['audio_s'] / 60:.1f} min set {mem_small['rss_mb']:.0f} MB; "
              f"{warm['audio_s'] / 60:.1f} min set {warm['rss_mb']:.0f} MB; ratio "
              f"{warm['rss_mb'] / mem_small['rss_mb']:.2f}")


if __name__ == "__main__":
    main()

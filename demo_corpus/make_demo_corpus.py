"""Regenerate the demo corpus: 24 CV syllables x 2 takes, synthesised with espeak-ng.

Run from the repository root (needs ``pip install "stimforge[tts]"``)::

    python demo_corpus/make_demo_corpus.py            # refuses to overwrite
    python demo_corpus/make_demo_corpus.py --force    # replaces tokens/, index.csv, verses.txt

The output is deterministic: the take parameters and the verses come from a fixed seed, and
espeak-ng gives byte-identical audio when a fresh process makes the same calls in the same order.
Everything here is invented: the language ("Tavesi"), its syllables, words and verses.
"""

from __future__ import annotations

import argparse
import shutil
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # run from a checkout without installing

from stimforge.tts import TTSEntry, make_corpus  # noqa: E402

SEED = 20261201
VOICE = "es"  # a voice with plain five-vowel phonetics; the syllables go in as phonemes
CONSONANTS = ["k", "t", "s", "m", "n", "l"]
VOWELS = ["a", "e", "i", "o"]
SYLLABLES = [c + v for c in CONSONANTS for v in VOWELS]  # 24
RATE_SLOW = (125, 160)  # wpm; one take from each range so the takes differ in length
RATE_FAST = (165, 200)
PITCH_LOW = (35, 50)  # espeak pitch 0-99; about 85-100 Hz
PITCH_HIGH = (55, 70)  # about 105-120 Hz
GAIN_DB = (-8.0, -2.0)  # level differences between tokens (espeak peaks near 0 dBFS)
N_COUPLETS = 48


def takes(rng: np.random.Generator) -> list[TTSEntry]:
    """Two takes per syllable: one slow and one fast, one low and one high, levels varied."""
    out = []
    for syl in SYLLABLES:
        slow_first = bool(rng.integers(2))
        low_first = bool(rng.integers(2))
        rates = [int(rng.integers(*RATE_SLOW, endpoint=True)), int(rng.integers(*RATE_FAST, endpoint=True))]
        pitches = [int(rng.integers(*PITCH_LOW, endpoint=True)), int(rng.integers(*PITCH_HIGH, endpoint=True))]
        if not slow_first:
            rates.reverse()
        if not low_first:
            pitches.reverse()
        for k in range(2):
            gain = float(np.round(rng.uniform(*GAIN_DB), 1))
            out.append(
                TTSEntry(label=syl, text=f"[[{syl}]]", voice=VOICE, rate_wpm=rates[k],
                         pitch=pitches[k], gain_db=gain, metadata={"take": str(k + 1)})
            )
    return out


def lexicon(rng: np.random.Generator) -> list[tuple[str, str]]:
    """48 two-syllable words; every syllable is first in 2 words and second in 2, never doubled."""
    order = [SYLLABLES[i] for i in rng.permutation(len(SYLLABLES))]
    n = len(order)
    return [(order[i], order[(i + d) % n]) for d in (5, 11) for i in range(n)]


def couplets(rng: np.random.Generator, words: list[tuple[str, str]]) -> list[list[tuple[str, str]]]:
    """Each word used 4 times over 48 couplets of 4 words: no word twice in a couplet, and no
    syllable straight after itself across a word boundary (checked over the whole text)."""
    uses = N_COUPLETS * 4 // len(words)
    for _attempt in range(1000):
        left = {w: uses for w in words}
        seq: list[tuple[str, str]] = []
        ok = True
        while len(seq) < N_COUPLETS * 4:
            pos = len(seq) % 4
            here = seq[len(seq) - pos:]
            cand = [
                w for w, c in left.items()
                if c > 0 and w not in here and (not seq or seq[-1][1] != w[0])
            ]
            if not cand:
                ok = False
                break
            # prefer the words with the most uses left, so the counts stay even
            top = max(left[w] for w in cand)
            cand = [w for w in cand if left[w] == top]
            w = cand[int(rng.integers(len(cand)))]
            left[w] -= 1
            seq.append(w)
        if ok:
            return [seq[i:i + 4] for i in range(0, len(seq), 4)]
    raise RuntimeError("could not arrange the verses; change SEED")


def verses_text(cps: list[list[tuple[str, str]]]) -> str:
    lines = [
        "# Demo material for stimforge: INVENTED verses in an invented language (\"Tavesi\").",
        "# Nothing here is a real language, text or data set.  Form: a couplet holds 2 lines,",
        "# a line 2 words, a word 2 CV syllables (no word repeats a syllable): with 0.25 s",
        "# syllables the rates are 4 / 2 / 1 / 0.5 Hz.  '|' closes a word, '||' a line, '|||' a",
        "# couplet.  Every one of the 24 syllables occurs 16 times; every word 4 times.",
        "# Regenerate with: python demo_corpus/make_demo_corpus.py --force",
    ]
    for k, cp in enumerate(cps, 1):
        w = [" ".join(x) for x in cp]
        lines.append(f"# couplet {k}")
        lines.append(f"{w[0]} | {w[1]} ||  {w[2]} | {w[3]} |||")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, default=HERE, help="corpus folder (default: this folder)")
    ap.add_argument("--force", action="store_true",
                    help="delete tokens/, index.csv and verses.txt in --out first")
    args = ap.parse_args(argv)
    out: Path = args.out
    targets = [out / "tokens", out / "index.csv", out / "verses.txt"]
    if args.force:
        shutil.rmtree(out / "tokens", ignore_errors=True)
        for p in targets[1:]:
            p.unlink(missing_ok=True)
    elif any(p.exists() for p in targets):
        print(f"{out} already holds a corpus; use --force to regenerate it", file=sys.stderr)
        return 2
    rng = np.random.default_rng(SEED)
    entries = takes(rng)
    words = lexicon(rng)
    cps = couplets(rng, words)
    out.mkdir(parents=True, exist_ok=True)
    index = make_corpus(entries, out, voice=VOICE, progress=False)
    (out / "verses.txt").write_text(verses_text(cps), encoding="utf-8")
    print(f"wrote {len(entries)} tokens, {index} and {out / 'verses.txt'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

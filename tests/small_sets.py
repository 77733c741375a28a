"""A small, fast build used by the event and epoch tests: six synthetic syllables, syllable ->
word (2) -> line (2), three conditions (intact heard twice, syllable-scrambled, reversed), two
lists, cut/pad re-timing, 16 kHz.  The tokens are harmonic complexes (F0 110-140 Hz, 160-220 ms,
seeded), not speech: enough for codes, plans and windows."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import soundfile as sf
import yaml

LABELS = ("ba", "di", "ku", "mo", "se", "ta")
MATERIAL = ("ba di | ku mo || se ta | di ku ||\nmo se | ta ba || ku ta | ba se ||\n"
            "di mo | se ku || ta di | mo ba ||\n")


def harmonic_token(f0: float, dur: float, sr: int, amp: float) -> np.ndarray:
    """Seven harmonics of ``f0`` with 20 ms / 40 ms linear ramps, peak ``amp``."""
    t = np.arange(int(dur * sr)) / sr
    x = sum(np.sin(2 * np.pi * h * f0 * t) / h for h in range(1, 8))
    env = np.minimum(1, t / 0.02) * np.minimum(1, (dur - t) / 0.04)
    return amp * x * env / np.max(np.abs(x))


def write_small_set(folder: Path, *, name: str, seed: int, unit: float = 0.25,
                    events: dict | None = None) -> Path:
    """Write the tokens, the material and the recipe into ``folder``; return the recipe path."""
    tok = folder / "tokens"
    tok.mkdir(parents=True, exist_ok=True)
    lines = ["label,file"]
    g = np.random.default_rng(5)
    for lab in LABELS:
        x = harmonic_token(110 + 30 * g.random(), 0.16 + 0.06 * g.random(), 16000, 0.3)
        sf.write(tok / f"{lab}.wav", np.concatenate([np.zeros(200), x, np.zeros(200)]), 16000,
                 subtype="PCM_16")
        lines.append(f"{lab},{lab}.wav")
    (tok / "index.csv").write_text("\n".join(lines) + "\n")
    (folder / "material.txt").write_text(MATERIAL)
    data = {
        "name": name, "seed": seed,
        "hierarchy": {"unit": {"name": "syllable", "duration": unit},
                      "levels": [{"name": "word", "size": 2}, {"name": "line", "size": 2}]},
        "corpus": {"index": "tokens/index.csv"},
        "material": {"text": "material.txt"},
        "conditions": [{"name": "intact", "kind": "intact"},
                       {"name": "scrambled", "kind": "scramble", "level": "syllable"},
                       {"name": "reversed", "kind": "reverse"}],
        "repeat": {"conditions": ["intact"], "placement": "adjacent"},
        "trials": {"groups_per_trial": 3, "lead_in": True, "silence_before": 0.1,
                   "silence_after": 0.1, "per_condition": 2, "lists": 2},
        "retime": {"backend": "cut-pad", "cache_dir": str(folder / "cache")},
        "pitch": {"policy": "keep"},
        "output": {"sample_rate": 16000, "subtype": "PCM_16"},
        "check": {"run": False},
        "events": events,
    }
    p = folder / f"{name}.yaml"
    p.write_text(yaml.safe_dump(data, sort_keys=False))
    return p

"""Tests of stimforge.tts (espeak-ng through espeakng-loader) and the `tts` command."""

from __future__ import annotations

import csv
import sys
import threading

import numpy as np
import pytest

pytest.importorskip("espeakng_loader")

from stimforge import cli, tts  # noqa: E402
from stimforge.acoustics import active_bounds, peak_dbfs, praat_f0  # noqa: E402
from stimforge.corpus import load_index  # noqa: E402
from stimforge.errors import BuildError, CorpusError  # noqa: E402


def _trimmed(x, sr):
    a, b = active_bounds(x, sr=sr, threshold_db=-40)
    return x[a:b]


@pytest.mark.parametrize(
    "text,voice", [("ba", "en"), ("[[ma]]", "es"), ("[[ki]]", "es"), ("lo", "de")]
)
def test_synthesize_audible_voiced_plausible(text, voice):
    x, sr = tts.synthesize(text, voice=voice, rate_wpm=160, pitch=50)
    assert sr == 22050  # espeak-ng's output rate (LIBRARIES.md, measured)
    assert x.dtype == np.float64 and x.ndim == 1
    assert peak_dbfs(x) > -30  # audible (brief)
    y = _trimmed(x, sr)
    assert 0.1 < y.size / sr < 1.0  # one syllable at 160 wpm (brief: plausible length)
    _, f0 = praat_f0(y, sr=sr)
    assert np.mean(np.isfinite(f0)) > 0.3  # voiced (brief)


def test_rate_and_pitch_act():
    slow, sr = tts.synthesize("[[na]]", voice="es", rate_wpm=130, pitch=50)
    fast, _ = tts.synthesize("[[na]]", voice="es", rate_wpm=220, pitch=50)
    # a faster speaking rate gives a shorter syllable (common practice)
    assert _trimmed(fast, sr).size < 0.85 * _trimmed(slow, sr).size
    low, _ = tts.synthesize("[[na]]", voice="es", rate_wpm=160, pitch=35)
    high, _ = tts.synthesize("[[na]]", voice="es", rate_wpm=160, pitch=70)
    f_low = np.nanmedian(praat_f0(_trimmed(low, sr), sr=sr)[1])
    f_high = np.nanmedian(praat_f0(_trimmed(high, sr), sr=sr)[1])
    assert f_high > 1.2 * f_low  # espeak pitch 35 -> 70 raises F0 by ~35 % (measured here)


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"text": "ka", "voice": "zz-nope"}, "espeak-ng has no voice 'zz-nope'"),
        ({"text": "   "}, "nothing to synthesise"),
        ({"text": "ka", "rate_wpm": 20}, "rate_wpm must lie in 80..450"),
        ({"text": "ka", "pitch": 120}, "pitch must lie in 0..99"),
    ],
)
def test_synthesize_errors(kwargs, match):
    text = kwargs.pop("text")
    with pytest.raises(CorpusError, match=match):
        tts.synthesize(text, **kwargs)


def test_threads_are_serialised():
    out = {}

    def work(k):
        out[k] = tts.synthesize(f"[[{'kmnl'[k]}a]]", voice="es")[0]

    threads = [threading.Thread(target=work, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(out) == [0, 1, 2, 3]
    for x in out.values():
        assert 0.1 < _trimmed(x, 22050).size / 22050 < 1.0 and peak_dbfs(x) > -30


def test_missing_package_says_how_to_install(monkeypatch):
    monkeypatch.setattr(tts, "_ENGINE", None)
    monkeypatch.setitem(sys.modules, "espeakng_loader", None)  # makes the import fail
    with pytest.raises(BuildError, match=r'pip install "stimforge\[tts\]"'):
        tts.synthesize("ka")


def test_make_corpus_round_trip(tmp_path):
    entries = [
        "ba",
        {"label": "ka", "text": "[[ka]]", "voice": "es", "rate_wpm": 140, "pitch": 40, "take": 1},
        tts.TTSEntry(label="ka", text="[[ka]]", voice="es", rate_wpm=200, pitch=65, gain_db=-6,
                     metadata={"take": "2"}),
    ]
    index = tts.make_corpus(entries, tmp_path / "c", voice="en", rate_wpm=160, pitch=50,
                            progress=False)
    with open(index, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0])[:2] == ["label", "file"]
    assert {"voice", "rate_wpm", "pitch", "take"} <= set(rows[0])
    assert [(r["label"], r["file"], r["voice"], r["rate_wpm"], r["pitch"], r["take"]) for r in rows] == [
        ("ba", "tokens/ba.wav", "en", "160", "50", ""),
        ("ka", "tokens/ka_1.wav", "es", "140", "40", "1"),
        ("ka", "tokens/ka_2.wav", "es", "200", "65", "2"),
    ]
    corpus = load_index(index, sr=16000)
    assert corpus.labels == ["ba", "ka"] and len(corpus) == 3
    k1, k2 = corpus.by_label()["ka"]
    assert k2.qc.duration_trimmed < k1.qc.duration_trimmed  # 200 vs 140 wpm
    assert k2.qc.median_f0 > k1.qc.median_f0  # pitch 65 vs 40
    assert all(t.qc.flags == () for t in corpus)
    assert k1.metadata["take"] == "1" and k2.metadata["gain_db"] == "-6"


def test_make_corpus_refuses_to_overwrite(tmp_path):
    tts.make_corpus(["ka"], tmp_path, progress=False)
    before = (tmp_path / "tokens" / "ka.wav").read_bytes()
    with pytest.raises(BuildError, match="already exist.*never overwrites"):
        tts.make_corpus(["ka", "mo"], tmp_path, progress=False)
    assert (tmp_path / "tokens" / "ka.wav").read_bytes() == before
    assert not (tmp_path / "tokens" / "mo.wav").exists()


@pytest.mark.parametrize(
    "entries,match",
    [
        ([], "no labels given"),
        (["k a"], "contains whitespace"),
        ([""], "empty label"),
        ([{"label": "ka", "gain_db": 12}], r"gain_db \+12 would clip"),
        ([{"text": "ka"}], "needs a 'label' key"),
        ([{"label": "ka", "file": "x"}], "clashes with a reserved column"),
    ],
)
def test_make_corpus_errors(tmp_path, entries, match):
    with pytest.raises(CorpusError, match=match):
        tts.make_corpus(entries, tmp_path / "c", progress=False)
    assert not (tmp_path / "c" / "index.csv").exists()


def test_cli_tts_then_inspect(tmp_path, capsys):
    labels = tmp_path / "labels.txt"
    labels.write_text("# syllables\nno [[no]]\nli [[li]]  # a comment\n", encoding="utf-8")
    out = tmp_path / "corp"
    code = cli.main(["tts", str(out), "ka=[[ka]]", "--voice", "es", "--rate", "150",
                     "--pitch", "45", "--labels-file", str(labels)])
    assert code == 0
    with open(out / "index.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert [(r["label"], r["text"], r["rate_wpm"]) for r in rows] == [
        ("ka", "[[ka]]", "150"), ("no", "[[no]]", "150"), ("li", "[[li]]", "150")]
    capsys.readouterr()
    assert cli.main(["inspect", str(out)]) == 0
    assert "3 token(s) loaded, 0 bad" in capsys.readouterr().out
    assert cli.main(["tts", str(out), "ka"]) == 2  # refuses to overwrite
    assert "never overwrites" in capsys.readouterr().err

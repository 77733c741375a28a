"""Tests of stimforge.corpus: reading, resampling, trimming, QC, index/TextGrid loading, inspect."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from stimforge import cli
from stimforge.corpus import (
    Corpus,
    inspect_corpus,
    load_corpus,
    load_index,
    load_textgrid,
    read_audio,
)
from stimforge.errors import CorpusError
from stimforge.recipe import CorpusSpec, QCSpec, TrimSpec

REPO = Path(__file__).resolve().parents[1]
LSB16 = 1.0 / 32768  # one PCM_16 step (calc)


# --------------------------------------------------------------------------- helpers
def sine(freq: float, dur: float, sr: int, amp: float = 0.5) -> np.ndarray:
    t = np.arange(int(round(dur * sr))) / sr
    return amp * np.sin(2 * np.pi * freq * t)


def harmonic(f0: float, dur: float, sr: int, amp: float = 0.5, n: int = 10) -> np.ndarray:
    t = np.arange(int(round(dur * sr))) / sr
    x = sum(np.sin(2 * np.pi * k * f0 * t) / k for k in range(1, n + 1))
    return amp * x / np.max(np.abs(x))


def write_index(folder: Path, rows: list[tuple[str, str]], extra: str = "") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    head = "label,file" + ("," + extra if extra else "")
    lines = [head] + [",".join(r) for r in rows]
    p = folder / "index.csv"
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return p


def make_truncated_wav(path: Path, rng) -> None:
    """A WAV whose data chunk was cut: the header still promises the full length."""
    sf.write(path, rng.uniform(-0.5, 0.5, 8000), 16000, subtype="PCM_16")
    b = path.read_bytes()
    path.write_bytes(b[: len(b) // 2])


def make_bad(folder: Path, kind: str, rng) -> str:
    name = f"{kind}.wav"
    p = folder / name
    if kind == "empty":
        p.write_bytes(b"")
    elif kind == "truncated":
        make_truncated_wav(p, rng)
    elif kind == "notaudio":
        p.write_text("this is a shopping list, not a sound\n" * 20)
    elif kind == "missing":
        pass
    return name


REASON = {
    "missing": "file not found",
    "empty": r"empty file \(0 bytes\)",
    "truncated": "truncated: the header promises 8000 frames",
    "notaudio": "not a readable audio file",
}


# --------------------------------------------------------------------------- reading
@pytest.mark.parametrize("fs", [16000, 44100, 48000])
@pytest.mark.parametrize("channels", [1, 2])
@pytest.mark.parametrize("fmt", ["WAV", "FLAC"])
def test_round_trip_native_rate(tmp_path, rng, fs, channels, fmt):
    x = rng.uniform(-0.8, 0.8, (int(0.1 * fs), channels))
    p = tmp_path / f"a.{fmt.lower()}"
    sf.write(p, x, fs, format=fmt, subtype="PCM_16")
    y = read_audio(p, sr=fs)
    assert y.dtype == np.float64 and y.ndim == 1 and y.size == x.shape[0]
    # mean of channels, within PCM_16 quantisation: at most ~1 step (calc)
    np.testing.assert_allclose(y, x.mean(axis=1), atol=1.5 * LSB16, rtol=0)


def test_channel_rule_is_mean(tmp_path):
    s = sine(440, 0.2, 16000, amp=0.4)
    sf.write(tmp_path / "st.wav", np.stack([s, 0.5 * s], axis=1), 16000, subtype="PCM_24")
    y = read_audio(tmp_path / "st.wav", sr=16000)
    np.testing.assert_allclose(y, 0.75 * s, atol=1e-6)  # (1 + 0.5) / 2 = 0.75 (calc)


@pytest.mark.parametrize("fs_in,fs_out", [(48000, 16000), (48000, 44100), (16000, 44100), (44100, 48000)])
def test_resampled_sine_keeps_frequency_and_amplitude(tmp_path, fs_in, fs_out):
    amp, f = 0.5, 1000.0
    sf.write(tmp_path / "s.wav", sine(f, 1.0, fs_in, amp), fs_in, subtype="PCM_24")
    y = read_audio(tmp_path / "s.wav", sr=fs_out)
    assert abs(y.size - fs_out) <= 1  # 1 s stays 1 s (calc)
    mid = y[fs_out // 10 : fs_out // 10 + fs_out // 2]  # 0.5 s = 500 whole cycles, away from edges
    spec = np.abs(np.fft.rfft(mid)) * 2 / mid.size
    freqs = np.fft.rfftfreq(mid.size, 1 / fs_out)
    k = int(np.argmax(spec))
    assert freqs[k] == pytest.approx(f, abs=1e-9)  # integer cycles -> exact bin (calc)
    assert spec[k] == pytest.approx(amp, rel=2e-3)  # soxr HQ passband is flat to << 0.1 dB (soxr docs)
    rms = np.sqrt(np.mean(mid**2))
    assert rms == pytest.approx(amp / math.sqrt(2), rel=2e-3)  # sine RMS = A/sqrt(2) (textbook)


@pytest.mark.parametrize("kind", sorted(REASON))
def test_read_audio_bad_file_names_file(tmp_path, rng, kind):
    name = make_bad(tmp_path, kind, rng)
    with pytest.raises(CorpusError, match=rf"{kind}\.wav: {REASON[kind]}"):
        read_audio(tmp_path / name, sr=16000)


def test_truncated_flac(tmp_path, rng):
    p = tmp_path / "cut.flac"
    sf.write(p, rng.uniform(-0.5, 0.5, 48000), 48000, format="FLAC")
    b = p.read_bytes()
    p.write_bytes(b[: len(b) // 2])
    with pytest.raises(CorpusError, match=r"cut\.flac: truncated"):
        read_audio(p, sr=48000)


def test_read_audio_needs_integer_sr(tmp_path):
    sf.write(tmp_path / "a.wav", np.zeros(100), 16000)
    with pytest.raises(CorpusError, match="sr must be an integer"):
        read_audio(tmp_path / "a.wav", sr=16000.5)


# --------------------------------------------------------------------------- index errors
@pytest.mark.parametrize("kind", sorted(REASON))
def test_each_bad_file_kind(tmp_path, rng, kind):
    sf.write(tmp_path / "good.wav", harmonic(120, 0.2, 16000), 16000)
    name = make_bad(tmp_path, kind, rng)
    write_index(tmp_path, [("ka", "good.wav"), ("mo", name)])
    with pytest.raises(CorpusError, match=rf"row 3: {kind}\.wav: {REASON[kind]}"):
        load_index(tmp_path, sr=16000)


def test_every_bad_file_named_in_one_error(tmp_path, rng):
    sf.write(tmp_path / "good.wav", harmonic(120, 0.2, 16000), 16000)
    names = [make_bad(tmp_path, k, rng) for k in sorted(REASON)]
    write_index(tmp_path, [("ka", "good.wav")] + [(f"s{i}", n) for i, n in enumerate(names)])
    with pytest.raises(CorpusError) as exc:
        load_index(tmp_path / "index.csv", sr=16000)
    msg = str(exc.value)
    assert "4 token row(s) cannot be used" in msg
    for kind, name in zip(sorted(REASON), names):
        assert name in msg
        assert any(kind in line and name in line for line in msg.splitlines())
    assert "good.wav" not in msg


@pytest.mark.parametrize(
    "csv_text,match",
    [
        ("label,path\nka,a.wav\n", r"required column 'file' is missing"),
        ("Label,file\nka,a.wav\n", r"required column 'label' is missing \(did you mean 'Label'\?\)"),
        ("label,file\n", "header but no token rows"),
        ("", "the index is empty"),
        ("label,file,label\nka,a.wav,x\n", "repeated column name"),
        ("label,file\n,a.wav\n", "row 2: a.wav: empty label"),
        ("label,file\nk a,a.wav\n", r"label 'k a' contains whitespace"),
        ("label,file\nka|,a.wav\n", r"contains whitespace, '\|' or '#'"),
        ("label,file\nka,a.wav\nmo,a.wav\n", r"row 3: a.wav: already listed in row 2"),
        ("label,file\nka,\n", "empty 'file' value"),
        ("label,file\nka,a.wav,extra\n", "row 2: index.csv: has 3 fields but the header has 2"),
    ],
)
def test_index_structure_errors(tmp_path, csv_text, match):
    sf.write(tmp_path / "a.wav", harmonic(120, 0.2, 16000), 16000)
    (tmp_path / "index.csv").write_text(csv_text, encoding="utf-8")
    with pytest.raises(CorpusError, match=match):
        load_index(tmp_path, sr=16000)


def test_folder_without_index_says_so(tmp_path):
    with pytest.raises(CorpusError, match=r"no index.csv in this folder.*'label'.*'file'"):
        load_index(tmp_path, sr=16000)


def test_blank_lines_skipped_and_bom_accepted(tmp_path):
    sf.write(tmp_path / "a.wav", harmonic(120, 0.2, 16000), 16000)
    (tmp_path / "index.csv").write_text("\ufefflabel,file\n\nka,a.wav\n,\n", encoding="utf-8")
    assert [t.id for t in load_index(tmp_path, sr=16000).tokens] == ["a.wav"]


# --------------------------------------------------------------------------- folder + trim
def _stereo_folder(tmp_path: Path, rng) -> tuple[Path, dict[str, tuple[int, int]]]:
    """48 kHz stereo tokens: silence, a 120 Hz harmonic burst, silence. Returns the bursts'
    sample bounds (at 48 kHz) by file."""
    fs = 48000
    folder = tmp_path / "corp"
    (folder / "wav").mkdir(parents=True)
    truth = {}
    rows = []
    for i, (lab, pre, dur, post) in enumerate(
        [("ka", 0.10, 0.20, 0.15), ("mo", 0.05, 0.31, 0.30), ("ka", 0.20, 0.12, 0.05)]
    ):
        burst = harmonic(120 + 10 * i, dur, fs, amp=0.4)
        x = np.concatenate([np.zeros(int(pre * fs)), burst, np.zeros(int(post * fs))])
        st = np.stack([x, 0.8 * x], axis=1) + rng.normal(0, 1e-5, (x.size, 2))  # faint noise
        name = f"wav/{lab}{i}.wav"
        sf.write(folder / name, st, fs, subtype="PCM_24")
        truth[name] = (int(pre * fs), int(pre * fs) + burst.size)
        rows.append((lab, name, f"take{i}"))
    write_index(folder, rows, extra="take")
    return folder, truth


def test_stereo_48k_folder_lists_and_trims_every_token(tmp_path, rng):
    folder, truth = _stereo_folder(tmp_path, rng)
    corpus = load_index(folder, sr=48000, trim=TrimSpec(threshold_db=-40, pad=0.0))
    assert [t.id for t in corpus.tokens] == list(truth)
    assert corpus.labels == ["ka", "mo"]
    assert [t.id for t in corpus.by_label()["ka"]] == ["wav/ka0.wav", "wav/ka2.wav"]
    tol = int(0.0025 * 48000) + 2  # half the 5 ms smoothing window (calc)
    for t in corpus.tokens:
        a, b = truth[t.id]
        assert abs(t.trim[0] - a) <= tol and abs(t.trim[1] - b) <= tol, (t.id, t.trim, (a, b))
        full = read_audio(t.file, sr=48000)
        np.testing.assert_array_equal(t.samples, full[t.trim[0] : t.trim[1]])
        assert t.metadata == {"take": f"take{list(truth).index(t.id)}"}
        assert t.qc.channels == 2 and t.qc.source_sr == 48000
        assert t.qc.duration_trimmed == pytest.approx((b - a) / 48000, abs=2 * tol / 48000)
        assert not t.samples.flags.writeable
        assert len(t.sha256) == 64


def test_trim_pad_and_resampled_trim(tmp_path, rng):
    folder, truth = _stereo_folder(tmp_path, rng)
    plain = load_index(folder, sr=48000)
    padded = load_index(folder, sr=48000, trim=TrimSpec(pad=0.02))
    for a, b in zip(plain.tokens, padded.tokens):
        assert b.trim[0] == max(0, a.trim[0] - 960)  # 0.02 s * 48000 (calc)
        assert b.trim[1] == a.trim[1] + 960
    low = load_index(folder, sr=16000)
    for t, ref in zip(low.tokens, plain.tokens):
        assert t.sr == 16000
        assert t.trim[0] == pytest.approx(ref.trim[0] / 3, abs=3)  # 48k -> 16k (calc)
        assert t.trim[1] == pytest.approx(ref.trim[1] / 3, abs=3)


def test_load_corpus_dispatch_index(tmp_path, rng):
    folder, truth = _stereo_folder(tmp_path, rng)
    spec = CorpusSpec(index=folder / "index.csv", trim=TrimSpec(pad=0.01))
    corpus = load_corpus(spec, sr=22050, slot_duration=0.25)
    assert isinstance(corpus, Corpus) and corpus.sr == 22050 and len(corpus) == 3
    flags = {t.id: t.qc.flags for t in corpus.tokens}
    # bursts of 0.20, 0.31, 0.12 s plus 2 x 10 ms pad: only the 0.31 s one exceeds 0.25 s (calc)
    assert flags == {"wav/ka0.wav": (), "wav/mo1.wav": ("longer_than_slot",), "wav/ka2.wav": ()}
    assert corpus.median_f0() == pytest.approx(130, abs=1)  # medians 120, 130, 140 Hz (calc)


# --------------------------------------------------------------------------- QC
def _one(tmp_path: Path, x: np.ndarray, sr: int, *, subtype="PCM_24", **kw):
    d = tmp_path / "q"
    d.mkdir(exist_ok=True)
    sf.write(d / "t.wav", x, sr, subtype=subtype)
    write_index(d, [("ta", "t.wav")])
    return load_index(d, sr=sr, **kw).tokens[0]


def test_qc_sine_levels(tmp_path):
    amp = 0.5
    t = _one(tmp_path, sine(1000, 0.5, 48000, amp), 48000)
    assert t.qc.peak_dbfs == pytest.approx(20 * math.log10(amp), abs=0.01)  # -6.02 (calc)
    # a sine's RMS is A/sqrt(2), 3.01 dB below its peak (textbook)
    assert t.qc.rms_dbfs == pytest.approx(20 * math.log10(amp / math.sqrt(2)), abs=0.01)
    assert t.qc.peak_dbfs - t.qc.rms_dbfs == pytest.approx(3.01, abs=0.01)
    assert t.qc.clipped_fraction == 0 and "clipped" not in t.qc.flags


def test_qc_harmonic_complex_f0(tmp_path):
    t = _one(tmp_path, harmonic(120, 0.5, 44100), 44100)
    assert t.qc.median_f0 == pytest.approx(120, abs=0.5)  # Praat ac on a 120 Hz complex (brief: +-0.5)
    assert t.qc.voiced_fraction > 0.9  # common practice: steady periodic signal is voiced throughout
    assert t.qc.flags == ()


def test_qc_clipped(tmp_path):
    x = np.clip(sine(200, 0.5, 16000, amp=2.0), -1, 1)
    t = _one(tmp_path, x, 16000, subtype="FLOAT")
    # |2 sin| >= 0.999 for a fraction 1 - (2/pi) asin(0.4995) = 0.6669 of the time (calc)
    assert t.qc.clipped_fraction == pytest.approx(1 - 2 / math.pi * math.asin(0.4995), abs=0.01)
    assert "clipped" in t.qc.flags


def test_qc_clipped_respects_allowance(tmp_path):
    x = np.clip(sine(200, 0.5, 16000, amp=2.0), -1, 1)
    t = _one(tmp_path, x, 16000, subtype="FLOAT", qc=QCSpec(max_clipped_fraction=0.9))
    assert "clipped" not in t.qc.flags


def test_qc_silent_file(tmp_path):
    t = _one(tmp_path, np.zeros(8000), 16000)
    assert set(t.qc.flags) == {"silent", "no_voicing"}
    assert t.qc.peak_dbfs == -math.inf and t.qc.noise_floor_dbfs == -math.inf
    assert t.trim == (0, 8000) and math.isnan(t.qc.median_f0)


def test_qc_too_quiet_and_noise_floor(tmp_path, rng):
    sr = 16000
    noise = rng.normal(0, 0.001, sr // 2)  # RMS 0.001 = -60 dBFS (calc)
    tone = harmonic(150, 0.5, sr, amp=0.004)
    t = _one(tmp_path, np.concatenate([noise, tone]), sr, trim=TrimSpec(threshold_db=-6))
    assert "too_quiet" in t.qc.flags  # the tone's RMS is about -56 dBFS < -45 (calc)
    # 10th percentile of 20 ms frame RMS over noise-only frames: -60 dB +- ~0.5 dB (calc)
    assert t.qc.noise_floor_dbfs == pytest.approx(-60, abs=1.0)


def test_qc_white_noise_has_no_voicing(tmp_path, rng):
    t = _one(tmp_path, rng.normal(0, 0.1, 16000), 16000)
    assert "no_voicing" in t.qc.flags  # Gaussian noise has no periodicity (common practice)


def test_duplicate_files_flagged(tmp_path):
    d = tmp_path / "dup"
    d.mkdir()
    x = harmonic(120, 0.3, 16000)
    for n in ("a.wav", "b.wav"):
        sf.write(d / n, x, 16000)
    sf.write(d / "c.wav", harmonic(140, 0.3, 16000), 16000)
    write_index(d, [("ka", "a.wav"), ("ka", "b.wav"), ("mo", "c.wav")])
    flags = {t.id: t.qc.flags for t in load_index(d, sr=16000)}
    assert flags == {"a.wav": ("duplicate_file",), "b.wav": ("duplicate_file",), "c.wav": ()}


def test_median_f0_needs_voicing(tmp_path):
    t = _one(tmp_path, np.zeros(8000), 16000)
    with pytest.raises(CorpusError, match="set pitch.target_hz"):
        Corpus(tokens=(t,), sr=16000).median_f0()


# --------------------------------------------------------------------------- TextGrid
def textgrid_text(intervals: list[tuple[float, float, str]], xmax: float, tier="syll") -> str:
    out = [
        'File type = "ooTextFile"', 'Object class = "TextGrid"', "", "xmin = 0",
        f"xmax = {xmax}", "tiers? <exists>", "size = 2", "item []:",
        "    item [1]:", '        class = "IntervalTier"', f'        name = "{tier}"',
        "        xmin = 0", f"        xmax = {xmax}", f"        intervals: size = {len(intervals)}",
    ]
    for i, (a, b, lab) in enumerate(intervals, 1):
        out += [f"        intervals [{i}]:", f"            xmin = {a}", f"            xmax = {b}",
                f'            text = "{lab}"']
    out += [
        "    item [2]:", '        class = "TextTier"', '        name = "beats"', "        xmin = 0",
        f"        xmax = {xmax}", "        points: size = 1", "        points [1]:",
        "            number = 0.5", '            mark = "x"',
    ]
    return "\n".join(out) + "\n"


INTERVALS = [(0, 0.2013, ""), (0.2013, 0.4577, "ka"), (0.4577, 0.61, ""), (0.61, 0.8333, "mó"),
             (0.8333, 1.1071, "ka"), (1.1071, 1.5, "")]


def _recording(tmp_path: Path, rng, fs=44100) -> tuple[Path, np.ndarray]:
    n = int(1.5 * fs)
    x = rng.normal(0, 0.05, (n, 2))  # never silent, so the trim keeps each whole cut
    x[:, 0] += sine(220, 1.5, fs, 0.3)
    p = tmp_path / "session.wav"
    sf.write(p, x, fs, subtype="PCM_24")
    return p, sf.read(p, always_2d=True)[0].mean(axis=1)


@pytest.mark.parametrize("encoding", ["utf-8", "utf-16"])
def test_textgrid_cuts_at_rounded_samples(tmp_path, rng, encoding):
    fs = 44100
    rec, mono = _recording(tmp_path, rng, fs)
    tg = tmp_path / "session.TextGrid"
    tg.write_text(textgrid_text(INTERVALS, 1.5), encoding=encoding)
    corpus = load_textgrid(rec, tg, "syll", sr=fs, trim=TrimSpec(threshold_db=-60))
    assert [t.id for t in corpus.tokens] == ["session.wav#2", "session.wav#4", "session.wav#5"]
    assert [t.label for t in corpus.tokens] == ["ka", "mó", "ka"]
    for t, (a, b, _) in zip(corpus.tokens, [INTERVALS[1], INTERVALS[3], INTERVALS[4]]):
        i0, i1 = int(math.floor(a * fs + 0.5)), int(math.floor(b * fs + 0.5))  # round half up
        assert t.trim == (0, i1 - i0)
        np.testing.assert_array_equal(t.samples, mono[i0:i1])
        assert t.metadata["tier"] == "syll" and t.file == rec.resolve()


def test_textgrid_resampled_and_spec_dispatch(tmp_path, rng):
    rec, mono = _recording(tmp_path, rng, 44100)
    tg = tmp_path / "s.TextGrid"
    tg.write_text(textgrid_text(INTERVALS, 1.5), encoding="utf-8")
    spec = CorpusSpec(recording=rec, textgrid=tg, tier="syll", trim=TrimSpec(threshold_db=-60))
    corpus = load_corpus(spec, sr=16000)
    for t, (a, b, _) in zip(corpus.tokens, [INTERVALS[1], INTERVALS[3], INTERVALS[4]]):
        n_native = int(math.floor(b * 44100 + 0.5)) - int(math.floor(a * 44100 + 0.5))
        assert abs(t.samples.size - n_native * 16000 / 44100) <= 1  # soxr keeps length (calc)


@pytest.mark.parametrize(
    "tier,intervals,match",
    [
        ("syllables", INTERVALS, r"no tier named 'syllables'; tiers present: 'syll' \(interval\), 'beats' \(point\)"),
        ("beats", INTERVALS, r"tier 'beats' is a point tier"),
        ("syll", [(0, 0.7, ""), (0.7, 1.5, "  ")], "no labelled"),
        ("syll", [(0, 1.2, ""), (1.2, 1.9, "ka")], r"interval 2 \('ka', 1.200-1.900 s\) runs past the end"),
        ("syll", [(0, 1.2, "k a"), (1.2, 1.5, "ka")], "contains whitespace"),
    ],
)
def test_textgrid_errors(tmp_path, rng, tier, intervals, match):
    rec, _ = _recording(tmp_path, rng)
    xmax = intervals[-1][1]
    tg = tmp_path / "s.TextGrid"
    tg.write_text(textgrid_text(intervals, xmax), encoding="utf-8")
    with pytest.raises(CorpusError, match=match):
        load_textgrid(rec, tg, tier, sr=16000)


def test_textgrid_bad_recording_and_textgrid_both_named(tmp_path):
    (tmp_path / "s.TextGrid").write_text("not a textgrid", encoding="utf-8")
    with pytest.raises(CorpusError) as exc:
        load_textgrid(tmp_path / "gone.wav", tmp_path / "s.TextGrid", "syll", sr=16000)
    assert "gone.wav: file not found" in str(exc.value)
    assert "s.TextGrid: not a TextGrid Praat can read" in str(exc.value)


# --------------------------------------------------------------------------- inspect
def test_inspect_native_rates_and_tsv(tmp_path, rng):
    folder, truth = _stereo_folder(tmp_path, rng)
    sf.write(folder / "low.wav", harmonic(200, 0.2, 16000), 16000)
    with open(folder / "index.csv", "a", encoding="utf-8") as fh:
        fh.write("lo,low.wav,\n")
    rep = inspect_corpus(folder)
    assert rep.ok and [t.sr for t in rep.tokens] == [48000, 48000, 48000, 16000]
    table = rep.format_table()
    for name in list(truth) + ["low.wav"]:
        assert name in table
    assert "labels: 3" in table and "flags: none" in table
    rows = rep.write_tsv(tmp_path / "r.tsv").read_text().splitlines()
    assert len(rows) == 5 and rows[0].split("\t")[:3] == ["token", "label", "status"]


def test_cli_inspect_exit_0(tmp_path, rng, capsys):
    folder, truth = _stereo_folder(tmp_path, rng)
    code = cli.main(["inspect", str(folder), "--slot", "0.25", "--tsv", str(tmp_path / "o.tsv")])
    out = capsys.readouterr().out
    assert code == 0
    for name in truth:
        assert name in out
    assert "longer_than_slot 1" in out  # only the 0.31 s burst exceeds 0.25 s (calc)
    assert (tmp_path / "o.tsv").exists()
    # the 0.12 s burst is shorter than 0.25 s / 1.7 = 0.147 s: beyond the default stretch range
    assert "too_short_to_stretch 1" in out  # (calc)
    code = cli.main(["inspect", str(folder), "--slot", "0.25", "--max-stretch", "2.5"])
    out = capsys.readouterr().out
    assert code == 0 and "too_short_to_stretch" not in out  # 0.25 / 2.5 = 0.1 s < 0.12 s (calc)


def test_cli_inspect_exit_2_names_every_broken_file(tmp_path, rng, capsys):
    folder, truth = _stereo_folder(tmp_path, rng)
    names = [make_bad(folder, k, rng) for k in sorted(REASON)]
    with open(folder / "index.csv", "a", encoding="utf-8") as fh:
        for i, n in enumerate(names):
            fh.write(f"b{i},{n},\n")
    code = cli.main(["inspect", str(folder / "index.csv")])
    cap = capsys.readouterr()
    assert code == 2
    for kind, n in zip(sorted(REASON), names):
        assert any(n in line and kind in line for line in cap.err.splitlines()), n
    for name in truth:  # the good tokens are still listed
        assert name in cap.out


def test_cli_inspect_no_index(tmp_path, capsys):
    assert cli.main(["inspect", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "no index.csv in this folder" in err and "'label'" in err and "'file'" in err


def test_cli_inspect_demo_corpus(capsys):
    code = cli.main(["inspect", str(REPO / "demo_corpus"), "--slot", "0.4"])
    out = capsys.readouterr().out
    assert code == 0
    assert "48 token(s) loaded, 0 bad" in out and "labels: 24 (2 token(s) per label)" in out


def test_demo_corpus_fits_the_slot():
    """Every demo token within 0.6x-1.6x of the 0.25 s slot after trimming, and voiced."""
    corpus = load_index(REPO / "demo_corpus", sr=22050)
    assert len(corpus) == 48 and len(corpus.labels) == 24
    for t in corpus.tokens:
        assert 0.6 * 0.25 < t.qc.duration_trimmed < 1.6 * 0.25, t  # the demo's design bounds
        assert t.qc.voiced_fraction > 0.3 and np.isfinite(t.qc.median_f0), t
        assert t.qc.flags == (), t
    d = [t.qc.duration_trimmed for t in corpus.tokens]
    assert max(d) - min(d) > 0.1  # takes really differ in length (the demo's purpose)


def test_textgrid_end_rounded_past_recording_is_clamped(tmp_path, rng):
    rec, mono = _recording(tmp_path, rng, 16000)  # exactly 1.5 s = 24000 samples
    tg = tmp_path / "s.TextGrid"
    # 1.5004 s -> sample 24006, within the 1 ms (16 samples) slack: clamped to 24000 (calc)
    tg.write_text(textgrid_text([(0, 1.2, ""), (1.2, 1.5004, "ka")], 1.5004), encoding="utf-8")
    t = load_textgrid(rec, tg, "syll", sr=16000, trim=TrimSpec(threshold_db=-60)).tokens[0]
    np.testing.assert_array_equal(t.samples, mono[19200:24000])


def test_cli_inspect_tsv_never_overwrites_a_users_file(tmp_path, capsys):
    mine = tmp_path / "mine.tsv"
    mine.write_text("my own notes\n")
    assert cli.main(["inspect", str(REPO / "demo_corpus"), "--tsv", str(mine)]) == 2
    assert "is not a table stimforge inspect wrote" in capsys.readouterr().err
    assert mine.read_text() == "my own notes\n"
    ours = tmp_path / "qc.tsv"
    assert cli.main(["inspect", str(REPO / "demo_corpus"), "--tsv", str(ours)]) == 0
    assert cli.main(["inspect", str(REPO / "demo_corpus"), "--tsv", str(ours)]) == 0  # ours: replaced
    assert len(ours.read_text().splitlines()) == 49  # header + 48 demo tokens

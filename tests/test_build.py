"""The build: assembly on the grid, the tables, determinism and the safety of the user's files."""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
import yaml

import stimforge.build as build_mod
from stimforge import BuildError, DesignError, load_recipe
from stimforge.build import build
from stimforge.cli import main
from stimforge.export import read_tsv
from stimforge.timing import unit_start

SR = 16000
LABELS = ["ba", "di", "ku", "mo", "se", "ta"]


def _token(f0: float, dur: float, sr: int, amp: float) -> np.ndarray:
    """A voiced syllable-like token: harmonic complex with a gentle glide and a soft onset."""
    t = np.arange(int(dur * sr)) / sr
    f = f0 * (1 + 0.1 * t / dur)
    phase = 2 * np.pi * np.cumsum(f) / sr
    x = sum(np.sin(h * phase) / h for h in range(1, 12))
    env = np.minimum(1, t / 0.02) * np.minimum(1, (dur - t) / 0.04)
    return amp * x * env / np.max(np.abs(x))


def write_corpus(folder: Path, labels=LABELS, takes: int = 2) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    rows = ["label,file,take"]
    rng = np.random.default_rng(5)
    for lab in labels:
        for k in range(takes):
            x = _token(110 + 30 * rng.random(), 0.18 + 0.1 * rng.random(), SR, 0.2 + 0.3 * rng.random())
            x = np.concatenate([np.zeros(400), x, np.zeros(400)])
            name = f"{lab}_{k + 1}.wav"
            sf.write(folder / name, x, SR, subtype="PCM_16")
            rows.append(f"{lab},{name},{k + 1}")
    (folder / "index.csv").write_text("\n".join(rows) + "\n")
    return folder / "index.csv"


MATERIAL = """# invented test material: 6 lines of 2 words
ba di | ku mo || se ta | di ku ||
mo se | ta ba || ku ta | ba se ||
di mo | se ku || ta di | mo ba ||
se ba | di ta || ku se | mo di ||
ta ku | ba mo || di se | ku ba ||
mo ta | se di || ba ku | ta mo ||
"""


def write_recipe(folder: Path, **over) -> Path:
    corpus = write_corpus(folder / "tokens")
    (folder / "material.txt").write_text(MATERIAL)
    data = {
        "name": "tiny",
        "seed": 3,
        "hierarchy": {"unit": {"name": "syllable", "duration": 0.25},
                      "levels": [{"name": "word", "size": 2}, {"name": "line", "size": 2}]},
        "corpus": {"index": str(corpus.relative_to(folder))},
        "material": {"text": "material.txt"},
        "conditions": [{"name": "intact", "kind": "intact"},
                       {"name": "scrambled", "kind": "scramble", "level": "syllable"},
                       {"name": "reversed", "kind": "reverse"}],
        "repeat": {"conditions": ["intact"], "placement": "adjacent"},
        "trials": {"groups_per_trial": 3, "lead_in": True, "silence_before": 0.1,
                   "silence_after": 0.1, "per_condition": 2, "lists": 2},
        "retime": {"backend": "world", "cache_dir": str(folder / "cache")},
        "pitch": {"policy": "flat"},
        "output": {"sample_rate": 22050, "subtype": "PCM_24"},
        "check": {"run": False},
    }
    for k, v in over.items():
        node = data
        keys = k.split("__")
        for kk in keys[:-1]:
            node = node[kk]
        node[keys[-1]] = v
    p = folder / "tiny.yaml"
    p.write_text(yaml.safe_dump(data, sort_keys=False))
    return p


def tree_digest(folder: Path, skip=("build.log",)) -> dict[str, str]:
    return {
        p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file() and p.name not in skip
    }


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tiny")
    recipe = write_recipe(folder)
    result = build(recipe, out=folder / "out", progress=False)
    return folder, recipe, result


def test_files_and_tables(tiny):
    folder, _, result = tiny
    out = result.out
    for name in ["trials.tsv", "units.tsv", "manifest.json", "summary.txt", "build.log"]:
        assert (out / name).is_file(), name
    # the folder is readable by the lab, as any folder the user makes (umask), not private
    umask = os.umask(0)
    os.umask(umask)
    assert (out.stat().st_mode & 0o777) == 0o777 & ~umask
    trials = read_tsv(out / "trials.tsv")
    # 3 conditions x 2 trials + 2 intact repeats = 8 presentations per list, 2 lists
    assert len(trials) == 16
    assert {r["list"] for r in trials} == {"1", "2"}
    rt = result.rates
    for r in trials:
        info = sf.info(out / r["stim_file"])
        assert info.frames == rt.trial_samples
        assert float(r["duration"]) == pytest.approx(info.frames / info.samplerate, abs=1e-6)
        assert info.subtype == "PCM_24" and info.channels == 1
    # every file's loudness is reported (BS.1770 via pyloudnorm)
    assert all(r["lufs"] != "n/a" for r in trials)


def test_repeats_point_to_identical_audio(tiny):
    _, _, result = tiny
    trials = read_tsv(result.out / "trials.tsv")
    reps = [r for r in trials if r["repetition"] == "2"]
    assert reps and all(r["condition"] == "intact" for r in reps)
    for r in reps:
        first = next(o for o in trials if o["list"] == r["list"] and o["condition"] == r["condition"]
                     and o["trial"] == r["trial"] and o["repetition"] == "1")
        assert (result.out / first["stim_file"]).read_bytes() == (result.out / r["stim_file"]).read_bytes()
        # adjacent placement: the repeat follows its original directly
        assert int(r["order"]) == int(first["order"]) + 1


def test_onsets_exact_and_on_grid(tiny):
    """Every unit's samples in the WAV are the processed token placed at its grid onset."""
    _, recipe_path, result = tiny
    from stimforge.corpus import load_corpus
    from stimforge.retime import process_tokens

    recipe = load_recipe(recipe_path)
    rt = recipe.rates()
    corpus = load_corpus(recipe.corpus, sr=rt.sr)
    units = [r for r in read_tsv(result.out / "units.tsv") if r["level"] == "syllable"]
    used = sorted({u["token"] for u in units})
    tokens = [t for t in corpus.tokens if t.id in used]
    base_n = rt.slot_lengths[0]  # every token is rendered once, at the shorter slot length
    ps = process_tokens(tokens, sr=rt.sr, n_samples=base_n, retime=recipe.retime,
                        pitch=recipe.pitch, level=recipe.level, target_f0=corpus.median_f0(),
                        progress=False)
    lead = round(recipe.trials.silence_before * rt.sr)
    audio: dict[str, np.ndarray] = {}
    for u in units:
        x = audio.setdefault(u["stim_file"], sf.read(result.out / u["stim_file"])[0])
        k = int(u["index"])
        start = lead + unit_start(k, unit_duration=0.25, sr=rt.sr)
        n = lead + unit_start(k + 1, unit_duration=0.25, sr=rt.sr) - start
        # the table's onset is the grid onset within one sample (here: within 1 us)
        assert float(u["onset"]) * rt.sr == pytest.approx(start, abs=0.05)
        assert float(u["duration"]) * rt.sr == pytest.approx(n, abs=0.05)
        seg = ps.get(u["token"])
        if u["reversed"] == "1":
            seg = seg[::-1]
        # PCM_24 quantisation step is 2**-23 (soundfile/libsndfile scaling); a slot one sample
        # longer than the rendering ends in one zero sample
        np.testing.assert_allclose(x[start:start + base_n], seg, atol=2.0 ** -23)
        assert n == base_n or x[start + base_n] == 0.0
    # the silences are silent
    for x in audio.values():
        assert not np.any(x[:lead])


def test_hierarchy_tiles(tiny):
    _, _, result = tiny
    units = read_tsv(result.out / "units.tsv")
    names = ["syllable", "word", "line"]
    sizes = {"word": 2, "line": 2}
    for stim in {u["stim_file"] for u in units}:
        rows = {n: [u for u in units if u["stim_file"] == stim and u["level"] == n] for n in names}
        # 4 lines (1 lead-in + 3) x 2 words x 2 syllables
        assert [len(rows[n]) for n in names] == [16, 8, 4]
        for child, parent in [("syllable", "word"), ("word", "line")]:
            for g, p in enumerate(rows[parent]):
                kids = rows[child][g * sizes[parent]:(g + 1) * sizes[parent]]
                assert kids[0]["onset"] == p["onset"]  # every higher unit starts on a unit onset
                end = float(kids[-1]["onset"]) + float(kids[-1]["duration"])
                assert end == pytest.approx(float(p["onset"]) + float(p["duration"]), abs=1e-6)
                assert [int(k["position"]) for k in kids] == [1, 2]
                assert "-".join(k["label"] for k in kids) == p["label"]
        assert [int(r["lead_in"]) for r in rows["line"]] == [1, 0, 0, 0]


def test_label_balance_across_conditions(tiny):
    _, _, result = tiny
    units = [u for u in read_tsv(result.out / "units.tsv") if u["level"] == "syllable"]
    counts: dict[str, dict[str, int]] = {}
    for u in units:
        c = counts.setdefault(u["condition"], {})
        c[u["label"]] = c.get(u["label"], 0) + 1
    assert counts["intact"] == counts["scrambled"] == counts["reversed"]


def test_manifest_provenance(tiny):
    _, _, result = tiny
    man = json.loads((result.out / "manifest.json").read_text())
    assert man["seed"] == 3 and man["rate_table"]["levels"][2]["rate"] == 1.0
    for rel, digest in man["outputs"].items():
        assert hashlib.sha256((result.out / rel).read_bytes()).hexdigest() == digest
    assert "build.log" not in man["outputs"] and "manifest.json" not in man["outputs"]
    units = read_tsv(result.out / "units.tsv")
    assert {u["token"] for u in units if u["level"] == "syllable"} <= set(man["inputs"])
    assert all(len(v) == 64 for v in man["inputs"].values())
    assert len(man["tokens"]) == len(man["inputs"])
    assert man["versions"]["pyworld"]
    # nothing machine-dependent: no absolute paths inside the manifest
    assert str(result.out) not in json.dumps(man)
    assert man["recipe"]["corpus"]["index"] == "tokens/index.csv"


def test_determinism_across_builds_and_jobs(tiny, tmp_path):
    folder, recipe, result = tiny
    again = build(recipe, out=tmp_path / "again", jobs=2, progress=False)
    assert tree_digest(again.out) == tree_digest(result.out)
    other = build(recipe, out=tmp_path / "other", seed=4, progress=False)
    assert tree_digest(other.out)["trials.tsv"] != tree_digest(result.out)["trials.tsv"]


def test_refuses_non_empty_output_and_keeps_every_byte(tiny, capsys):
    folder, recipe, result = tiny
    before = tree_digest(result.out, skip=())
    assert main(["build", str(recipe), "--out", str(result.out), "--quiet"]) == 2
    assert "not empty" in capsys.readouterr().err
    assert tree_digest(result.out, skip=()) == before


def test_overwrite_replaces_only_stimforge_files(tmp_path):
    recipe = write_recipe(tmp_path)
    out = tmp_path / "out"
    build(recipe, out=out, progress=False)
    mine = out / "my_notes.txt"
    mine.write_text("participant log, keep me")
    build(recipe, out=out, overwrite=True, seed=9, progress=False)
    assert mine.read_text() == "participant log, keep me"
    assert json.loads((out / "manifest.json").read_text())["seed"] == 9
    # a user's change to a file stimforge wrote makes --overwrite stop, touching nothing, and
    # before any work is done (no partial folder is even made)
    (out / "summary.txt").write_text("edited by hand")
    before = tree_digest(out, skip=())
    with pytest.raises(BuildError, match="not written by stimforge .* summary.txt"):
        build(recipe, out=out, overwrite=True, progress=False)
    assert tree_digest(out, skip=()) == before
    assert not list(tmp_path.glob(".out.partial-*"))


def test_failure_mid_build_leaves_no_output(tmp_path, monkeypatch):
    recipe = write_recipe(tmp_path)
    calls = {"n": 0}
    real = build_mod.assemble_trial

    def failing(*a, **k):
        calls["n"] += 1
        if calls["n"] == 3:
            raise RuntimeError("injected failure")
        return real(*a, **k)

    monkeypatch.setattr(build_mod, "assemble_trial", failing)
    with pytest.raises(RuntimeError, match="injected"):
        build(recipe, out=tmp_path / "out", progress=False)
    assert not (tmp_path / "out").exists()
    assert not list(tmp_path.glob(".out.partial-*"))


def test_missing_labels_all_listed(tmp_path, capsys):
    recipe = write_recipe(tmp_path)
    (tmp_path / "material.txt").write_text(MATERIAL.replace("ba di | ku mo", "zo di | ku xi"))
    assert main(["build", str(recipe), "--out", str(tmp_path / "o"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "xi" in err and "zo" in err
    assert not (tmp_path / "o").exists()
    with pytest.raises(DesignError):
        build(recipe, out=tmp_path / "o2", progress=False)

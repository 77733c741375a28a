"""`stimforge build RECIPE --dry-run`: what a build checks before any re-timing, on the demo.

Each test copies the demo recipe and corpus, breaks one thing and asserts the finding that
names it.  The wall-clock time of each dry run is printed (no timed assertion: the target is
under 5 s on the demo; measured about 0.5-1 s here).
"""

from __future__ import annotations

import re
import shutil
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from stimforge.cli import main
from stimforge.preflight import CHECKS, preflight

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture
def demo(tmp_path) -> Path:
    """A copy of the demo: tmp/recipes/demo.yaml and tmp/demo_corpus (the recipe's paths)."""
    (tmp_path / "recipes").mkdir()
    shutil.copy(ROOT / "recipes" / "demo.yaml", tmp_path / "recipes" / "demo.yaml")
    shutil.copytree(ROOT / "demo_corpus", tmp_path / "demo_corpus",
                    ignore=shutil.ignore_patterns("*.py", "__pycache__"))
    return tmp_path / "recipes" / "demo.yaml"


def _tree(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _dry_run(recipe: Path, capsys, *extra: str) -> tuple[int, str, float]:
    t0 = time.perf_counter()
    rc = main(["build", str(recipe), "--dry-run", *extra])
    seconds = time.perf_counter() - t0
    out = capsys.readouterr().out
    print(f"dry run: {seconds:.2f} s (rc {rc})")
    return rc, out, seconds


def test_dry_run_of_the_demo_finds_nothing_and_writes_nothing(demo, capsys):
    before = _tree(demo.parent.parent)
    rc, out, _ = _dry_run(demo, capsys)
    assert rc == 0, out
    for check in CHECKS:  # every check ran and passed
        assert f"ok       {check}" in out, (check, out)
    assert "dry run: no problem found" in out
    # the demo's corpus (calc from demo_corpus/index.csv): 48 tokens, 24 labels
    assert "48 tokens, 24 labels" in out
    assert _tree(demo.parent.parent) == before  # nothing written, no build folder made
    assert not (demo.parent / "build").exists()


def test_dry_run_catches_a_missing_corpus(demo, capsys):
    shutil.rmtree(demo.parent.parent / "demo_corpus" / "tokens")
    rc, out, _ = _dry_run(demo, capsys)
    assert rc == 2, out
    assert "PROBLEM  corpus" in out and "ka_1.wav" in out, out
    # what needs the corpus is skipped, not reported as a second, misleading problem
    assert "skipped  stretch" in out and "skipped  design" in out
    assert "ok       material" in out  # the material is still checked on its own


def test_dry_run_catches_a_missing_corpus_index(demo, capsys):
    (demo.parent.parent / "demo_corpus" / "index.csv").unlink()
    rc, out, _ = _dry_run(demo, capsys)
    assert rc == 2 and "PROBLEM  corpus" in out and "index.csv" in out, out


def test_dry_run_catches_a_broken_material_file(demo, capsys):
    verses = demo.parent.parent / "demo_corpus" / "verses.txt"
    lines = verses.read_text(encoding="utf-8").splitlines()
    first = next(i for i, ln in enumerate(lines) if ln.strip() and not ln.startswith("#"))
    lines[first] = "ne me | to ||  to na | mo ni |||"  # a word of 1 syllable (size is 2)
    verses.write_text("\n".join(lines) + "\n", encoding="utf-8")
    rc, out, _ = _dry_run(demo, capsys)
    assert rc == 2, out
    assert "PROBLEM  material" in out and f"verses.txt:{first + 1}" in out, out
    assert "ok       corpus" in out  # the other checks still ran


def test_dry_run_catches_a_too_short_token(demo, capsys):
    path = demo.parent.parent / "demo_corpus" / "tokens" / "ka_1.wav"
    x, sr = sf.read(path)
    sf.write(path, x[: int(0.08 * sr)], sr)  # 80 ms of a 250 ms slot
    rc, out, _ = _dry_run(demo, capsys)
    assert rc == 2, out
    assert "PROBLEM  stretch" in out and "'tokens/ka_1.wav'" in out and "too short" in out, out
    # the recipe's retime.stretch_range is [0.6, 1.7] (recipes/demo.yaml); 0.25 s / <= 0.08 s
    # is a factor above 3 (calc)
    m = re.search(r"'tokens/ka_1.wav' \(\d+ ms, too short\): factor (\d+\.\d+)", out)
    assert m and float(m.group(1)) > 3.0, out


def test_every_problem_is_listed_not_only_the_first(demo, capsys):
    corpus = demo.parent.parent / "demo_corpus"
    path = corpus / "tokens" / "mo_2.wav"
    x, sr = sf.read(path)
    sf.write(path, x[: int(0.06 * sr)], sr)
    (corpus / "verses.txt").write_text("ka mo | ri ||\n", encoding="utf-8")
    rep = preflight(demo, out=demo.parent / "x")
    print(f"dry run: {rep.seconds:.2f} s")
    assert {f.check for f in rep.problems} >= {"material", "stretch"}, rep.format()
    assert not rep.ok and "2 problems" in rep.format()


def test_labels_without_tokens_and_a_missing_material_file(demo, tmp_path):
    corpus = demo.parent.parent / "demo_corpus"
    text = (corpus / "verses.txt").read_text(encoding="utf-8")
    (corpus / "verses.txt").write_text(text.replace("ne me | to ma", "zu me | to ma", 1),
                                       encoding="utf-8")
    rep = preflight(demo, out=tmp_path / "o")
    labels = rep.finding("labels")
    assert labels.status == "problem" and "'zu' (1 uses)" in labels.message
    (corpus / "verses.txt").unlink()
    rep = preflight(demo, out=tmp_path / "o")
    assert rep.finding("material").status == "problem"
    assert "material file not found" in rep.finding("material").message


def test_output_folder_and_recipe_problems(demo, tmp_path, capsys):
    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "notes.txt").write_text("mine")
    rc, out, _ = _dry_run(demo, capsys, "--out", str(busy))
    assert rc == 2 and "PROBLEM  output" in out and "not empty" in out
    bad = demo.parent / "bad.yaml"
    bad.write_text(demo.read_text().replace("seed: 20261201", "seed: -3"))
    rep = preflight(bad)
    assert rep.finding("recipe").status == "problem" and "seed" in rep.finding("recipe").message
    assert all(f.status == "skipped" for f in rep.findings if f.check != "recipe")


def test_a_dry_run_agrees_with_the_build_on_stretch(demo, tmp_path):
    # the same planner decides: a token the dry run calls too short stops the build too
    from stimforge import build
    from stimforge.errors import RetimeError

    path = demo.parent.parent / "demo_corpus" / "tokens" / "ka_1.wav"
    x, sr = sf.read(path)
    sf.write(path, np.asarray(x[: int(0.08 * sr)]), sr)
    assert preflight(demo, out=tmp_path / "a").finding("stretch").status == "problem"
    with pytest.raises(RetimeError, match="ka_1.wav"):
        build(demo, out=tmp_path / "b", progress=False, check=False)


def test_a_material_file_with_a_byte_order_mark_passes_as_the_build_reads_it(demo, capsys):
    # editors on some systems start UTF-8 files with U+FEFF; the build's reader tolerates it,
    # and the dry run reads the file with the same function (design.read_material_text)
    verses = demo.parent.parent / "demo_corpus" / "verses.txt"
    verses.write_bytes(b"\xef\xbb\xbf" + verses.read_bytes())  # the UTF-8 byte order mark, EF BB BF (from memory)
    rc, out, _ = _dry_run(demo, capsys)
    assert rc == 0, out
    assert "ok       material" in out and "ok       labels" in out

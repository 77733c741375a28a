"""Every recipe shipped in recipes/ loads, and the two extra designs build as documented."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from stimforge import load_recipe
from stimforge.cli import main

RECIPES = Path(__file__).resolve().parents[1] / "recipes"


@pytest.mark.parametrize("path", sorted(RECIPES.glob("*.yaml")), ids=lambda p: p.name)
def test_recipe_loads(path):
    r = load_recipe(path)
    assert r.rates().rows[0].rate > 0


def test_phrase_sentence_design_builds_clean(tmp_path, capsys):
    # 250 ms syllables -> phrases of 2 -> sentences of 2: 4 / 2 / 1 Hz (the rates of
    # Ding et al. 2016, Nat Neurosci 19:158)
    rc = main(["build", str(RECIPES / "phrase_sentence_4hz.yaml"), "--out", str(tmp_path / "ps"),
               "--quiet"])
    out = capsys.readouterr().out
    assert rc == 0, out
    rep = json.loads((tmp_path / "ps" / "check" / "check.json").read_text())
    assert rep["verdict"]["passed"] and set(rep["design"]["conditions"]) == {
        "sentences", "random-syllables"}


def test_word_stream_check_finds_the_position_confound(tmp_path, capsys):
    """A fixed-word stream ties each syllable to a word position: the recipe says the check
    will find that, and where; it must (in the structured stream, at the word level)."""
    rc = main(["build", str(RECIPES / "word_stream.yaml"), "--out", str(tmp_path / "ws"),
               "--quiet"])
    capsys.readouterr()
    assert rc == 1
    rep = json.loads((tmp_path / "ws" / "check" / "check.json").read_text())
    sig = [r for r in rep["features"] + rep["spectral"] if r["significant"]]
    assert sig and all(r["condition"] == "words" and r["level"] == "word" for r in sig)
    assert "FAIL on the 'words' condition" in (RECIPES / "word_stream.yaml").read_text()

"""One word per idea: the renamed recipe keys, their deprecated old spellings, one verdict
wording, and no internal name in what a reader sees."""

from __future__ import annotations

import warnings
from pathlib import Path

import pytest
import yaml

from stimforge.errors import RecipeError
from stimforge.prosody import apply_pitch_policy
from stimforge.recipe import (TEMPLATE, LoudnessSpec, RecipeKeyWarning, load_recipe,
                              recipe_from_dict, recipe_json_schema)

ROOT = Path(__file__).resolve().parents[1]


def _demo_dict() -> dict:
    data = yaml.safe_load((ROOT / "recipes" / "demo.yaml").read_text(encoding="utf-8"))
    return data


def test_the_loudness_section_and_its_old_name():
    data = _demo_dict()
    data["loudness"] = {"target_dbfs": -24.0, "fade": 0.02}
    r = recipe_from_dict(data, base_dir=ROOT / "recipes")
    assert isinstance(r.loudness, LoudnessSpec) and r.loudness.target_dbfs == -24.0
    old = _demo_dict()
    old.pop("loudness")
    old["level"] = {"target_dbfs": -24.0, "fade": 0.02}
    with pytest.warns(RecipeKeyWarning, match=r"section 'level' is now 'loudness'"):
        r2 = recipe_from_dict(old, base_dir=ROOT / "recipes")
    assert r2.loudness == r.loudness and r2.level is r2.loudness  # the Python alias
    assert "level" not in r2.to_dict() and r2.to_dict()["loudness"]["target_dbfs"] == -24.0
    both = dict(data, level={"target_dbfs": -20.0})
    with pytest.raises(RecipeError, match=r"give the loudness settings once"):
        recipe_from_dict(both, base_dir=ROOT / "recipes")


def test_the_contour_pitch_policy_and_its_old_name():
    data = _demo_dict()
    data["pitch"] = {"policy": "contour"}
    assert recipe_from_dict(data, base_dir=ROOT / "recipes").pitch.policy == "contour"
    data["pitch"] = {"policy": "level"}
    with pytest.warns(RecipeKeyWarning, match=r"pitch.policy 'level' is now 'contour'"):
        r = recipe_from_dict(data, base_dir=ROOT / "recipes")
    assert r.pitch.policy == "contour"
    import numpy as np

    f0 = np.array([0.0, 100.0, 200.0])
    # geometric mean of the voiced frames is sqrt(100 * 200) = 141.42 Hz (calc); moved to 120
    out, _ = apply_pitch_policy(f0, policy="contour", target_hz=120.0)
    np.testing.assert_allclose(out, [0.0, 100 * 120 / (100 * 200) ** 0.5,
                                     200 * 120 / (100 * 200) ** 0.5], rtol=1e-12)


def test_schema_template_and_recipes_speak_the_new_names():
    schema = recipe_json_schema()
    assert "loudness" in schema["properties"] and "level" not in schema["properties"]
    pitch = schema["$defs"]["PitchSpec"]["properties"]["policy"]
    assert pitch.get("enum") == ["flat", "contour", "keep"], pitch
    assert "\nloudness:" in TEMPLATE and "\nlevel:" not in TEMPLATE
    for path in sorted((ROOT / "recipes").glob("*.yaml")):
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # no old spelling left in the shipped recipes
            load_recipe(path)
        text = path.read_text(encoding="utf-8")
        assert "\nlevel:" not in text and "policy: level" not in text, path


def test_one_verdict_wording_in_terminal_page_and_build_summary():
    from stimforge.verify_report import VERDICT_STATES

    words = {label for label, _ in VERDICT_STATES.values()}
    assert words == {"PASS", "CUE FOUND", "INCONCLUSIVE"}
    src = "".join(p.read_text(encoding="utf-8") for p in (ROOT / "stimforge").rglob("*.py"))
    for old in ("FAIL: a cue was found", "FOUND A CUE", "verdict = \"PASS: no cue found\""):
        assert old not in src, old


def test_plain_words_replace_internal_names():
    from stimforge.verify_report import plain

    # the checker's own descriptions (verify.py) name features by their JSON keys
    assert plain("intact: rms_db by position in word") == \
        "intact: loudness by position in the word"
    assert plain("active_ms by position in line") == "active duration by position in the line"
    assert plain("a level_step of 1 dB; itpc; f0_st") == "a loudness step of 1 dB; ITPC; pitch"

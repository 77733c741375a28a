"""Recipe schema, YAML errors, rate table and the rounding rule."""

from __future__ import annotations

import copy
import json
import warnings
from pathlib import Path

import pytest
import yaml

from stimforge import RecipeError, load_recipe, rate_table, recipe_from_dict
from stimforge.cli import main
from stimforge.recipe import TEMPLATE, RateWarning, recipe_json_schema
from stimforge.timing import seconds_to_samples, slot_length, unit_start

BASE = yaml.safe_load(TEMPLATE)


def _with(**changes):
    """A copy of the template recipe with dotted-path changes; value None deletes the key."""
    data = copy.deepcopy(BASE)
    for dotted, value in changes.items():
        keys = dotted.split("__")
        node = data
        for k in keys[:-1]:
            node = node[int(k)] if isinstance(node, list) else node[k]
        if value is None:
            del node[keys[-1]]
        else:
            node[keys[-1]] = value
    return data


# --------------------------------------------------------------------------- rate table
def test_ding_2016_rates():
    # 250 ms syllables grouped 2 and 4 -> 4 / 2 / 1 Hz (Ding et al. 2016, Nat Neurosci 19:158).
    t = rate_table(
        unit_name="syllable",
        unit_duration=0.25,
        levels=[("phrase", 2), ("sentence", 2)],
        sr=44100,
        n_top_groups=10,
    )
    assert [r.rate for r in t.rows] == [4.0, 2.0, 1.0]
    assert [r.period for r in t.rows] == [0.25, 0.5, 1.0]
    assert t.window == 10.0 and t.resolution == pytest.approx(0.1)
    # each rate falls on bin rate * window (calc)
    assert [r.bin for r in t.rows] == [40, 20, 10]
    assert t.slot_lengths == (11025,)  # 0.25 s * 44100 Hz (calc)


def test_300ms_lines_of_5():
    # 300 ms unit, lines of 5 -> 3.333 / 0.667 Hz (common practice)
    t = rate_table(unit_name="syllable", unit_duration=0.3, levels=[("line", 5)], sr=48000,
                   n_top_groups=6)
    assert t.rows[0].rate == pytest.approx(3.3333, abs=1e-4)
    assert t.rows[1].rate == pytest.approx(0.6667, abs=1e-4)
    assert t.window == pytest.approx(9.0)
    assert [r.bin for r in t.rows] == [30, 6]


def test_non_whole_slot_rounding_has_no_drift():
    # 0.25 s at 22050 Hz is 5512.5 samples: slots alternate 5513/5512 and onset k sits at
    # round_half_up(k * 5512.5) (calc), so after an hour the error is still < 1 sample.
    assert [unit_start(k, unit_duration=0.25, sr=22050) for k in range(5)] == [
        0, 5513, 11025, 16538, 22050]
    assert {slot_length(k, unit_duration=0.25, sr=22050) for k in range(100)} == {5512, 5513}
    k = 4 * 3600  # one hour of 250 ms units
    assert unit_start(k, unit_duration=0.25, sr=22050) == 22050 * 3600
    # 0.3 as written, not its binary approximation: 0.3 * 3 * 44100 is 39690 exactly
    assert unit_start(3, unit_duration=0.3, sr=44100) == 39690
    assert seconds_to_samples(0.5, sr=22050) == 11025


def test_close_rates_warn():
    # one 1 s cycle: rates 4 / 2 / 1 Hz sit on bins 4 / 2 / 1 (calc)
    with pytest.warns(RateWarning) as rec:
        rate_table(unit_name="u", unit_duration=0.25, levels=[("a", 2), ("b", 2)], sr=16000,
                   n_top_groups=1)
    msgs = sorted(str(w.message) for w in rec)
    assert len(msgs) == 2
    assert "'a' and 'b' are only 1 FFT bin(s)" in msgs[0]
    assert "'u' and 'a' are only 2 FFT bin(s)" in msgs[1]


def test_recipe_rate_table_and_trial_samples():
    r = recipe_from_dict(BASE)
    t = r.rates()
    # template: 10 lines of 4 syllables + a 1-line lead-in, 0.5 s silence each side
    assert t.units_per_trial == 44 and t.analysed_units == 40
    assert t.trial_samples == 44100 * (11 + 1)
    assert t.to_dict()["levels"][2]["bin"] == 10


# --------------------------------------------------------------------------- schema
@pytest.mark.parametrize(
    "changes, match",
    [
        ({"hierarchy__unit__duration": -0.25}, r"hierarchy\.unit\.duration: .*greater than 0"),
        ({"hierarchy__levels": []}, r"hierarchy\.levels: .*at least 1"),
        ({"hierarchy__levels__0__size": 1}, r"hierarchy\.levels\[0\]\.size"),
        ({"hierarchy__levels__1__name": "word"}, r"level names must be unique; repeated: word"),
        ({"seed": -1}, r"seed"),
        ({"seed": None}, r"seed: required field is missing"),
        ({"retime__backend": "psola"}, r"retime\.backend: Input should be 'world'"),
        ({"retime__stretch_range": [1.2, 1.7]}, r"need 0 < low <= 1 <= high"),
        ({"pitch__policy": "monotone"}, r"pitch\.policy"),
        ({"output__subtype": "FLOAT"}, r"output\.subtype"),
        ({"conditions__1__level": "sylable"}, r"did you mean 'syllable'"),
        ({"conditions__1__level": "line"}, r"top level cannot be scrambled"),
        ({"conditions__0__level": "word"}, r"'level' only goes with 'scramble'"),
        ({"conditions": [{"name": "a", "kind": "intact"}, {"name": "a", "kind": "reverse"}]},
         r"condition names must be unique"),
        ({"repeat": {"conditions": ["intakt"]}}, r"did you mean 'intact'"),
        ({"corpus__recording": "x.wav"}, r"either 'index' or 'recording'"),
        ({"corpus__index": None}, r"all three of 'recording', 'textgrid' and 'tier'"),
        ({"material__generate": {"mode": "words", "words": [["a", "b"]]}},
         r"exactly one of 'text' or 'generate'"),
        ({"trials__duration": 10.0}, r"exactly one of 'groups_per_trial' or 'duration'"),
        ({"trials__groups_per_trial": None, "trials__duration": 10.5},
         r"not a whole number of cycles .* nearest valid lengths: 10 s or 11 s"),
        ({"loudness__target_dbfs": 0}, r"loudness\.target_dbfs"),
        ({"trials__per_conditon": 3}, r"unknown key 'per_conditon'; did you mean 'per_condition'"),
    ],
)
def test_invalid_recipes(changes, match):
    with pytest.raises(RecipeError, match=match):
        recipe_from_dict(_with(**changes))


def test_recipe_error_is_value_error():
    with pytest.raises(ValueError):
        recipe_from_dict({"name": "x"})


@pytest.mark.parametrize(
    "changes",
    [
        {},
        {"trials__groups_per_trial": None, "trials__duration": 12.0},
        {"retime__backend": "cut-pad", "pitch__policy": "keep"},
        {"material__text": None,
         "material__generate": {"mode": "words", "words": [["tu", "pi"], ["ro", "ka"]]}},
        {"hierarchy__levels": [{"name": "w", "size": 3}, {"name": "p", "size": 2},
                               {"name": "s", "size": 2}, {"name": "st", "size": 2}]},
    ],
)
def test_valid_recipes(changes):
    r = recipe_from_dict(_with(**changes))
    assert r.rates().rows[0].rate == pytest.approx(4.0)


def test_generated_words_must_match_first_level():
    data = _with(material__text=None,
                 material__generate={"mode": "words", "words": [["a", "b", "c"]]})
    with pytest.raises(RecipeError, match="have 3 units each but level 'word' has size 2"):
        recipe_from_dict(data)


def test_relative_paths_resolve_against_recipe_folder(tmp_path):
    sub = tmp_path / "exp"
    sub.mkdir()
    (sub / "r.yaml").write_text(TEMPLATE)
    r = load_recipe(sub / "r.yaml")
    assert r.corpus.index == sub / "tokens" / "index.csv"
    assert r.material.text == sub / "material.txt"
    assert r.source == (sub / "r.yaml").resolve()


def test_misspelt_key_names_yaml_line(tmp_path):
    text = TEMPLATE.replace("  lead_in: true", "  leadin: true")
    lineno = next(i for i, ln in enumerate(text.splitlines(), 1) if "leadin" in ln)
    p = tmp_path / "r.yaml"
    p.write_text(text)
    with pytest.raises(RecipeError) as info:
        load_recipe(p)
    msg = str(info.value)
    assert f"{p}:{lineno}: trials.leadin: unknown key 'leadin'; did you mean 'lead_in'?" in msg


def test_yaml_syntax_error_has_line(tmp_path):
    p = tmp_path / "r.yaml"
    p.write_text("name: x\nseed: [1, 2\nhierarchy: {}\n")
    with pytest.raises(RecipeError, match=r"r\.yaml:\d+: not valid YAML"):
        load_recipe(p)


def test_missing_and_empty_recipe_files(tmp_path):
    with pytest.raises(RecipeError, match="recipe file not found"):
        load_recipe(tmp_path / "nope.yaml")
    (tmp_path / "e.yaml").write_text("")
    with pytest.raises(RecipeError, match="is empty"):
        load_recipe(tmp_path / "e.yaml")


def test_json_schema_is_valid_and_accepts_template():
    jsonschema = pytest.importorskip("jsonschema")
    schema = recipe_json_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.validate(BASE, schema)
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(_with(trials__bogus=1), schema)


# --------------------------------------------------------------------------- CLI
def test_cli_schema_init_rates(tmp_path, capsys):
    assert main(["schema"]) == 0
    schema = json.loads(capsys.readouterr().out)
    assert schema["title"] == "stimforge recipe"
    p = tmp_path / "new.yaml"
    assert main(["init", str(p)]) == 0
    capsys.readouterr()
    assert main(["rates", str(p)]) == 0
    out = capsys.readouterr().out
    assert "syllable" in out and "4.0000" in out and "resolution 0.1 Hz" in out
    # init never overwrites
    before = p.read_bytes()
    assert main(["init", str(p)]) == 2
    assert "already exists" in capsys.readouterr().err
    assert p.read_bytes() == before


def test_cli_bad_recipe_exit_2(tmp_path, capsys):
    p = tmp_path / "r.yaml"
    p.write_text(TEMPLATE.replace("backend: world", "backend: worl"))
    assert main(["rates", str(p)]) == 2
    assert "retime.backend" in capsys.readouterr().err


def test_template_loads_without_warnings(tmp_path):
    p = tmp_path / "t.yaml"
    p.write_text(TEMPLATE)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        load_recipe(p)
    assert Path(p).exists()


def test_cross_field_errors_name_the_field_and_its_line(tmp_path):
    text = TEMPLATE.replace("  groups_per_trial: 10       # top-level groups analysed per trial",
                            "  duration: 10.5")
    p = tmp_path / "r.yaml"
    p.write_text(text)
    lineno = next(i for i, ln in enumerate(text.splitlines(), 1) if "duration: 10.5" in ln)
    with pytest.raises(RecipeError) as info:
        load_recipe(p)
    assert f"{p}:{lineno}: trials.duration: 10.5 s is not a whole number" in str(info.value)
    text = TEMPLATE.replace("level: syllable}   # random", "level: sylable}   # random")
    p.write_text(text)
    lineno = next(i for i, ln in enumerate(text.splitlines(), 1) if "sylable}" in ln)
    with pytest.raises(RecipeError, match=rf":{lineno}: conditions\[1\]\.level: .*did you mean"):
        load_recipe(p)


def test_yaml_boolean_label_gets_a_quoting_hint():
    data = _with(material__text=None,
                 material__generate={"mode": "words", "words": [["ka", False]]})
    with pytest.raises(RecipeError, match=r"words\[0\]\[1\].*quote the label, e\.g\. 'no'"):
        recipe_from_dict(data)
